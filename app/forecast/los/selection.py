"""Choosing tree sizes on a later period for a held-out half of the stays."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import time
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
import numpy.typing as npt
import pandas as pd

from app.forecast.los.calibration import MAX_LANDMARKS, WINDOW_DAYS
from app.forecast.los.constants import (
    DEPTH_GRID,
    GROUP_DEPTH_GRID,
    MAX_VALIDATION_ROWS,
    MIN_ROWS_LEAF,
    MIN_STAYS_SHARE_GRID,
    NS_PER_DAY,
    FloatArray,
    IntArray,
)
from app.forecast.los.design import Design, _row_matrix, make_design
from app.forecast.los.rows import (
    IntervalRows,
    Landmarks,
    _rows_weekday,
    entry_days,
    interval_rows,
)
from app.forecast.training_data import (
    KnownColumnsOnly,
)
from app.state.frames import utc_ns
from app.stats.stay_groups import StayGroups, fit_stay_groups, round_up_to_hours
from app.stats.survival_tree import (
    DischargeProfile,
    HazardTreeModel,
    PiecewiseHazardTree,
    piecewise_log_likelihood,
)


@dataclass(frozen=True, eq=False)
class _StayTable:
    """Whole stays as known at a cut-off: length so far, whether ended, and the days already
    spent in the unit when the extract began (0 for stays admitted after it; left
    truncation)."""

    index: IntArray
    days: FloatArray
    ended: npt.NDArray[np.bool_]
    entry: FloatArray


def _stays_at(stays: pd.DataFrame, cutoff_ns: int, extract_ns: int | None) -> _StayTable:
    """The stays admitted by ``cutoff_ns``; ``extract_ns`` is when the extract began
    (``app.state.extract.extract_start_ns``; None: every stay seen from its admission)."""
    admitted = utc_ns(stays["admitted_at"])
    discharged = utc_ns(stays["discharged_at"])
    keep = admitted <= cutoff_ns
    ended = stays["discharged_at"].notna().to_numpy() & (discharged <= cutoff_ns)
    end = np.where(ended, discharged, cutoff_ns)
    if extract_ns is not None:   # gone before the record began: on record by exception only
        keep &= ~(ended & (end < extract_ns))
    idx = np.flatnonzero(keep)
    days = (end[idx] - admitted[idx]) / NS_PER_DAY
    return _StayTable(idx.astype(np.int64), days, ended[idx],
                      entry_days(admitted[idx], days, extract_ns))


def _stay_hash_half(stay_ids: npt.ArrayLike) -> npt.NDArray[np.bool_]:
    """A fixed half of the stays, by a hash of the stay id (the same on every run)."""
    hashed = pd.util.hash_pandas_object(pd.Series(np.asarray(stay_ids, dtype=object)),
                                        index=False).to_numpy()
    return (hashed % np.uint64(2)) == 1


def _sample_landmarks(landmarks: Landmarks, limit: int, rng: np.random.Generator) -> Landmarks:
    if landmarks.size <= limit:
        return landmarks
    keep = np.zeros(landmarks.size, dtype=bool)
    keep[rng.choice(landmarks.size, size=limit, replace=False)] = True
    return landmarks.subset(keep)


def recent_landmarks(landmarks: Landmarks, until_ns: int, seed: int) -> Landmarks:
    """The landmarks a model's rate scale is fitted on: those of the last ``WINDOW_DAYS``
    before ``until_ns``, at most ``MAX_LANDMARKS`` (sampled; app/forecast/los/calibration.py)."""
    recent = landmarks.subset(landmarks.at_ns >= until_ns - WINDOW_DAYS * NS_PER_DAY)
    return _sample_landmarks(recent, MAX_LANDMARKS, np.random.default_rng([seed, 2]))


def _fit_hazard(design: Design, landmarks: Landmarks, rows: IntervalRows, *, depth: int,
                min_stays: int, x: npt.NDArray[np.float32] | None = None) -> HazardTreeModel:
    x = _row_matrix(design, landmarks, rows) if x is None else x
    tree = PiecewiseHazardTree(max_depth=depth, min_samples_leaf=MIN_ROWS_LEAF,
                               min_stays_leaf=min_stays)
    tree.fit(x, rows.event, rows.start, rows.stop, rows.days_in, features=design.features,
             groups=landmarks.stay_index[rows.landmark], sample_weight=rows.weight)
    return tree.model_


@dataclass(frozen=True, eq=False)
class _Split:
    """Fit and validation rows, split by stay and by time."""

    fit_lm: Landmarks
    fit_rows: IntervalRows
    val_lm: Landmarks
    val_rows: IntervalRows
    design: Design
    x_fit: npt.NDArray[np.float32]
    x_val: npt.NDArray[np.float32]


def _validation_split(landmarks: Landmarks, cutoff_ns: int, census_time: time, tz: ZoneInfo,
                      names: Sequence[str], rng: np.random.Generator) -> _Split:
    """Fit on what was known at V (three tenths of the way back from the cut-off, at most 180
    days) for one half of the stays (by stay-id hash); validate on the other half's landmarks
    after V, with outcomes known at the cut-off. Split by stay and by time, never by row."""
    first = int(landmarks.at_ns.min())
    span = (cutoff_ns - first) / NS_PER_DAY
    val_days = min(180.0, 0.3 * span)
    v_ns = int(cutoff_ns - val_days * NS_PER_DAY)
    held = _stay_hash_half(landmarks.stays["stay_id"].to_numpy())[landmarks.stay_index]
    fit_lm = landmarks.subset(~held).censored_at(v_ns)
    val_lm = landmarks.subset(held & (landmarks.at_ns >= v_ns))
    val_lm = _sample_landmarks(val_lm, MAX_VALIDATION_ROWS // 4, rng)
    fit_rows = interval_rows(fit_lm, census_time, tz, rng=rng, max_rows=MAX_VALIDATION_ROWS)
    val_rows = interval_rows(val_lm, census_time, tz)
    design = make_design(fit_lm, fit_rows, names)
    return _Split(fit_lm, fit_rows, val_lm, val_rows, design,
                  _row_matrix(design, fit_lm, fit_rows), _row_matrix(design, val_lm, val_rows))


def _n_stays(landmarks: Landmarks, rows: IntervalRows) -> int:
    return int(np.unique(landmarks.stay_index[rows.landmark]).size)


DEFAULT_SIZES = {"max_depth": 3, "min_stays_share": 0.04}


def _can_validate(split: _Split) -> bool:
    return bool(split.fit_rows.event.any() and split.val_rows.event.size >= 50
                and _n_stays(split.fit_lm, split.fit_rows) >= 50)


def _select_hazard(split: _Split) -> tuple[dict[str, Any], list[dict[str, Any]]]:
    """Tree depth and the fewest stays per leaf (as a share of the stays) by validation
    log-likelihood; the smallest tree within 0.0005 nats per row of the best is kept. With too
    little history to validate, fixed sizes (depth 3, 4 % of the stays; common practice, no
    source) and no validation model."""
    if not _can_validate(split):
        return {**DEFAULT_SIZES, "validation_model": None}, []
    n_stays = _n_stays(split.fit_lm, split.fit_rows)
    results: list[dict[str, Any]] = []
    models: list[HazardTreeModel] = []
    for depth in DEPTH_GRID:
        for share in MIN_STAYS_SHARE_GRID:
            model = _fit_hazard(split.design, split.fit_lm, split.fit_rows, depth=depth,
                                min_stays=max(10, int(share * n_stays)), x=split.x_fit)
            rows = split.val_rows
            score = piecewise_log_likelihood(model, split.x_val, rows.event, rows.start,
                                             rows.stop, rows.days_in, rows.weight)
            results.append({"max_depth": depth, "min_stays_share": share,
                            "leaves": int(model.tree.leaves.size), "val_loglik": score})
            models.append(model)
    # What is kept are the settings, refitted on more stays: among the validated trees of the
    # fewest leaves within the tolerance, the most restrictive settings (shallowest, largest
    # leaves), whose refit stays nearest the tree validated. Ranking the ties by score let a
    # difference in the last digits pick depth 6 with 1 % leaves when both depths had grown
    # the same two-leaf tree, and the refit on the whole training period then grew 20 leaves
    # of 1 % of the stays that no validation had seen (demo critical care, landmarks from the
    # extract's start: test Brier 0.1489 against 0.1421).
    best = max(r["val_loglik"] for r in results)
    chosen = min(range(len(results)), key=lambda i: (
        results[i]["val_loglik"] < best - 5e-4, results[i]["leaves"],
        results[i]["max_depth"], -results[i]["min_stays_share"]))
    return {"max_depth": int(results[chosen]["max_depth"]),
            "min_stays_share": float(results[chosen]["min_stays_share"]),
            "validation_model": models[chosen]}, results


def _ensemble_x(x: npt.NDArray[np.float32], weekday: FloatArray) -> npt.NDArray[np.float32]:
    return np.column_stack([x, weekday.astype(np.float32)])


# The yardstick's settings tried, each boosted for up to ENSEMBLE_MAX_ITER rounds; settings and
# rounds are chosen together by validation log-likelihood (the tree's own split by stay and
# time). The grid runs from quick and bushy to slow and coarse (common practice, no source);
# with one setting (learning rate 0.1, 15 leaves) the early stop came after 6-15 rounds on the
# demo units and the yardstick scored worse than the tree it is meant to bound.
ENSEMBLE_GRID: tuple[dict[str, Any], ...] = (
    {"learning_rate": 0.1, "max_leaf_nodes": 15, "min_samples_leaf": 200},
    {"learning_rate": 0.05, "max_leaf_nodes": 7, "min_samples_leaf": 200},
    {"learning_rate": 0.05, "max_leaf_nodes": 15, "min_samples_leaf": 800},
)
ENSEMBLE_MAX_ITER = 150


def _boosted(max_iter: int, learning_rate: float = 0.1, max_leaf_nodes: int = 15,
             min_samples_leaf: int = 200) -> Any:
    from sklearn.ensemble import HistGradientBoostingRegressor

    return KnownColumnsOnly(HistGradientBoostingRegressor(
        loss="poisson", learning_rate=learning_rate, max_iter=max_iter,
        max_leaf_nodes=max_leaf_nodes, min_samples_leaf=min_samples_leaf,
        l2_regularization=1.0, early_stopping=False, random_state=0))


def _one_thread() -> Any:
    """OpenMP limited to one thread around the ensemble: on a shared two-core machine its
    threads otherwise wait on each other (measured: 1.4 s on one thread, 13 s on two, while
    another process was busy)."""
    from threadpoolctl import threadpool_limits

    return threadpool_limits(limits=1, user_api="openmp")


def _select_ensemble(split: _Split, hazard: HazardTreeModel
                     ) -> tuple[dict[str, Any], list[dict[str, Any]]]:
    """The yardstick's settings and number of boosting rounds by validation log-likelihood
    (the same split by stay and time as the tree; scikit-learn's own early stopping would
    split rows at random): the chosen ``{"iterations", settings..., "val_loglik"}`` and, per
    setting of ENSEMBLE_GRID, its best rounds and score."""
    rows, val = split.fit_rows, split.val_rows
    exposure = hazard.profile.exposure(rows.start, rows.stop, rows.days_in)
    keep = exposure > 1e-12
    x_fit = _ensemble_x(split.x_fit, _rows_weekday(rows))[keep]
    x_val = _ensemble_x(split.x_val, _rows_weekday(val))
    # The piecewise-exponential log-likelihood, with the exposure computed once.
    val_exposure = hazard.profile.exposure(val.start, val.stop, val.days_in)
    ended = val.event
    intensity = hazard.profile.intensity(val.stop[ended],
                                         val.days_in[ended] + (val.stop - val.start)[ended])
    tried = []
    for settings in ENSEMBLE_GRID:
        model = _boosted(ENSEMBLE_MAX_ITER, **settings)
        scores = []
        with _one_thread():
            model.fit(x_fit, rows.event[keep] / exposure[keep],
                      sample_weight=(rows.weight * exposure)[keep])
            for rate in model.staged_predict(x_val):
                loglik = -rate * val_exposure
                loglik[ended] += np.log(np.maximum(rate[ended] * intensity, 1e-300))
                scores.append(float(np.sum(val.weight * loglik) / np.sum(val.weight)))
        best = int(np.argmax(scores))
        tried.append({**settings, "iterations": best + 1, "val_loglik": scores[best]})
    return max(tried, key=lambda t: t["val_loglik"]), tried


def _min_stays(params: Mapping[str, Any], landmarks: Landmarks, rows: IntervalRows) -> int:
    return max(10, int(params["min_stays_share"] * _n_stays(landmarks, rows)))


def _admission_x(design: Design, stays: pd.DataFrame) -> FloatArray:
    return design.covariate_matrix(stays)


def _select_groups(design: Design, stays: pd.DataFrame, cutoff_ns: int,
                   extract_ns: int | None) -> tuple[dict[str, Any], list[dict[str, Any]]]:
    """Size of the admission tree by integrated Brier score (days 1..14) on later stays of the
    held-out half, fitted on the earlier state of the other half. Stays admitted before the
    extract began are left out of the fitted half, as in fitting the groups
    (``fit_stay_groups``: scikit-survival's log-rank tree has no delayed entry), and of the
    scored half (they are not an ordinary sample of stays from admission)."""
    from sksurv.metrics import integrated_brier_score
    from sksurv.tree import SurvivalTree
    from sksurv.util import Surv

    admitted = utc_ns(stays["admitted_at"])
    first = int(admitted.min())
    val_days = min(90.0, 0.25 * (cutoff_ns - first) / NS_PER_DAY)
    v_ns = int(cutoff_ns - val_days * NS_PER_DAY)
    held = _stay_hash_half(stays["stay_id"].to_numpy())
    fit = _stays_at(stays, v_ns, extract_ns)
    fit_keep = ~held[fit.index] & (fit.entry == 0)
    later = _stays_at(stays, cutoff_ns, extract_ns)
    val_keep = held[later.index] & (admitted[later.index] > v_ns) & (later.entry == 0)
    x_all = _admission_x(design, stays)
    x_fit, y_fit = x_all[fit.index[fit_keep]], Surv.from_arrays(
        fit.ended[fit_keep], round_up_to_hours(fit.days[fit_keep]))
    x_val = x_all[later.index[val_keep]]
    y_val = Surv.from_arrays(later.ended[val_keep], round_up_to_hours(later.days[val_keep]))
    times = np.arange(1.0, 15.0)
    results: list[dict[str, Any]] = []
    n = int(fit_keep.sum())
    # Scored are the validation stays within the fitted stays' follow-up; they must run past
    # the last day scored (scikit-survival refuses times beyond the test data's follow-up).
    in_range = y_val["time"] <= y_fit["time"].max()
    # Nor may a day scored come before the shortest of them (scikit-survival refuses those
    # too): where no validation stay ended within a day, the score starts at day 2.
    if in_range.any():
        times = times[times >= y_val["time"][in_range].min()]
    usable = (int(in_range.sum()) >= 20 and times.size >= 2
              and y_val["time"][in_range].max() > times[-1]
              and y_fit["time"].max() > times[-1])
    for depth in GROUP_DEPTH_GRID:
        for share in (0.05,):
            leaf = max(30, int(share * n))
            score = float("nan")
            if usable:
                tree = SurvivalTree(max_depth=depth, min_samples_leaf=leaf, low_memory=False)
                tree.fit(x_fit, y_fit)
                funcs = tree.predict_survival_function(x_val)
                est = np.vstack([f(np.minimum(times, f.x[-1])) for f in funcs])
                score = float(integrated_brier_score(y_fit, y_val[in_range], est[in_range],
                                                     times))
            results.append({"max_depth": depth, "leaf_share": share, "val_ibs": score})
    scored = [r for r in results if not math.isnan(r["val_ibs"])]
    if not scored:
        return {"max_depth": 1, "leaf_share": 0.15}, results
    best = min(r["val_ibs"] for r in scored)
    chosen = min((r for r in scored if r["val_ibs"] <= best + 1e-4),
                 key=lambda r: (r["max_depth"], -r["leaf_share"]))
    return {"max_depth": chosen["max_depth"], "leaf_share": chosen["leaf_share"]}, results


def _fit_groups(design: Design, stays: pd.DataFrame, cutoff_ns: int, params: Mapping[str, Any],
                seed: int, extract_ns: int | None,
                clock: tuple[DischargeProfile, ZoneInfo] | None = None) -> StayGroups:
    """The admission groups; with ``clock`` (the hazard tree's profile and the site's zone)
    each group's Coxian is also fitted on the discharge clock, for stays still to come.
    Stays admitted before the extract began (``extract_ns``) enter at their days in the unit
    then (delayed entry), on either clock."""
    table = _stays_at(stays, cutoff_ns, extract_ns)
    x = _admission_x(design, stays)[table.index]
    kinds = stays["admission_type"].to_numpy()[table.index]
    groups = fit_stay_groups(x, table.days, table.ended, kinds, design.admission_features,
                             max_depth=int(params["max_depth"]),
                             min_samples_leaf=max(30, int(params["leaf_share"]
                                                          * table.index.size)),
                             rng=seed, entry=table.entry)
    if clock is None:
        return groups
    from app.forecast.newcomer_clock import stay_durations

    start = utc_ns(stays["admitted_at"])[table.index]
    end = start + np.round(table.days * NS_PER_DAY).astype(np.int64)
    entered = start + np.round(table.entry * NS_PER_DAY).astype(np.int64)
    return groups.with_clock_fits(x, stay_durations(clock[0], clock[1], start, end),
                                  table.ended, rng=seed,
                                  entry=stay_durations(clock[0], clock[1], start, entered))
