"""Fitting Coxian phase-type distributions to lengths of stay: the likelihood of (possibly
censored, possibly left-truncated) stays on an hourly grid, direct maximum likelihood on
log-rates, and the choice of the number of phases by BIC. The distributions themselves, and
the published sources of the method, are in ``app.stats.phasetype``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd
from scipy import linalg, optimize

from app.stats.kaplan_meier import check_entry, check_stays
from app.stats.phasetype import (
    Coxian,
    FloatArray,
    IntArray,
    PhaseType,
    _as_rng,
    _coxian_sub_generator,
    _single_threaded_blas,
)

__all__ = ["CoxianFit", "CoxianSelection", "fit_coxian", "log_likelihood", "select_coxian"]

# Probabilities below this are treated as this in the fitting objective only, so that a wild
# trial point of the optimiser gives a large finite value instead of -inf.
_TINY = 1e-300
# Bounds on the fitted rates in units of 1 / (mean stay): below 1e-8 a path is closed for any
# practical purpose; above ten per grid step a phase is shorter than the data can resolve.
_LOG_RATE_MIN = math.log(1e-8)
_MAX_GRID_POINTS = 2**16
_DEFAULT_RESOLUTION = 1.0 / 24.0  # one hour, durations in days
# L-BFGS-B settings, on the mean log-likelihood per stay.
_FTOL = 1e-10
_GTOL = 1e-6
_SCREEN_ITERATIONS = 30
_MAX_ITERATIONS = 500


# ---------------------------------------------------------------------------------------------
# Likelihood and fitting
# ---------------------------------------------------------------------------------------------


def _validate_stays(
    durations: npt.ArrayLike, observed: npt.ArrayLike, weights: npt.ArrayLike | None
) -> tuple[FloatArray, FloatArray, FloatArray]:
    x, ended = check_stays(durations, observed)
    d = ended.astype(float)
    if weights is None:
        w = np.ones_like(x)
    else:
        w = np.asarray(weights, dtype=float)
        if w.shape != x.shape:
            raise ValueError(f"weights: shape {w.shape} does not match durations {x.shape}")
        if not np.all(np.isfinite(w)) or np.any(w < 0):
            raise ValueError("weights: must be finite and >= 0")
    if not np.sum(w * d) > 0:
        raise ValueError(
            "observed: no ended stay (all censored or zero weight); the stay distribution "
            "cannot be estimated"
        )
    return x, d, w


def log_likelihood(
    distribution: PhaseType | Coxian,
    durations: npt.ArrayLike,
    observed: npt.ArrayLike,
    weights: npt.ArrayLike | None = None,
    entry: npt.ArrayLike | None = None,
) -> float:
    """Log-likelihood sum_i w_i [d_i log f(x_i) + (1 - d_i) log S(x_i) - log S(e_i)].

    Right censoring and delayed entry e_i (left truncation; 0 when not given).

    Parameters
    ----------
    distribution : PhaseType or Coxian
    durations : array_like, shape (n,)
        Stay lengths (ended stays) or time in the unit so far (ongoing stays), >= 0.
    observed : array_like of bool, shape (n,)
        True when the stay has ended (an event), False when censored.
    weights : array_like, shape (n,), optional
        Frequency weights (default 1).
    entry : array_like, shape (n,), optional
        Days in the unit when each stay came under observation, 0 <= entry <= duration.

    Returns
    -------
    float
        Evaluated at the durations as given (no grid rounding).
    """
    x, d, w = _validate_stays(durations, observed, weights)
    e = check_entry(entry, x)
    log_f = distribution.logpdf(x)
    log_s = distribution.logsf(x)
    with np.errstate(invalid="ignore"):
        terms = (np.where(d == 1, log_f, log_s) - distribution.logsf(e)) * w
    terms[w == 0] = 0.0
    return float(terms.sum())


@dataclass(frozen=True)
class _StayGrid:
    """Stays binned on a grid of ``resolution``, aggregated by grid index.

    Index k = floor(duration / resolution). Times inside the objective are in units of ``scale``
    (the exponential-fit mean stay) so that every fit starts near rate 1.
    """

    event_index: IntArray
    event_weight: FloatArray
    censored_index: IntArray
    censored_weight: FloatArray
    entry_index: IntArray
    entry_weight: FloatArray
    step: float
    scale: float
    resolution: float
    n: float
    n_events: float


def _aggregate(k: IntArray, weight: FloatArray) -> tuple[IntArray, FloatArray]:
    unique, inverse = np.unique(k, return_inverse=True)
    totals = np.bincount(inverse, weights=weight, minlength=unique.size).astype(float)
    keep = totals > 0
    return unique[keep].astype(np.int64), totals[keep]


def _build_grid(
    durations: npt.ArrayLike,
    observed: npt.ArrayLike,
    weights: npt.ArrayLike | None,
    resolution: float | None,
    entry: npt.ArrayLike | None = None,
) -> _StayGrid:
    x, d, w = _validate_stays(durations, observed, weights)
    e = check_entry(entry, x)
    total_weight = float(w.sum())
    n_events = float((w * d).sum())
    mean_duration = float((w * x).sum() / total_weight)
    longest = float(x.max())
    if resolution is None:
        resolution = _DEFAULT_RESOLUTION
        if mean_duration > 0:
            resolution = min(resolution, mean_duration / 100.0)
        if longest / resolution > _MAX_GRID_POINTS:
            resolution = longest / _MAX_GRID_POINTS
    elif not (math.isfinite(resolution) and resolution > 0):
        raise ValueError(f"resolution: must be finite and > 0, got {resolution!r}")
    elif longest / resolution > _MAX_GRID_POINTS:
        raise ValueError(
            f"resolution: {resolution!r} gives {longest / resolution:.0f} grid steps up to the "
            f"longest stay; the limit is {_MAX_GRID_POINTS}"
        )
    # The small allowance keeps a whole number of steps (5 days at 1/24) from flooring one step
    # down through round-off in the division.
    k = np.floor(x / resolution + 1e-9).astype(np.int64)
    event_index, event_weight = _aggregate(k, w * d)
    censored_index, censored_weight = _aggregate(k, w * (1 - d))
    entered_late = e > 0
    entry_index, entry_weight = _aggregate(
        np.floor(e[entered_late] / resolution + 1e-9).astype(np.int64), w[entered_late])
    # Time under observation (x - e) for the starting scale: the exponential MLE's mean.
    scale = max(float((w * (x - e)).sum() / n_events), resolution)
    return _StayGrid(
        event_index=event_index,
        event_weight=event_weight,
        censored_index=censored_index,
        censored_weight=censored_weight,
        entry_index=entry_index,
        entry_weight=entry_weight,
        step=resolution / scale,
        scale=scale,
        resolution=float(resolution),
        n=total_weight,
        n_events=n_events,
    )


class _GridObjective:
    """Negative mean grid log-likelihood of a Coxian and its gradient in log-rates.

    ``theta = log(lam_1..lam_{p-1}, mu_1..mu_p)`` in scaled time units, h = grid step. An ended
    stay in bin k contributes the probability of leaving during [k h, (k + 1) h),
    ``v_k . c`` with ``v_k = alpha exp(T h)^k`` and ``c = (I - exp(T h)) 1``; an ongoing stay
    contributes ``S(k h) = v_k . 1``, and a stay entering late at bin j subtracts ``log S(j h)``.
    ``exp(T h)`` and ``c`` are the blocks of the exponential
    of the augmented generator ``[[T, t], [0, 0]] h``, which gives ``c`` without cancellation.
    """

    def __init__(self, grid: _StayGrid, n_phases: int) -> None:
        self.grid = grid
        self.p = n_phases
        self.n_grid = (
            int(max(grid.event_index.max(initial=0), grid.censored_index.max(initial=0))) + 1
        )
        self.total_weight = float(grid.event_weight.sum() + grid.censored_weight.sum())

    def rates(self, theta: FloatArray) -> tuple[FloatArray, FloatArray]:
        rates = np.exp(theta)
        return rates[: self.p - 1], rates[self.p - 1 :]

    def log_likelihood_per_day(self, objective_value: float) -> float:
        """Reported log-likelihood: ended stays as bin probability / bin width (in days)."""
        grid = self.grid
        return -objective_value * self.total_weight - grid.n_events * math.log(grid.resolution)

    def __call__(self, theta: FloatArray) -> tuple[float, FloatArray]:
        grid = self.grid
        p, n_grid = self.p, self.n_grid
        lam, mu = self.rates(theta)
        augmented = np.zeros((p + 1, p + 1))
        augmented[:p, :p] = _coxian_sub_generator(lam, mu)
        augmented[:p, p] = mu
        a_matrix = augmented * grid.step
        exp_a = linalg.expm(a_matrix)
        step_matrix = np.clip(exp_a[:p, :p], 0.0, None)
        exit_in_step = np.clip(exp_a[:p, p], 0.0, None)

        powers = [step_matrix]
        while 2 ** len(powers) < n_grid:
            powers.append(powers[-1] @ powers[-1])

        # Forward: states[k] = e1 exp(T h)^k, by doubling.
        states = np.empty((n_grid, p))
        states[0] = 0.0
        states[0, 0] = 1.0
        filled, level = 1, 0
        while filled < n_grid:
            count = min(filled, n_grid - filled)
            states[filled : filled + count] = states[:count] @ powers[level]
            filled += count
            level += 1

        at_events = states[grid.event_index]
        bin_prob = np.maximum(at_events @ exit_in_step, _TINY)
        at_censored = states[grid.censored_index]
        survival = np.maximum(at_censored.sum(axis=1), _TINY)
        at_entry = np.maximum(states[grid.entry_index].sum(axis=1), _TINY)
        log_lik = float(
            grid.event_weight @ np.log(bin_prob) + grid.censored_weight @ np.log(survival)
            - grid.entry_weight @ np.log(at_entry)
        )

        # Backward: adjoint[k] = b_k + adjoint[k + 1] E^T for all k at once (doubling scan).
        event_ratio = grid.event_weight / bin_prob
        adjoint = np.zeros((n_grid, p))
        adjoint[grid.event_index] += event_ratio[:, None] * exit_in_step
        adjoint[grid.censored_index] += (grid.censored_weight / survival)[:, None]
        adjoint[grid.entry_index] -= (grid.entry_weight / at_entry)[:, None]
        shift, level = 1, 0
        while shift < n_grid:
            adjoint[: n_grid - shift] += adjoint[shift:] @ powers[level].T
            shift *= 2
            level += 1

        grad_exp = np.zeros((p + 1, p + 1))
        grad_exp[:p, :p] = states[:-1].T @ adjoint[1:]
        grad_exp[:p, p] = event_ratio @ at_events
        grad_m = linalg.expm_frechet(a_matrix.T, grad_exp, compute_expm=False) * grid.step

        diagonal = np.diag(grad_m)[:p]
        grad_lam = grad_m[np.arange(p - 1), np.arange(1, p)] - diagonal[:-1]
        grad_mu = grad_m[:p, p] - diagonal
        gradient = np.concatenate([grad_lam * lam, grad_mu * mu])
        return -log_lik / self.total_weight, -gradient / self.total_weight


@dataclass(frozen=True)
class CoxianFit:
    """A Coxian fitted by maximum likelihood to right-censored stays.

    Attributes
    ----------
    distribution : Coxian
        Fitted distribution, rates per day (per unit of the durations).
    log_likelihood : float
        Maximised log-likelihood of the binned stays (ended stays: bin probability divided by
        the bin width ``resolution``, so it is on the scale of a density log-likelihood).
    n_params : int
        Free parameters, 2p - 1.
    bic : float
        -2 log L + n_params log n.
    n : float
        Number of stays (sum of weights).
    n_events : float
        Number of ended stays (weighted).
    resolution : float
        Bin width (days) of the grid the stays were binned on.
    converged : bool
        Whether L-BFGS-B reported convergence for the best start.
    """

    distribution: Coxian
    log_likelihood: float
    n_params: int
    bic: float
    n: float
    n_events: float
    resolution: float
    converged: bool

    @property
    def n_phases(self) -> int:
        """Number of phases p."""
        return self.distribution.n_phases

    @property
    def aic(self) -> float:
        """-2 log L + 2 n_params."""
        return -2.0 * self.log_likelihood + 2.0 * self.n_params

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict, exact round trip with :meth:`from_dict`."""
        return {
            "distribution": self.distribution.to_dict(),
            "log_likelihood": self.log_likelihood,
            "n_params": self.n_params,
            "bic": self.bic,
            "n": self.n,
            "n_events": self.n_events,
            "resolution": self.resolution,
            "converged": self.converged,
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> CoxianFit:
        """Inverse of :meth:`to_dict`."""
        return cls(
            distribution=Coxian.from_dict(data["distribution"]),
            log_likelihood=float(data["log_likelihood"]),
            n_params=int(data["n_params"]),
            bic=float(data["bic"]),
            n=float(data["n"]),
            n_events=float(data["n_events"]),
            resolution=float(data["resolution"]),
            converged=bool(data["converged"]),
        )


@dataclass(frozen=True)
class CoxianSelection:
    """Coxian fits for p = 1, 2, ... and the one with the lowest BIC.

    Attributes
    ----------
    fits : tuple of CoxianFit
        In increasing number of phases (possibly stopped early).
    """

    fits: tuple[CoxianFit, ...]

    def __post_init__(self) -> None:
        if not self.fits:
            raise ValueError("fits: needs at least one fit")
        object.__setattr__(self, "fits", tuple(self.fits))

    @property
    def best(self) -> CoxianFit:
        """The fit with the lowest BIC (the fewest phases on a tie)."""
        return min(self.fits, key=lambda fit: (fit.bic, fit.n_phases))

    def bic_table(self) -> pd.DataFrame:
        """One row per fit: n_phases, n_params, log_likelihood, bic, converged."""
        return pd.DataFrame(
            {
                "n_phases": [f.n_phases for f in self.fits],
                "n_params": [f.n_params for f in self.fits],
                "log_likelihood": [f.log_likelihood for f in self.fits],
                "bic": [f.bic for f in self.fits],
                "converged": [f.converged for f in self.fits],
            }
        )

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict, exact round trip with :meth:`from_dict`."""
        return {"fits": [fit.to_dict() for fit in self.fits]}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> CoxianSelection:
        """Inverse of :meth:`to_dict`."""
        return cls(fits=tuple(CoxianFit.from_dict(item) for item in data["fits"]))


def _starting_points(
    n_phases: int,
    n_starts: int,
    previous: FloatArray | None,
    generator: np.random.Generator,
) -> list[FloatArray]:
    """Log-rate starts in scaled units (mean stay about 1), best guesses first."""
    p = n_phases
    if p == 1:
        # Rate 1 is the exponential MLE in scaled units (up to grid rounding).
        return [np.zeros(1)]
    starts: list[FloatArray] = []
    if previous is not None:
        # The (p-1)-phase optimum behind a short extra first phase (mean 1/50 of the mean stay).
        prev_lam, prev_mu = previous[: p - 2], previous[p - 2 :]
        starts.append(np.r_[math.log(50.0), prev_lam, math.log(1e-3), prev_mu])
    # Erlang-like: p phases summing to the mean, small early exits.
    rate = float(p)
    starts.append(np.log(np.r_[np.full(p - 1, 0.9 * rate), np.full(p - 1, 0.1 * rate), rate]))
    # Mixture-like: a quick first phase that often exits, then a slower tail.
    tail_rate = (p - 1) / 2.5
    starts.append(
        np.log(
            np.r_[
                0.5,
                np.full(p - 2, 0.9 * tail_rate),
                2.0,
                np.full(p - 2, 0.1 * tail_rate),
                tail_rate,
            ]
        )
    )
    while len(starts) < n_starts:
        starts.append(math.log(p) + generator.normal(0.0, 1.0, 2 * p - 1))
    return starts[:n_starts]


def _fit_on_grid(
    grid: _StayGrid,
    n_phases: int,
    n_starts: int,
    previous: FloatArray | None,
    generator: np.random.Generator,
) -> tuple[CoxianFit, FloatArray]:
    objective = _GridObjective(grid, n_phases)
    upper = math.log(min(1e4, 10.0 / grid.step))
    bounds = [(_LOG_RATE_MIN, upper)] * (2 * n_phases - 1)

    def run(x0: FloatArray, maxiter: int) -> optimize.OptimizeResult:
        with _single_threaded_blas():
            return optimize.minimize(
                objective,
                np.clip(x0, _LOG_RATE_MIN, upper),
                jac=True,
                method="L-BFGS-B",
                bounds=bounds,
                options={"maxiter": maxiter, "ftol": _FTOL, "gtol": _GTOL},
            )

    # Every start gets a short run; only the most promising is run to convergence. Fits with
    # many phases crawl along flat ridges (near-equivalent rate vectors), so running each start
    # to the end costs most of the time and rarely changes which start wins.
    best: optimize.OptimizeResult | None = None
    for start in _starting_points(n_phases, n_starts, previous, generator):
        result = run(start, _SCREEN_ITERATIONS)
        if best is None or result.fun < best.fun:
            best = result
    assert best is not None
    if best.nit >= _SCREEN_ITERATIONS:
        polished = run(np.asarray(best.x), _MAX_ITERATIONS)
        if polished.fun <= best.fun:
            best = polished
    theta = np.asarray(best.x, dtype=float)
    fun = float(best.fun)
    if previous is not None:
        # The (p-1)-phase optimum is a p-phase Coxian whose extra last phase is never entered
        # (the rate into it at its lower bound). Keeping it when the search did worse makes the
        # maximised likelihood non-decreasing in p, as it must be for nested models.
        embedded = np.r_[
            previous[: n_phases - 2], _LOG_RATE_MIN, previous[n_phases - 2 :], previous[-1]
        ]
        embedded_fun = float(objective(embedded)[0])
        if embedded_fun < fun:
            theta, fun = embedded, embedded_fun
    lam, mu = objective.rates(theta)
    distribution = Coxian(
        lam=tuple(float(v) for v in lam / grid.scale),
        mu=tuple(float(v) for v in mu / grid.scale),
    )
    log_lik = objective.log_likelihood_per_day(fun)
    n_params = 2 * n_phases - 1
    fit = CoxianFit(
        distribution=distribution,
        log_likelihood=log_lik,
        n_params=n_params,
        bic=-2.0 * log_lik + n_params * math.log(grid.n),
        n=grid.n,
        n_events=grid.n_events,
        resolution=grid.resolution,
        converged=bool(best.success),
    )
    return fit, theta


def fit_coxian(
    durations: npt.ArrayLike,
    observed: npt.ArrayLike,
    n_phases: int,
    *,
    weights: npt.ArrayLike | None = None,
    n_starts: int = 4,
    resolution: float | None = None,
    rng: np.random.Generator | int | None = None,
    entry: npt.ArrayLike | None = None,
) -> CoxianFit:
    """Fit a Coxian with ``n_phases`` phases by maximum likelihood with right censoring.

    Ended stays contribute their density, ongoing (censored) stays the survival:
    log L = sum_i w_i [d_i log f(x_i) + (1 - d_i) log S(x_i)], with durations binned on the
    ``resolution`` grid (see the module docstring: an ended stay contributes its bin
    probability / bin width, which stays bounded for zero durations). The 2p - 1 log-rates are
    optimised by L-BFGS-B with an analytic gradient. Every start (Erlang-like, mixture-like, then
    random; from :func:`select_coxian` also the previous fit with an extra short first phase)
    gets 30 iterations; the best is then run to convergence.

    Parameters
    ----------
    durations : array_like, shape (n,)
        Stay lengths in days (time so far for ongoing stays), >= 0.
    observed : array_like of bool, shape (n,)
        True for an ended stay, False for a censored one. At least one must be True.
    n_phases : int
        Number of phases p >= 1.
    weights : array_like, shape (n,), optional
        Frequency weights (counts); n in the BIC is their sum.
    n_starts : int, default 4
        Number of optimiser starts.
    resolution : float, optional
        Grid step (days) of the bins. Default: 1/24 (an hour), or a hundredth of the mean
        duration if that is finer, coarsened if needed to keep at most 2^16 steps up to the
        longest stay (an explicit value above that limit is an error). Use 1 for stays counted
        in whole days.
    rng : numpy.random.Generator, int or None
        For the random starts.
    entry : array_like, shape (n,), optional
        Days in the unit when each stay came under observation (left truncation), 0 <= entry
        <= duration; each stay's term is divided by S(entry). Default 0 for all.

    Returns
    -------
    CoxianFit

    Raises
    ------
    ValueError
        Bad durations, observed or weights (the message names the argument); no ended stay.
    """
    if not (isinstance(n_phases, int | np.integer) and n_phases >= 1):
        raise ValueError(f"n_phases: must be an integer >= 1, got {n_phases!r}")
    if n_starts < 1:
        raise ValueError(f"n_starts: must be >= 1, got {n_starts!r}")
    grid = _build_grid(durations, observed, weights, resolution, entry)
    generator = _as_rng(rng)
    fit, _ = _fit_on_grid(grid, int(n_phases), n_starts, None, generator)
    return fit


def select_coxian(
    durations: npt.ArrayLike,
    observed: npt.ArrayLike,
    max_phases: int = 10,
    *,
    patience: int | None = 2,
    weights: npt.ArrayLike | None = None,
    n_starts: int = 4,
    resolution: float | None = None,
    rng: np.random.Generator | int | None = None,
    entry: npt.ArrayLike | None = None,
) -> CoxianSelection:
    """Fit Coxians with p = 1..max_phases and choose p by BIC = -2 log L + (2p - 1) log n.

    Each fit from p = 2 on also starts from the previous optimum with a short phase put in
    front, and keeps the previous optimum (as a p-phase Coxian whose last phase is never
    entered) if the search found nothing better, so the maximised log-likelihood does not fall
    as p grows.

    Parameters
    ----------
    durations, observed, weights, n_starts, resolution, rng, entry
        As in :func:`fit_coxian`.
    max_phases : int, default 10
        Largest p tried.
    patience : int or None, default 2
        Stop once this many consecutive fits have a BIC above the best so far; None fits all.

    Returns
    -------
    CoxianSelection
        ``best`` is the lowest-BIC fit; ``bic_table()`` lists all fits.
    """
    if not (isinstance(max_phases, int | np.integer) and max_phases >= 1):
        raise ValueError(f"max_phases: must be an integer >= 1, got {max_phases!r}")
    if patience is not None and patience < 1:
        raise ValueError(f"patience: must be >= 1 or None, got {patience!r}")
    if n_starts < 1:
        raise ValueError(f"n_starts: must be >= 1, got {n_starts!r}")
    grid = _build_grid(durations, observed, weights, resolution, entry)
    generator = _as_rng(rng)
    fits: list[CoxianFit] = []
    previous: FloatArray | None = None
    worse_in_a_row = 0
    for p in range(1, int(max_phases) + 1):
        fit, previous = _fit_on_grid(grid, p, n_starts, previous, generator)
        best_bic = min((f.bic for f in fits), default=math.inf)
        fits.append(fit)
        worse_in_a_row = worse_in_a_row + 1 if fit.bic > best_bic else 0
        if patience is not None and worse_in_a_row >= patience:
            break
    return CoxianSelection(fits=tuple(fits))
