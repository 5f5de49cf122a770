"""The spread of daily demand around the forecast, day by day and shared by a forecast's days
(app.stats.demand_spread), and how the forecast's counts use it (app.stats.occupancy).

Outside references: scipy's gamma and negative binomial distributions and its numerical
integration (``scipy.integrate.quad``), the closed form of a Poisson mixed over a gamma rate
(the negative binomial: Greenwood & Yule 1920; any probability text), the truth of simulated
counts, and the size of the boundary likelihood-ratio test (Self & Liang 1987, JASA
82:605-610, cited from memory)."""

from __future__ import annotations

import math
from datetime import date, timedelta

import numpy as np
import pytest
from scipy import integrate, stats

from app.stats.arrivals import choose_demand_terms
from app.stats.demand_spread import (
    _shared_nb_loglike,
    _shared_poisson_loglike,
    heldout_spread,
)
from app.stats.occupancy import ArrivalStream, _stream_pmf, newcomers
from app.stats.occupancy_paths import draw_paths


def test_poisson_days_with_a_shared_level_are_the_negative_binomial() -> None:
    # A Poisson mixed over one gamma rate: the negative binomial (Greenwood & Yule 1920).
    size = 3.0
    pmf = _stream_pmf(np.array([2.5, 3.5]), None, size)
    exact = stats.nbinom.pmf(np.arange(60), size, size / (size + 6.0))
    assert np.max(np.abs(pmf[:60] - exact)) < 1e-12


@pytest.mark.parametrize(("presence", "size", "level"), [
    ((1.5, 2.0, 0.8), 3.0, 4.0),
    ((0.4, 1.1, 1.6, 1.9, 2.0, 2.1, 2.2), 6.0, 8.0),
    ((3.0, 4.0, 5.0), 2.0, 15.0),
])
def test_negative_binomial_days_with_a_shared_level_against_numerical_integration(
        presence: tuple[float, ...], size: float, level: float) -> None:
    m = np.asarray(presence)
    pmf = _stream_pmf(m, size, level)

    def given(scale: float) -> np.ndarray:
        out = np.ones(1)
        for mean in m * scale:
            out = np.convolve(out, stats.nbinom.pmf(np.arange(250), size, size / (size + mean)))
        return out[:250]

    gamma = stats.gamma(level, scale=1.0 / level)
    reference = np.array([integrate.quad(lambda s, k=k: given(s)[k] * gamma.pdf(s), 0, np.inf,
                                         limit=200)[0] for k in range(120)])
    # The mean and variance are exact: sum m + sum m^2 / size + (sum m)^2 / level plus the
    # product term (sum m^2) / (size level) (law of total variance).
    k = np.arange(pmf.size)
    variance = m.sum() + (m**2).sum() / size + m.sum() ** 2 / level + (m**2).sum() / (
        size * level)
    assert float(k @ pmf) == pytest.approx(m.sum(), rel=1e-6)
    assert float((k - m.sum()) ** 2 @ pmf) == pytest.approx(variance, rel=1e-4)
    assert float((np.arange(120) - m.sum()) ** 2 @ reference) == pytest.approx(variance,
                                                                               rel=1e-3)
    # The shape is a moment match: total variation to the integral below 0.025 (measured
    # 0.020, 0.008 and 0.019 on these cases, the largest where both dispersions are large).
    width = min(120, pmf.size)
    distance = 0.5 * float(np.abs(pmf[:width] - reference[:width]).sum())
    assert distance < 0.025


def test_shared_log_likelihoods_match_numerical_integration() -> None:
    y = np.array([3.0, 0.0, 5.0, 2.0, 4.0])
    mu = np.array([2.0, 1.5, 3.0, 2.5, 2.2])
    groups = [np.arange(5)]
    for alpha, tau2 in ((None, 0.3), (0.4, 0.3), (0.2, 0.05), (2.0, 0.8)):
        law = stats.gamma(1 / tau2, scale=tau2)

        def density(s: float, alpha: float | None = alpha, law: object = law) -> float:
            if alpha is None:
                given = stats.poisson.pmf(y, mu * s)
            else:
                given = stats.nbinom.pmf(y, 1 / alpha, 1 / (1 + alpha * mu * s))
            return float(np.prod(given)) * law.pdf(s)  # type: ignore[attr-defined]

        ours = (_shared_poisson_loglike(tau2, y, mu, groups) if alpha is None
                else _shared_nb_loglike(alpha, tau2, y, mu, groups))
        reference, _ = integrate.quad(density, 0, np.inf, limit=200, epsabs=0)
        assert ours == pytest.approx(math.log(reference), abs=1e-6)


