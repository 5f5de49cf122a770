"""Scores for count forecasts: hand-checked values, an independent CRPS identity, PIT uniformity."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal, stats
from sklearn.metrics import brier_score_loss

from app.stats.poisson_binomial import negative_binomial_pmf, poisson_pmf
from app.stats.scoring import (
    batch_means_se,
    brier_score,
    central_interval,
    crps_pmf,
    expected_pit_coverage,
    interval_coverage,
    log_score,
    pit_band_shares,
    pit_coverage,
    randomised_pit,
)


def _crps_by_expectations(pmf: np.ndarray, y: int) -> float:
    """CRPS = E|X - y| - E|X - X'| / 2 (Gneiting & Raftery 2007), both by numpy sums."""
    k = np.arange(pmf.size)
    first = float(pmf @ np.abs(k - y))
    second = float(pmf @ np.abs(k[:, None] - k[None, :]) @ pmf)
    return first - 0.5 * second


def _padded(pmfs: list[np.ndarray]) -> np.ndarray:
    width = max(p.size for p in pmfs)
    return np.array([np.pad(p, (0, width - p.size)) for p in pmfs])


def test_crps_of_a_point_mass() -> None:
    point = np.zeros(6)
    point[3] = 1.0
    assert crps_pmf(point, 3) == 0.0
    # A point mass at 3 scored against y: every k between them adds exactly 1.
    assert crps_pmf(point, 0) == 3.0
    assert crps_pmf(point, 5) == 2.0


def test_crps_small_example_by_hand() -> None:
    # pmf (0.2, 0.5, 0.3), y = 1: F = (0.2, 0.7, 1.0), 1{1 <= k} = (0, 1, 1),
    # terms (0.2 - 0)^2 + (0.7 - 1)^2 + (1 - 1)^2 = 0.04 + 0.09 + 0 = 0.13.
    assert crps_pmf([0.2, 0.5, 0.3], 1) == pytest.approx(0.13, abs=1e-15)
    # y beyond the support: pmf (0.5, 0.5), y = 4: F = (0.5, 1, 1, 1, 1), 1{4 <= k} = 1 only at
    # k = 4: 0.25 + 1 + 1 + 1 + 0 = 3.25 (and E|X - 4| - E|X - X'| / 2 = 3.5 - 0.25).
    assert crps_pmf([0.5, 0.5], 4) == pytest.approx(3.25, abs=1e-15)


def test_crps_equals_the_expectation_identity_for_poisson() -> None:
    pmf = poisson_pmf(6.3)
    for y in range(0, 30):
        assert crps_pmf(pmf, y) == pytest.approx(_crps_by_expectations(pmf, y), abs=1e-10)


def test_scores_of_many_forecasts_equal_the_single_ones() -> None:
    rng = np.random.default_rng(0)
    pmfs = [poisson_pmf(m) for m in rng.uniform(0.5, 20.0, 12)]
    ys = rng.integers(0, 30, 12)
    table = _padded(pmfs)
    np.testing.assert_allclose(
        crps_pmf(table, ys), [crps_pmf(p, y) for p, y in zip(pmfs, ys, strict=True)], rtol=1e-13
    )
    np.testing.assert_allclose(
        log_score(table, ys), [log_score(p, y) for p, y in zip(pmfs, ys, strict=True)], rtol=1e-13
    )


def test_log_score() -> None:
    assert log_score([0.2, 0.5, 0.3], 1) == pytest.approx(-math.log(0.5), rel=1e-15)
    assert log_score([0.2, 0.5, 0.3], 7) == pytest.approx(-math.log(1e-12), rel=1e-15)
    assert log_score([0.2, 0.5, 0.3], 7, floor=0.0) == math.inf
    ref = stats.poisson(4.2)  # scipy.stats reference
    assert log_score(poisson_pmf(4.2), 9) == pytest.approx(-ref.logpmf(9), rel=1e-12)


def test_randomised_pit_by_hand() -> None:
    # F(0) = 0.2, F(1) = 0.7: u = 0.2 + 0.5 * (0.7 - 0.2) = 0.45.
    assert randomised_pit([0.2, 0.5, 0.3], 1, 0.5) == pytest.approx(0.45, abs=1e-15)
    assert randomised_pit([0.2, 0.5, 0.3], 0, 1.0) == pytest.approx(0.2, abs=1e-15)
    assert randomised_pit([0.2, 0.5, 0.3], 5, 0.3) == pytest.approx(1.0, abs=1e-15)


