"""Test-period scores: concordance, integrated Brier score, variance explained."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import replace
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
import numpy.typing as npt

from app.forecast.los.calibration import scale_on
from app.forecast.los.constants import (
    HORIZON_STEPS,
    MAX_CENSORING_SAMPLE,
    MAX_ENSEMBLE_ROWS,
    NS_PER_DAY,
    FloatArray,
    IntArray,
)
from app.forecast.los.design import _row_matrix
from app.forecast.los.model import LosModel, _Curves, _landmark_curves
from app.forecast.los.rows import IntervalRows, Landmarks, _interval_weekday, _rows_weekday
from app.forecast.los.selection import _boosted, _ensemble_x, _one_thread, _stays_at
from app.stats.kaplan_meier import KaplanMeier
from app.stats.stay_groups import entry_on_hours, round_up_to_hours

EVAL_DAYS = np.arange(1.0, 15.0)  # integrated Brier score over days 1..14


RMST_GRID = np.arange(0.0, 14.0 + 1e-9, 0.25)


def survival_metrics(event: npt.ArrayLike, remaining: npt.ArrayLike, surv_days: FloatArray,
                     rmst: FloatArray, mean_remaining: FloatArray) -> dict[str, float]:
    """Concordance (Uno's and Harrell's), integrated Brier score (days 1..14) and variance
    explained, on one test sample.

    Parameters
    ----------
    event, remaining : array_like, shape (n,)
        Test outcome: left the unit (True) or censored, after ``remaining`` days.
    surv_days : ndarray, shape (n, 14)
        Predicted P(still in) 1, 2, ..., 14 days after the landmark.
    rmst : ndarray, shape (n,)
        Predicted expected days in the unit over the next 14 (restricted mean): the risk score
        for concordance (shorter expected stay = higher risk of leaving).
    mean_remaining : ndarray, shape (n,)
        Predicted mean remaining stay, for the variance explained on completed stays
        (1 - residual sum of squares / total sum of squares, as a regression tree's).

    The test sample is censored by the end of the test period, far more heavily than the
    training stays, so the inverse-probability-of-censoring weights of the Brier score and of
    Uno's C come from the test sample's own censoring (Graf et al. 1999, Stat Med
    18:2529-2545; Uno et al. 2011, Stat Med 30:1105-1117; cited from memory). ``concordance``
    is Uno's C truncated at 14 days (METHODS.md: Uno's C for censored data);
    ``concordance_harrell`` is Harrell's. Uses ``sksurv.metrics``.
    """
    from sksurv.metrics import (
        concordance_index_censored,
        concordance_index_ipcw,
        integrated_brier_score,
    )
    from sksurv.util import Surv

    d = np.asarray(event, dtype=bool)
    t = np.asarray(remaining, dtype=float)
    estimate = -np.asarray(rmst, dtype=float)
    nan = float("nan")
    censoring = _censoring_sample(d, t)
    # Too short a test period has no comparable pair, or no follow-up to day 14: those
    # figures are then NaN (stored as null) rather than an error.
    try:
        harrell = float(concordance_index_censored(d, t, estimate)[0])
    except (ValueError, ZeroDivisionError):
        harrell = nan
    uno = nan
    if d.any():
        try:
            uno = float(concordance_index_ipcw(censoring, Surv.from_arrays(d, t), estimate,
                                               tau=float(EVAL_DAYS[-1]))[0])
        except (ValueError, ZeroDivisionError):
            uno = nan
    # The censoring curve must stay above zero over the evaluation days, and the sample must
    # reach past both ends of them.
    ibs = nan
    if d.any() and t.max() > EVAL_DAYS[-1] and t.min() < EVAL_DAYS[0]:
        try:
            ibs = float(integrated_brier_score(censoring, Surv.from_arrays(d, t), surv_days,
                                               EVAL_DAYS))
        except ValueError:
            ibs = nan
    y = t[d]
    pred = np.asarray(mean_remaining)[d]
    ss_tot = float(np.sum((y - y.mean()) ** 2)) if y.size else 0.0
    r2 = 1.0 - float(np.sum((y - pred) ** 2)) / ss_tot if ss_tot > 0 else nan
    return {"concordance": uno, "concordance_harrell": harrell, "ibs_1_14": ibs,
            "r2_completed": r2}


def _censoring_sample(event: npt.NDArray[np.bool_], remaining: FloatArray) -> Any:
    """The outcomes the censoring curve is estimated from: the test sample itself, or a fixed
    random part of it when it is large (the same curve within sampling error, much faster);
    the longest outcome is always kept so the curve covers every test time."""
    from sksurv.util import Surv

    d, t = event, remaining
    if t.size > MAX_CENSORING_SAMPLE:
        pick = np.random.default_rng(2).choice(t.size, MAX_CENSORING_SAMPLE, replace=False)
        pick = np.union1d(pick, [int(np.argmax(t))])
        d, t = d[pick], t[pick]
    return Surv.from_arrays(d, t)


def _curve_summaries(curves: _Curves, at_ns: IntArray) -> tuple[FloatArray, FloatArray,
                                                                FloatArray]:
    """P(in) after 1..14 days, the restricted mean over 14 days and the mean remaining stay,
    from one evaluation of the curves on a quarter-day grid."""
    step = 0.5
    span = (curves.bounds_ns[:, -1] - at_ns) / NS_PER_DAY
    grid = np.arange(0.0, float(span.max()) + step, step)
    offsets = np.minimum(grid[None, :], span[:, None])
    surv = curves.survival(at_ns[:, None] + np.round(offsets * NS_PER_DAY).astype(np.int64))
    day_columns = np.round(EVAL_DAYS / step).astype(np.int64)
    surv_days = surv[:, day_columns]
    upto = int(round(14.0 / step)) + 1
    rmst = np.trapezoid(surv[:, :upto], grid[:upto], axis=1)
    body = np.trapezoid(surv, offsets, axis=1)
    s_end, _ = curves._end
    return surv_days, rmst, body + s_end * curves.tail_mean()


def _km_summaries(km: Any, days_in: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray]:
    """The no-covariate baseline: Kaplan-Meier of whole stays given the days already spent,
    S(d + t) / S(d)."""
    d = np.asarray(days_in, dtype=float)
    base = np.asarray(km.sf(d), dtype=float)
    safe = np.where(base > 0, base, 1.0)

    def conditional(t: FloatArray) -> FloatArray:
        values = np.asarray(km.sf(d[:, None] + t[None, :]), dtype=float) / safe[:, None]
        return np.where(base[:, None] > 0, values, 0.0)

    surv_days = conditional(EVAL_DAYS)
    rmst = np.trapezoid(conditional(RMST_GRID), RMST_GRID, axis=1)
    # Mean remaining stay restricted to the last Kaplan-Meier time tau: the integral of the
    # step function from d to tau over S(d), exact from its running integral.
    times = np.asarray(km.times, dtype=float)
    steps = np.r_[1.0, np.asarray(km.sf(times), dtype=float)]
    knots = np.r_[0.0, times]
    running = np.r_[0.0, np.cumsum(steps[:-1] * np.diff(knots))]
    tau = float(knots[-1])
    integral = running[-1] - np.interp(np.minimum(d, tau), knots, running)
    mean_rem = np.where((base > 0) & (d < tau), integral / safe, 0.0)
    return surv_days, rmst, mean_rem


def baseline_km(train_lm: Landmarks) -> KaplanMeier:
    """The no-covariate baseline's curve: Kaplan-Meier of whole stays as known at the training
    cut-off, conditioned like the groups: a stay admitted before the extract began enters at
    its days in the unit then (delayed entry), rounded down to the hour grid."""
    from app.stats.kaplan_meier import kaplan_meier

    table = _stays_at(train_lm.stays, int(train_lm.end_ns.max()), train_lm.extract_ns)
    shown = round_up_to_hours(table.days)
    return kaplan_meier(shown, table.ended, entry=entry_on_hours(table.entry, shown))


def _thin_rows(rows: IntervalRows, limit: int, rng: np.random.Generator) -> IntervalRows:
    """At most about ``limit`` rows, whole landmarks sampled, weights scaled up to match."""
    if rows.event.size <= limit:
        return rows
    keep_prob = limit / rows.event.size
    landmarks = np.unique(rows.landmark)
    chosen = landmarks[rng.random(landmarks.size) < keep_prob]
    thinned = rows.subset(np.isin(rows.landmark, chosen))
    return replace(thinned, weight=thinned.weight / keep_prob)


# A model's forecasts (as fitted) from the landmarks its rate scale is fitted on, and those
# landmarks (app/forecast/los/calibration.py).
ScaleBasis = tuple[_Curves, Landmarks]


def _test_metrics(model: LosModel, train_lm: Landmarks, train_rows: IntervalRows,
                  test_lm: Landmarks, tz: ZoneInfo, ensemble: Mapping[str, Any] | None,
                  scale_basis: ScaleBasis | None) -> dict[str, Any]:
    """The test period's scores of ``model`` (trained on ``train_lm``), of the Kaplan-Meier
    baseline and of the yardstick (``ensemble``'s settings, refitted on the same rows). Like
    the tree, the yardstick's rates carry a scale fitted on its own forecasts from the
    landmarks the tree's scale was fitted on (``scale_basis``; None: no scale), so the two
    are compared on equal terms."""
    steps = HORIZON_STEPS + 1
    curves = _landmark_curves(model, test_lm, tz, steps)
    event, remaining = test_lm.ended, test_lm.remaining_days
    out: dict[str, Any] = {"landmarks": int(test_lm.size),
                           "stays": int(np.unique(test_lm.stay_index).size)}
    tree = survival_metrics(event, remaining, *_curve_summaries(curves, test_lm.at_ns))
    km = baseline_km(train_lm)
    baseline = survival_metrics(event, remaining, *_km_summaries(km, test_lm.days_in))
    out["tree"], out["km"] = tree, baseline
    if ensemble is not None:
        rows = _thin_rows(train_rows, MAX_ENSEMBLE_ROWS, np.random.default_rng(1))
        x = _ensemble_x(_row_matrix(model.design, train_lm, rows), _rows_weekday(rows))
        exposure = model.hazard.profile.exposure(rows.start, rows.stop, rows.days_in)
        keep = exposure > 1e-12
        boosted_model = _boosted(ensemble["iterations"], **{
            k: v for k, v in ensemble.items() if k not in ("iterations", "val_loglik")})
        x_test = _ensemble_x(curves.x, _interval_weekday(curves.bounds_local).ravel())
        scale = 1.0
        with _one_thread():
            boosted_model.fit(x[keep], rows.event[keep] / exposure[keep],
                              sample_weight=(rows.weight * exposure)[keep])
            if scale_basis is not None:
                own, recent = scale_basis
                own_x = _ensemble_x(own.x, _interval_weekday(own.bounds_local).ravel())
                scale = scale_on(own.with_rates(boosted_model.predict(own_x)), recent).value
            boosted = curves.with_rates(boosted_model.predict(x_test) * scale)
        out["ensemble_scale"] = scale
        out["ensemble"] = survival_metrics(event, remaining,
                                           *_curve_summaries(boosted, test_lm.at_ns))
        # What the readable tree gives up, relative to the ensemble (positive: tree worse).
        out["ensemble_gap"] = {
            "ibs_1_14": tree["ibs_1_14"] / out["ensemble"]["ibs_1_14"] - 1.0,
            "concordance": 1.0 - tree["concordance"] / out["ensemble"]["concordance"],
        }
    return out
