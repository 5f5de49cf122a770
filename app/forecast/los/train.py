"""Training a unit's length-of-stay model end to end, and its stored payload."""

from __future__ import annotations

import math
import time as timer
from collections.abc import Mapping
from dataclasses import replace
from datetime import UTC, datetime, time
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd

from app.forecast.los.calibration import STEPS, HazardScale, scale_on
from app.forecast.los.clock_choice import choose_newcomer_clock
from app.forecast.los.constants import (
    HORIZON_STEPS,
    LANDMARK_CLOCK,
    MAX_ROWS,
    MAX_TEST_LANDMARKS,
    MAX_VALIDATION_ROWS,
    NS_PER_DAY,
    PAYLOAD_FORMAT,
)
from app.forecast.los.design import make_design
from app.forecast.los.metrics import ScaleBasis, _test_metrics
from app.forecast.los.model import LosModel, _landmark_curves
from app.forecast.los.rows import Landmarks, build_landmarks, interval_rows, observation_names
from app.forecast.los.selection import (
    _fit_groups,
    _fit_hazard,
    _min_stays,
    _sample_landmarks,
    _select_ensemble,
    _select_groups,
    _select_hazard,
    _validation_split,
    recent_landmarks,
)
from app.forecast.training_data import (
    TooLittleHistory,
    require_history,
    screen_scores,
)
from app.state.frames import UnitState, utc_ns

CURVE_USES = {
    "hazard_tree": "per-stay P(in the unit) at each census instant over the next "
                   f"{HORIZON_STEPS} census intervals, and the group rule shown per stay",
    "kaplan_meier": "the group curves shown on the model page, and the no-covariate baseline "
                    "of the test metrics",
    "coxian": "stays still to come (emergency arrivals, booked electives) and planning (mean "
              "stay); for current stays the tail past the hazard tree's horizon, from the time "
              "already spent (median remaining stay beyond the horizon)",
}


def _iso(ns: int, tz: ZoneInfo) -> str:
    return pd.Timestamp(int(ns), tz="UTC").tz_convert(tz).isoformat()