def _forecasts_and_outcomes(n: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """n census days, each with one of 40 forecasts; the outcome drawn from that forecast.

    Returns the forecast table (one row per day), the outcomes and each day's mean.
    """
    rng = np.random.default_rng(seed)
    means = 5.0 + 10.0 * rng.random(40)
    kinds = [
        poisson_pmf(m) if i % 2 else negative_binomial_pmf(m, 4.0) for i, m in enumerate(means)
    ]
    which = rng.integers(0, 40, n)
    table = _padded(kinds)[which]
    # Inverse-cdf draws: y = number of cumulative probabilities below a uniform.
    ys = (np.cumsum(table, axis=1) < rng.random(n)[:, None]).sum(axis=1)
    return table, ys, means[which]


def test_pit_of_a_calibrated_forecast_is_uniform() -> None:
    n = 4000
    table, ys, _ = _forecasts_and_outcomes(n, seed=1)
    u = randomised_pit(table, ys, rng=2)
    # Czado, Gneiting & Held (2009): uniform for a calibrated forecast. scipy.stats.kstest.
    assert stats.kstest(u, "uniform").pvalue > 0.01
    # Share in [0.1, 0.9] near 0.8 and in [0.025, 0.975] near 0.95 (METHODS.md section 5), within
    # 4 binomial standard errors (Monte Carlo tolerance, common practice, no source).
    assert abs(pit_coverage(u, 0.1, 0.9) - 0.8) < 4 * math.sqrt(0.8 * 0.2 / n)
    assert abs(pit_coverage(u, 0.025, 0.975) - 0.95) < 4 * math.sqrt(0.95 * 0.05 / n)


def test_pit_detects_an_overconfident_forecast() -> None:
    # Outcomes from the forecasts above, scored against Poisson forecasts with the same means:
    # the negative binomial days are overdispersed, so the PIT piles up at the ends.
    n = 4000
    _, ys, means = _forecasts_and_outcomes(n, seed=1)
    unique, which = np.unique(means, return_inverse=True)
    narrow = _padded([poisson_pmf(m) for m in unique])[which]
    u = randomised_pit(narrow, ys, rng=2)
    assert stats.kstest(u, "uniform").pvalue < 0.01
    assert pit_coverage(u, 0.1, 0.9) < 0.8 - 4 * math.sqrt(0.8 * 0.2 / n)


def test_expected_pit_coverage_is_the_mean_over_randomisations() -> None:
    # The randomised PIT's definition (Czado, Gneiting & Held 2009) drawn 400 times per
    # forecast: the mean indicator is the expected share, to Monte Carlo error.
    n = 300
    table, ys, means = _forecasts_and_outcomes(n, seed=3)
    unique, which = np.unique(means, return_inverse=True)
    narrow = _padded([poisson_pmf(m) for m in unique])[which]
    rng = np.random.default_rng(4)
    for pmfs in (table, narrow):
        for lower, upper in ((0.1, 0.9), (0.025, 0.975)):
            draws = np.mean([pit_coverage(randomised_pit(pmfs, ys, rng=rng), lower, upper)
                             for _ in range(400)])
            # 400 x 300 indicators: standard error below 0.5 / sqrt(120000) = 0.0015.
            assert expected_pit_coverage(pmfs, ys, lower, upper) == pytest.approx(draws,
                                                                                  abs=0.006)
    # A forecast certain of the outcome: its PIT is uniform on [0, 1], 0.8 of it in the band;
    # one certain of a larger value: its PIT is 0, below the band.
    assert expected_pit_coverage(np.array([[1.0, 0.0]]), np.array([0])) == pytest.approx(0.8)
    assert expected_pit_coverage(np.array([[0.0, 1.0]]), np.array([0])) == 0.0


def test_literal_interval_covers_more_than_its_level() -> None:
    # A perfect forecast: coverage of [q0.1, q0.9] is P(lo <= X <= hi), above 0.8 because of the
    # discreteness (METHODS.md section 5). Reference probability from scipy.stats.poisson.
    mean, n = 2.0, 5000
    pmf = poisson_pmf(mean)
    low, high = central_interval(pmf, 0.8)
    ref = stats.poisson(mean)
    assert (low, high) == (int(ref.ppf(0.1)), int(ref.ppf(0.9)))
    exact = ref.cdf(high) - ref.cdf(low - 1)
    assert exact > 0.85
    ys = np.random.default_rng(3).poisson(mean, n)
    coverage = interval_coverage(np.tile(pmf, (n, 1)), ys, 0.8)
    assert abs(coverage - exact) < 4 * math.sqrt(exact * (1 - exact) / n)


def test_interval_coverage_agrees_with_interval_by_interval_check() -> None:
    rng = np.random.default_rng(5)
    pmfs = [negative_binomial_pmf(m, 3.0) for m in rng.uniform(1.0, 25.0, 30)]
    ys = rng.integers(0, 40, 30)
    for level in (0.5, 0.8, 0.95):
        inside = [
            central_interval(p, level)[0] <= y <= central_interval(p, level)[1]
            for p, y in zip(pmfs, ys, strict=True)
        ]
        assert interval_coverage(_padded(pmfs), ys, level) == pytest.approx(np.mean(inside))


def test_brier_score_matches_scikit_learn() -> None:
    rng = np.random.default_rng(4)
    p = rng.random(200)
    outcome = rng.random(200) < p
    assert brier_score(p, outcome) == pytest.approx(brier_score_loss(outcome, p), rel=1e-12)


def test_bad_input_is_rejected() -> None:
    with pytest.raises(ValueError, match="y: counts"):
        crps_pmf([0.5, 0.5], -1)
    with pytest.raises(ValueError, match="y: counts"):
        crps_pmf([0.5, 0.5], 1.5)
    with pytest.raises(ValueError, match="pmf: each forecast must sum to 1"):
        crps_pmf([0.5, 0.2], 1)
    with pytest.raises(ValueError, match="v: needs one draw"):
        randomised_pit(np.tile([0.5, 0.5], (3, 1)), [0, 1, 1], [0.5])
    with pytest.raises(ValueError, match="level"):
        central_interval([0.5, 0.5], 1.0)


def _exact_variance_of_mean(autocovariance: np.ndarray, n: int) -> float:
    """Var of the mean of n values of a stationary series: (1/n^2) sum over |k| < n of
    (n - |k|) gamma(k) (Brockwell & Davis 1991, Time Series: Theory and Methods, section 7.1;
    cited from memory)."""
    k = np.arange(1, n)
    return float((n * autocovariance[0] + 2 * np.sum((n - k) * autocovariance[k])) / n**2)


@pytest.mark.parametrize("series", ["overlapping_weeks", "ar1", "independent"])
def test_batch_means_standard_error_against_the_exact_variance_of_a_mean(series: str) -> None:
    # 126 mornings in batches of 14 (the backtest's), 4,000 simulated series. Each morning's
    # value is the mean of seven overlapping nights (a moving average of 7 independent
    # normals: gamma(k) = (7 - |k|) / 49 for |k| < 7), an AR(1) with phi 0.5 (gamma(k) =
    # 0.5^|k| / 0.75), or independent. Batch means estimate the variance of the mean with a
    # downward bias that shrinks with the batch (Schmeiser 1982): measured 0.84, 0.90 and
    # 1.01 of the exact value; the binomial-style formula for independent values gives 0.14
    # and 0.33 on the first two, so ignoring the dependence would be far worse.
    n, reps = 126, 4000
    rng = np.random.default_rng(11)
    noise = rng.normal(size=(reps, n + 300))
    lags = np.arange(n, dtype=float)
    if series == "overlapping_weeks":
        values = signal.lfilter(np.ones(7) / 7, [1.0], noise, axis=1)[:, 300:]
        gamma = np.clip(7 - lags, 0, None) / 49
    elif series == "ar1":
        values = signal.lfilter([1.0], [1.0, -0.5], noise, axis=1)[:, 300:]
        gamma = 0.5**lags / 0.75
    else:
        values = noise[:, 300:]
        gamma = (lags == 0).astype(float)
    exact = _exact_variance_of_mean(gamma, n)
    estimated = np.array([batch_means_se(v, 14) for v in values], dtype=float) ** 2
    naive = values.var(axis=1, ddof=1) / n
    assert 0.78 * exact < estimated.mean() < 1.08 * exact
    if series != "independent":
        assert naive.mean() < 0.4 * exact
    # The simulation agrees with the formula (4,000 means: relative error about 2%).
    assert values.mean(axis=1).var() == pytest.approx(exact, rel=0.08)


def test_batch_means_standard_error_needs_enough_batches() -> None:
    assert batch_means_se(np.arange(4 * 14 - 1, dtype=float), 14) is None
    assert batch_means_se(np.ones(4 * 14), 14) == 0.0
    with pytest.raises(ValueError, match="batch"):
        batch_means_se(np.ones(10), 0)


def test_pit_band_shares_average_to_the_expected_coverage() -> None:
    table, ys, _ = _forecasts_and_outcomes(200, seed=8)
    shares = pit_band_shares(table, ys, 0.1, 0.9)
    assert shares.shape == (200,) and np.all((shares >= 0) & (shares <= 1))
    assert float(shares.mean()) == expected_pit_coverage(table, ys, 0.1, 0.9)