def _weeks(rng: np.random.Generator, n_weeks: int, alpha: float, tau2: float
           ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    mu = rng.uniform(1.0, 4.0, (n_weeks, 7))
    shared = rng.gamma(1 / tau2, tau2, (n_weeks, 1)) if tau2 > 0 else np.ones((n_weeks, 1))
    daily = rng.gamma(1 / alpha, alpha, mu.shape) if alpha > 0 else np.ones(mu.shape)
    y = rng.poisson(mu * shared * daily)
    return y.ravel().astype(float), mu.ravel(), np.repeat(np.arange(n_weeks), 7)


def test_the_spread_recovers_which_kind_of_error_the_counts_have() -> None:
    rng = np.random.default_rng(3)
    # 300 weeks each: the truth, not a stored answer, is the reference.
    shared_only = heldout_spread(*_weeks(rng, 300, 0.0, 0.15))
    assert shared_only.alpha is None and shared_only.tau2 == pytest.approx(0.15, abs=0.05)
    daily_only = heldout_spread(*_weeks(rng, 300, 0.4, 0.0))
    # A shared term is kept on 5% of such samples by design (the test's size); when it is, small.
    assert daily_only.tau2 is None or daily_only.tau2 < 0.04
    assert daily_only.alpha == pytest.approx(0.4, abs=0.12)
    both = heldout_spread(*_weeks(rng, 300, 0.4, 0.15))
    assert both.alpha == pytest.approx(0.4, abs=0.15)
    assert both.tau2 == pytest.approx(0.15, abs=0.06)
    assert both.level_size == pytest.approx(1 / both.tau2)


def test_poisson_weeks_keep_no_shared_term_at_the_tests_size() -> None:
    rng = np.random.default_rng(8)
    kept = sum(heldout_spread(*_weeks(rng, 13, 0.0, 0.0)).tau2 is not None
               for _ in range(100))
    # 100 samples of 13 Poisson weeks at a nominal 5%: 5 expected; binomial(100, 0.05) puts
    # 99.9% at 13 or fewer (scipy.stats.binom.ppf(0.999, 100, 0.05) = 13).
    assert kept <= 13, kept


def test_a_wandering_level_is_found_on_heldout_weeks_and_independent_days_are_not() -> None:
    # Demand whose log-level follows an AR(1) (day-to-day correlation 0.9, stationary SD
    # 0.3) against one whose days are independently overdispersed with the same variance.
    days = [date(2024, 3, 1) + timedelta(days=i) for i in range(500)]
    found_wander, found_independent = 0, 0
    for seed in range(10):
        rng = np.random.default_rng(seed)
        level = np.zeros(500)
        for i in range(1, 500):
            level[i] = 0.9 * level[i - 1] + rng.normal(0, 0.3 * math.sqrt(1 - 0.81))
        wander = rng.poisson(3.0 * np.exp(level - 0.045))
        independent = rng.poisson(3.0 * rng.gamma(1 / 0.094, 0.094, 500))
        found_wander += choose_demand_terms(days, wander, alpha=0.1).tau2 is not None
        found_independent += choose_demand_terms(days, independent, alpha=0.1).tau2 is not None
    # Measured: a shared term on 6 of 10 wandering series (two more kept a day-by-day
    # dispersion instead), 2 of 10 independent ones (13 held-out weeks tell them apart only
    # partly; the test's nominal size is 5% per series).
    assert found_wander >= 5
    assert found_independent <= 3


def test_the_forecasts_paths_and_exact_counts_agree_on_a_shared_level() -> None:
    from app.stats.phasetype import Coxian

    # One emergency stream over three days, stays of mean 4 days, a shared level of size 5:
    # the paths' count at the third instant has the exact pmf's mean and variance.
    stay = Coxian.exponential(0.25)
    slots = np.arange(0.5, 3.0, 0.25)
    stream = ArrivalStream("emergency", tuple(slots), tuple([0.4] * slots.size),
                           tuple((slots // 1).astype(int)), None, stay, level_size=5.0)
    census = np.array([1.0, 2.0, 3.0])
    from app.stats.occupancy import BookedAdmissions

    none = BookedAdmissions((), (), ())
    exact = newcomers(none, [stream], census).arriving[2]["emergency"]
    k = np.arange(exact.size)
    mean = float(k @ exact)
    variance = float((k - mean) ** 2 @ exact)
    draws = draw_paths(0, none, [stream], census, 40_000, np.random.default_rng(1))
    counts = draws.counts(np.zeros((0, 3)))[:, 2]
    assert counts.mean() == pytest.approx(mean, abs=4 * math.sqrt(variance / 40_000))
    assert counts.var() == pytest.approx(variance, rel=0.05)
    # Without the shared level the variance is the Poisson's (= the mean): the level adds
    # mean^2 / 5.
    assert variance == pytest.approx(mean + mean**2 / 5.0, rel=1e-3)