def train_los(state: UnitState, *, test_days: float | None = None,
              landmark_clock: time = LANDMARK_CLOCK, compare: bool = True,
              evaluate: bool = True, seed: int = 0,
              extract_start: int | None = None) -> dict[str, Any]:
    """Train the length-of-stay model on everything known at ``state.as_of``.

    Holds out the last ``test_days`` (default: a quarter of the history, at most 90 days),
    chooses tree sizes by validation before it, scores the model trained as of the test start
    on the test period, then refits on the whole history with the chosen sizes.

    Parameters
    ----------
    state : UnitState
        What was known at the end of training (``with_history=True``).
    test_days : float, optional
        Length of the held-out test period.
    landmark_clock : datetime.time
        Local time of the daily landmark.
    compare : bool, default True
        Also fit the boosted ensemble on the same rows and report its test metrics.
    evaluate : bool, default True
        Hold out a test period and report its metrics. False (for backtests that retrain
        often) chooses the sizes by validation on the whole history and fits once.
    seed : int
        For the row sampling of very large histories and the Coxian random starts.
    extract_start : int, optional
        When the extract began (UTC ns); default its first recorded discharge
        (``app.state.extract.extract_start_ns``). Stays admitted before it are left-truncated: their
        landmarks start there, and the groups and the test's Kaplan-Meier baseline take them
        from their days in the unit then (delayed entry).

    Returns
    -------
    dict
        The JSON-able payload: ``trained_until``, ``window``, ``metrics`` and ``los``.

    Raises
    ------
    ValueError
        Too little history (no discharge before the test period).
    """
    clock_start = timer.perf_counter()
    rng = np.random.default_rng(seed)
    tz = state.tz
    names = observation_names(state)
    until_ns = int(utc_ns([state.as_of])[0])
    full = build_landmarks(state, landmark_clock=landmark_clock, names=names,
                           extract_start=extract_start)
    require_history(state.unit, int(np.unique(full.stay_index[full.ended]).size),
                    _iso(until_ns, tz))
    first_ns = int(utc_ns(state.stays["admitted_at"]).min())
    window_days = (until_ns - first_ns) / NS_PER_DAY
    if test_days is None:
        test_days = min(90.0, 0.25 * window_days)
    test_from = int(until_ns - float(test_days) * NS_PER_DAY) if evaluate else until_ns
    train_lm = full.censored_at(test_from) if evaluate else full
    if train_lm.size == 0 or not train_lm.ended.any():
        raise TooLittleHistory(f"unit {state.unit}: no stay ended before the test period "
                               f"({_iso(test_from, tz)}); need a longer history")
    # Scores are screened on the rows the tested model learns from, so the stored model has
    # the same features as the one whose test metrics are reported.
    names, left_out = screen_scores(train_lm.observed, train_lm.stay_index, names)

    # 1. Sizes by validation inside the training period (split by stay and by time).
    split = _validation_split(train_lm, test_from, state.census_time, tz, names, rng)
    params, grid = _select_hazard(split)
    validation_model = params.pop("validation_model")
    ensemble: dict[str, Any] | None = None
    ensemble_grid: list[dict[str, Any]] = []
    if compare and evaluate and validation_model is not None:
        ensemble, ensemble_grid = _select_ensemble(split, validation_model)
    del split, validation_model
    group_params, group_grid = _select_groups(
        make_design(train_lm, interval_rows(train_lm, state.census_time, tz, rng=rng,
                                            max_rows=MAX_VALIDATION_ROWS), names),
        state.stays, test_from, full.extract_ns)
    metrics: dict[str, Any] = {"left_out": left_out}

    # 2. The model as known at the test start, scored on the test period.
    if evaluate:
        train_rows = interval_rows(train_lm, state.census_time, tz, rng=rng, max_rows=MAX_ROWS)
        design_t = make_design(train_lm, train_rows, names)
        hazard_t = _fit_hazard(design_t, train_lm, train_rows, depth=params["max_depth"],
                               min_stays=_min_stays(params, train_lm, train_rows))
        groups_t = _fit_groups(design_t, state.stays, test_from, group_params, seed,
                               full.extract_ns)
        model_t = LosModel(design_t, hazard_t, groups_t, state.census_time, HORIZON_STEPS)
        # Scored as it would have been used: its own scale, fitted on the training period
        # (the yardstick's is fitted on the same landmarks).
        basis_t = _scale_basis(model_t, train_lm, test_from, tz, seed)
        model_t = replace(model_t, scale=_fitted_scale(basis_t).value)
        test_lm = _sample_landmarks(full.subset(full.at_ns >= test_from), MAX_TEST_LANDMARKS,
                                    rng)
        metrics.update({"test_from": _iso(test_from, tz), "test_to": _iso(until_ns, tz)})
        if test_lm.size:
            metrics.update(_test_metrics(model_t, train_lm, train_rows, test_lm, tz,
                                         ensemble, basis_t))
        if ensemble is not None:
            metrics["ensemble_iterations"] = ensemble["iterations"]
            metrics["ensemble_settings"] = {k: v for k, v in ensemble.items()
                                            if k not in ("iterations", "val_loglik")}
        del train_rows, model_t

    # 3. The stored model: everything known at until, the same sizes.
    rows = interval_rows(full, state.census_time, tz, rng=rng, max_rows=MAX_ROWS)
    design = make_design(full, rows, names)
    hazard = _fit_hazard(design, full, rows, depth=params["max_depth"],
                         min_stays=_min_stays(params, full, rows))
    newcomer_clock = choose_newcomer_clock(design, state.stays, until_ns, group_params, seed,
                                           hazard.profile, tz, state.census_time,
                                           full.extract_ns)
    groups = _fit_groups(design, state.stays, until_ns, group_params, seed, full.extract_ns,
                         clock=(hazard.profile, tz) if newcomer_clock["chosen"] else None)
    scale = _fitted_scale(_scale_basis(
        LosModel(design, hazard, groups, state.census_time, HORIZON_STEPS), full, until_ns, tz,
        seed))
    metrics["train_seconds"] = timer.perf_counter() - clock_start
    metrics["training_rows"] = int(len(rows.event))
    payload = {
        "trained_until": _iso(until_ns, tz),
        "window": {"from": _iso(first_ns, tz), "to": _iso(until_ns, tz),
                   "test_from": _iso(test_from, tz) if evaluate else None},
        "metrics": metrics,
        "los": {
            "format": PAYLOAD_FORMAT,
            "kind": "discharge-hazard-tree",
            "landmark_clock": landmark_clock.strftime("%H:%M"),
            "census_time": state.census_time.strftime("%H:%M"),
            "horizon_steps": HORIZON_STEPS,
            "design": design.to_dict(),
            "hazard": hazard.to_dict(),
            "leaf_rules": {str(int(n)): hazard.tree.rule(int(n))
                           for n in hazard.tree.leaves},
            "groups": groups.to_dict(),
            "hazard_scale": scale.to_dict(),
            "selection": {"hazard": {"chosen": params, "grid": grid},
                          "ensemble": ({"chosen": ensemble, "grid": ensemble_grid}
                                       if ensemble is not None else None),
                          "groups": {"chosen": group_params, "grid": group_grid},
                          "newcomer_clock": newcomer_clock},
            "uses": CURVE_USES,
        },
    }
    return _json_safe(payload)


