"""Occupancy pmfs against METHODS.md's worked example and scipy.stats."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from app.stats.poisson_binomial import (
    convolve_pmfs,
    negative_binomial_pmf,
    pmf_mean,
    pmf_quantile,
    pmf_sf_over,
    poisson_binomial_pmf,
    poisson_pmf,
)


def test_worked_example_from_methods() -> None:
    # METHODS.md section 3, worked example (computed by hand there).
    pmf = poisson_binomial_pmf([0.5, 0.3, 0.7, 0.3, 0.9])
    expected = [0.00735, 0.09695, 0.3167, 0.3747, 0.17595, 0.02835]
    np.testing.assert_allclose(pmf, expected, rtol=0, atol=1e-12)


@pytest.mark.parametrize("n", [1, 2, 7, 40, 300])
def test_matches_scipy_poisson_binom(n: int) -> None:
    rng = np.random.default_rng(n)
    p = rng.random(n)
    p[: n // 5] = rng.choice([0.0, 1.0], size=n // 5)  # certain stays too
    # scipy.stats.poisson_binom (scipy >= 1.14) as the reference.
    expected = stats.poisson_binom(p).pmf(np.arange(n + 1))
    np.testing.assert_allclose(poisson_binomial_pmf(p), expected, rtol=0, atol=1e-12)


def test_two_dimensional_input_gives_one_pmf_per_day() -> None:
    rng = np.random.default_rng(1)
    p = rng.random((25, 8))  # 25 stays x 8 census days
    by_day = poisson_binomial_pmf(p)
    assert by_day.shape == (8, 26)
    for day in range(8):
        expected = stats.poisson_binom(p[:, day]).pmf(np.arange(26))  # scipy reference
        np.testing.assert_allclose(by_day[day], expected, rtol=0, atol=1e-12)


def test_sums_to_one_and_stays_non_negative() -> None:
    rng = np.random.default_rng(2)
    pmf = poisson_binomial_pmf(rng.random(1000))
    assert abs(pmf.sum() - 1.0) < 1e-9
    assert np.all(pmf >= 0)
    many = poisson_binomial_pmf(rng.random((60, 1000)))
    np.testing.assert_allclose(many.sum(axis=1), 1.0, rtol=0, atol=1e-9)
    assert np.all(many >= 0)
    assert poisson_binomial_pmf([]).tolist() == [1.0]


def test_quantile_agrees_with_cumulative_sum() -> None:
    rng = np.random.default_rng(3)
    for _ in range(50):
        pmf = rng.dirichlet(np.ones(rng.integers(1, 30)))
        cumulative = np.cumsum(pmf)
        for q in rng.random(5):
            expected = next(k for k, c in enumerate(cumulative) if c >= q)
            assert pmf_quantile(pmf, q) == expected
    # Round-off guard: in floating point cumsum([0.3, 0.6, 0.1]) is [0.3, 0.8999999999999999,
    # 0.9999999999999999], yet F(1) = 0.9 exactly, so the 0.9-quantile is 1, not 2.
    assert np.cumsum([0.3, 0.6, 0.1])[1] < 0.9
    assert pmf_quantile([0.3, 0.6, 0.1], 0.9) == 1
    assert pmf_quantile([0.3, 0.6, 0.1], 1.0) == 2


def test_quantile_matches_scipy_poisson_ppf() -> None:
    mean = 7.3
    pmf = poisson_pmf(mean)
    levels = np.array([0.01, 0.1, 0.25, 0.5, 0.8, 0.9, 0.975, 0.999])
    expected = stats.poisson(mean).ppf(levels)  # scipy: smallest k with cdf(k) >= q
    np.testing.assert_array_equal(pmf_quantile(pmf, levels), expected)


def test_poisson_pmf_truncation_and_values() -> None:
    for mean in (0.3, 4.0, 55.5):
        pmf = poisson_pmf(mean)
        kmax = pmf.size - 1
        ref = stats.poisson(mean)  # scipy reference
        assert abs(pmf.sum() - 1.0) < 1e-12
        assert ref.sf(kmax) < 1e-12 <= ref.sf(kmax - 1)  # the smallest such kmax
        np.testing.assert_allclose(pmf[:-1], ref.pmf(np.arange(kmax)), rtol=1e-12)
        assert pmf[-1] == pytest.approx(ref.sf(kmax - 1), rel=1e-9)  # P(X >= kmax)
        assert pmf_mean(pmf) == pytest.approx(mean, rel=1e-10)
    fixed = poisson_pmf(5.0, kmax=3)
    assert fixed[-1] == pytest.approx(stats.poisson(5.0).sf(2), rel=1e-12)
    assert poisson_pmf(0.0).tolist() == [1.0]


def test_negative_binomial_pmf_matches_scipy() -> None:
    mean, size = 6.0, 2.5
    pmf = negative_binomial_pmf(mean, size)
    ref = stats.nbinom(size, size / (size + mean))  # scipy reference, mean = 6
    assert ref.mean() == pytest.approx(mean)
    assert abs(pmf.sum() - 1.0) < 1e-12
    assert ref.sf(pmf.size - 1) < 1e-12
    np.testing.assert_allclose(pmf[:-1], ref.pmf(np.arange(pmf.size - 1)), rtol=1e-12)
    variance = np.arange(pmf.size) ** 2 @ pmf - pmf_mean(pmf) ** 2
    assert variance == pytest.approx(mean + mean**2 / size, rel=1e-8)


def test_convolution_of_poissons_is_poisson_of_the_summed_mean() -> None:
    means = (2.5, 0.7, 11.2)
    total = convolve_pmfs(*(poisson_pmf(m) for m in means))
    expected = stats.poisson(sum(means)).pmf(np.arange(total.size))  # scipy reference
    np.testing.assert_allclose(total, expected, rtol=0, atol=1e-12)
    assert abs(total.sum() - 1.0) < 1e-12


def test_convolution_of_bernoullis_is_poisson_binomial() -> None:
    p = [0.2, 0.9, 0.45, 0.6]
    pieces = [np.array([1 - q, q]) for q in p]
    np.testing.assert_allclose(
        convolve_pmfs(*pieces), stats.poisson_binom(p).pmf(np.arange(5)), atol=1e-15
    )


def test_probability_over_the_beds_keeps_small_tails() -> None:
    mean = 3.0
    pmf = poisson_pmf(mean)
    beds = np.array([-1, 0, 2, 5, 12, 20])
    expected = stats.poisson(mean).sf(beds)  # scipy: P(X > beds)
    np.testing.assert_allclose(pmf_sf_over(pmf, beds), expected, rtol=1e-9, atol=1e-15)
    assert pmf_sf_over(pmf, pmf.size + 5) == 0.0
    assert pmf_sf_over(pmf, 20) == pytest.approx(stats.poisson(mean).sf(20), rel=1e-9)


def test_bad_input_is_rejected() -> None:
    with pytest.raises(ValueError, match="p: probabilities"):
        poisson_binomial_pmf([0.5, 1.2])
    with pytest.raises(ValueError, match="pmf: must sum to 1"):
        pmf_quantile([0.5, 0.2], 0.5)
    with pytest.raises(ValueError, match="q: levels"):
        pmf_quantile([0.5, 0.5], 1.5)
    with pytest.raises(ValueError, match="mean"):
        poisson_pmf(-1.0)
    with pytest.raises(ValueError, match="size"):
        negative_binomial_pmf(2.0, 0.0)
    with pytest.raises(ValueError, match="beds"):
        pmf_sf_over([0.5, 0.5], 1.5)
