"""The scale on the hazard tree's rates (app/forecast/los/calibration.py)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from app.forecast.los.calibration import (
    MIN_LANDMARKS,
    HazardScale,
    fit_hazard_scale,
    outcome_steps,
)


def test_outcome_steps_by_hand() -> None:
    # Landmark at 0, census instants at 10, 20, 30.
    bounds = np.array([[0, 10, 20, 30]] * 5, dtype=np.int64)
    end = np.array([5, 20, 25, 25, 40], dtype=np.int64)
    ended = np.array([True, True, True, False, True])
    left, seen = outcome_steps(end, ended, bounds)
    # Left before the first census; at the second census instant itself (a stay that ends at
    # the census is not counted in it); between the second and third; still in at 25 when
    # the record stops (seen in at the second census only); left after the last census.
    np.testing.assert_array_equal(left, [1, 2, 3, 0, 0])
    np.testing.assert_array_equal(seen, [0, 1, 2, 2, 3])


def test_the_scale_is_scipys_interval_censored_exponential_fit() -> None:
    # Outside check: stays exponential at 0.3 a day, seen only at census instants 0.5, 1.5,
    # ..., 6.5 days after the landmark (interval-censored), some records stopping early
    # (right-censored at the last census seen in); a model that says 0.4 a day is put right
    # by c = rate / 0.4, the rate being the maximum-likelihood one of the grouped data, which
    # scipy.stats.expon.fit on CensoredData gives independently (scale = 1 / rate).
    rng = np.random.default_rng(11)
    n = 4000
    census = np.arange(7) + 0.5
    stay = rng.exponential(1 / 0.3, n)
    stop = rng.uniform(0.0, 12.0, n)               # where the record stops (cut-off)
    ended = stay <= stop
    end = np.minimum(stay, stop)
    bounds = np.concatenate([np.zeros((n, 1)), np.tile(census, (n, 1))], axis=1)
    to_ns = 10**9
    left, seen = outcome_steps(np.round(end * to_ns).astype(np.int64), ended,
                               np.round(bounds * to_ns).astype(np.int64))
    survival = np.exp(-0.4 * np.tile(census, (n, 1)))
    scale = fit_hazard_scale(survival, left, seen)

    lower = np.where(left > 0, bounds[np.arange(n), np.maximum(left - 1, 0)], np.nan)
    upper = np.where(left > 0, bounds[np.arange(n), np.maximum(left, 0)], np.nan)
    last_in = bounds[np.arange(n), seen]
    interval = np.column_stack([lower[left > 0], upper[left > 0]])
    data = stats.CensoredData(interval=interval, right=last_in[left == 0])
    _, fitted_scale = stats.expon.fit(data, floc=0)
    assert scale.value * 0.4 == pytest.approx(1 / fitted_scale, rel=1e-4)
    assert scale.value * 0.4 == pytest.approx(0.3, rel=0.06)     # and near the truth
    assert scale.landmarks == n and scale.gain > 0


def test_a_right_model_keeps_its_rates_and_too_few_landmarks_are_not_fitted() -> None:
    rng = np.random.default_rng(3)
    n = 3000
    census = np.arange(1, 8, dtype=float)
    stay = rng.exponential(4.0, n)
    bounds = np.concatenate([np.zeros((n, 1)), np.tile(census, (n, 1))], axis=1)
    left, seen = outcome_steps(np.round(stay * 1e9).astype(np.int64), np.ones(n, bool),
                               np.round(bounds * 1e9).astype(np.int64))
    survival = np.exp(-np.tile(census, (n, 1)) / 4.0)
    # The maximum-likelihood c of a right model is 1 within its sampling error (about
    # 1 / sqrt(number of stays seen to leave within the week, 2,500)).
    assert fit_hazard_scale(survival, left, seen).value == pytest.approx(1.0, abs=0.06)
    few = fit_hazard_scale(survival[: MIN_LANDMARKS - 1], left[: MIN_LANDMARKS - 1],
                           seen[: MIN_LANDMARKS - 1])
    assert few.value == 1.0 and few.gain == 0.0


def test_a_payload_without_a_scale_reads_as_the_tree_as_fitted() -> None:
    assert HazardScale.from_dict(None) == HazardScale(1.0, 0, 0.0)
    stored = HazardScale(0.95, 4000, 0.001)
    assert HazardScale.from_dict(stored.to_dict()) == stored