def _scale_basis(model: LosModel, landmarks: Landmarks, until_ns: int, tz: ZoneInfo,
                 seed: int) -> ScaleBasis | None:
    """``model``'s forecasts (as fitted) from the landmarks its rate scale is fitted on, the
    last half year's before ``until_ns`` (app/forecast/los/calibration.py); None without any."""
    recent = recent_landmarks(landmarks, until_ns, seed)
    return None if recent.size == 0 else (_landmark_curves(model, recent, tz, STEPS), recent)


def _fitted_scale(basis: ScaleBasis | None) -> HazardScale:
    return HazardScale() if basis is None else scale_on(*basis)


def _json_safe(value: Any) -> Any:
    """NaN and infinities as None, so the payload is strict JSON."""
    if isinstance(value, dict):
        return {k: _json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_json_safe(v) for v in value]
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def train_unit(session: Any, unit: str, until: datetime | None, tz: ZoneInfo, *,
               test_days: float | None = None, compare: bool = True,
               evaluate: bool = True) -> tuple[str, dict[str, Any]]:
    """Train on what was known at ``until`` (default: now), store the model, return its id
    and the test metrics (for ``morrow train``; print them with :func:`format_metrics`)."""
    from app.forecast.models import save_model
    from app.state.load import load_state

    moment = datetime.now(UTC) if until is None else until
    state = load_state(session, unit, moment, tz, with_history=True)
    payload = train_los(state, test_days=test_days, compare=compare, evaluate=evaluate)
    model_id = save_model(session, unit, state.as_of.to_pydatetime(), payload)
    return model_id, payload["metrics"]


def format_metrics(metrics: Mapping[str, Any]) -> str:
    """Test metrics as a small table for the terminal."""
    lines = [f"test period {metrics.get('test_from')} .. {metrics.get('test_to')}: "
             f"{metrics.get('landmarks', 0)} landmarks of {metrics.get('stays', 0)} stays"]
    columns = [c for c in ("tree", "km", "ensemble") if c in metrics]
    header = {"tree": "tree", "km": "Kaplan-Meier", "ensemble": "boosted ensemble"}
    lines.append(f"{'':28}" + "".join(f"{header[c]:>18}" for c in columns))
    for key, label in (("concordance", "concordance (higher better)"),
                       ("ibs_1_14", "Brier days 1-14 (lower)"),
                       ("r2_completed", "variance explained")):
        cells = [metrics[c].get(key) for c in columns]
        lines.append(f"{label:28}" + "".join(
            f"{v:>18.4f}" if isinstance(v, int | float) else f"{'n/a':>18}" for v in cells))
    if "train_seconds" in metrics:
        lines.append(f"trained in {metrics['train_seconds']:.1f} s "
                     f"on {metrics['training_rows']} rows")
    for left in metrics.get("left_out", []):
        lines.append(f"left out {left['name']}: {left['why']}")
    return "\n".join(lines)
