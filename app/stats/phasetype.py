"""Phase-type and Coxian distributions for length of stay.

A phase-type distribution PH(alpha, T) is the time until a continuous-time Markov chain with
transient phases 1..p is absorbed ("the patient leaves"), started in phase i with probability
alpha_i; T is the p x p sub-generator (negative diagonal, non-negative off-diagonal, row sums
<= 0) and t = -T 1 is the vector of exit rates. With 1 a column of ones, for x >= 0:

    S(x)     = alpha exp(T x) 1                      (survival, still in the unit at x)
    f(x)     = alpha exp(T x) t                      (density)
    E[X^k]   = k! alpha (-T)^{-k} 1                  (raw moments)
    X - a | X > a  ~  PH(alpha exp(T a) / S(a), T)   (remaining stay after a days in)

A Coxian with p phases starts in phase 1 and leaves phase i either onwards to phase i+1 (rate
lam_i) or out of the unit (rate mu_i); the last phase only leaves. One phase is the exponential;
all early exits closed (mu_i = 0 for i < p) with equal rates is the Erlang.

Numerics
--------
``exp(T x)`` at many points: with h = 1 / ||T||_inf, ``x = k h + delta`` (0 <= delta < h);
``alpha exp(T k h)`` is built from the binary digits of k with the squared matrices
``exp(T h)^(2^b)`` (all entries non-negative, so products keep relative accuracy) and
renormalised after every product with the scale kept as a logarithm (no underflow in the far
tail, which also gives the remaining-stay vector at any age); ``exp(T delta)`` is a 20-term Taylor
series, whose remainder is below 1/21! because ||T delta|| < 1. This is vectorised over points;
one ``scipy.linalg.expm`` per distribution instead of one per point.

Fitting (maximum likelihood, right censoring): durations are binned on a grid of step h
(``resolution``, by default an hour or finer); an ended stay in bin k = floor(x / h) contributes
the probability of leaving during [k h, (k + 1) h), divided by h for the reported
log-likelihood, and an ongoing stay contributes S(k h). A stay under observation only from
``entry`` days in (left truncation: admitted before the extract began) is conditioned on having
lasted that long, dividing its term by S(floor(entry / h) h). Recorded durations are thus read as
truncated to the grid: for stays recorded to the hour by truncation this is the exact
interval-censored likelihood, and with resolution 1 it is exact for stays counted in whole days
by truncation. Durations rounded up to the grid would sit one bin late (subtract h / 2 first to
put them in their bin); durations in whole days fitted on the default hour grid are read as
exact to the hour. Bin probabilities stay below 1, so zero durations need no special floor: a
phase-type density at 0 is alpha t, and with exact zeros the point-density likelihood is
unbounded (an ever faster first exit fits them ever better). The chain state on the grid,
``alpha E^k`` with E = exp(T h), is computed for every k by doubling; the gradient comes from the
adjoint (backward) recursion ``g_k = b_k + g_{k+1} E^T``, done for every k at once by a doubling
(Hillis-Steele) scan, and the adjoint of the Frechet derivative of the matrix exponential,
``<L(A, Z), C> = <Z, L(A^T, C)>``. One likelihood-plus-gradient evaluation therefore costs one
``expm``, one ``expm_frechet`` and O(K p^2 log K) flops for K grid steps, whatever the number
of stays.

References
----------
Asmussen S, Nerman O, Olsson M (1996). Fitting phase-type distributions via the EM algorithm.
Scandinavian Journal of Statistics 23:419-441. (Named in METHODS.md. METHODS.md allows direct
maximum likelihood on log-rates instead of EM; that is what is done here, EM is not
implemented.)

Schwarz G (1978). Estimating the dimension of a model. Annals of Statistics 6:461-464. (BIC;
cited from memory.)

The Frechet derivative is ``scipy.linalg.expm_frechet`` (its documentation names the algorithm).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from functools import cached_property
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd
from scipy import linalg, optimize
from threadpoolctl import ThreadpoolController

from app.stats.kaplan_meier import check_entry, check_stays

__all__ = [
    "Coxian",
    "CoxianFit",
    "CoxianSelection",
    "PhaseType",
    "distribution_from_dict",
    "fit_coxian",
    "log_likelihood",
    "select_coxian",
]

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]

_TAYLOR_TERMS = 20
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
# Core propagation
# ---------------------------------------------------------------------------------------------

_threadpools: ThreadpoolController | None = None


def _single_threaded_blas() -> Any:
    """Context that runs BLAS on one thread.

    The products here are tall and thin (K x p times p x p, p <= 10); a threaded BLAS spends
    more on waking threads than on the arithmetic (measured 10-15x slower per likelihood
    evaluation on a busy 2-core machine).
    """
    global _threadpools
    if _threadpools is None:
        _threadpools = ThreadpoolController()
    return _threadpools.limit(limits=1, user_api="blas")


def _propagate(
    alpha: FloatArray, sub_generator: FloatArray, x: FloatArray
) -> tuple[FloatArray, FloatArray]:
    """Return ``alpha exp(T x_i)`` on one BLAS thread; see :func:`_propagate_core`."""
    with _single_threaded_blas():
        return _propagate_core(alpha, sub_generator, x)


def _propagate_core(
    alpha: FloatArray, sub_generator: FloatArray, x: FloatArray
) -> tuple[FloatArray, FloatArray]:
    """Return ``alpha exp(T x_i)`` for each x_i as ``direction_i * exp(log_scale_i)``.

    ``x`` must be 1-D, finite and >= 0. Rows of ``direction`` sum to 1 (or are all zero when the
    state underflowed relative to the largest entry of a matrix power).
    """
    n = x.size
    norm = float(np.abs(sub_generator).sum(axis=1).max())
    step = 1.0 / norm
    k_float = np.floor(x / step)
    if n and k_float.max() > 2.0**62:
        raise ValueError(
            f"x: {x.max()!r} is too large relative to the phase rates (more than 2^62 steps)"
        )
    k = k_float.astype(np.int64)
    delta = np.clip(x - k * step, 0.0, step)

    direction = np.tile(alpha, (n, 1))
    log_scale = np.zeros(n)
    power = np.clip(linalg.expm(sub_generator * step), 0.0, None)
    power_log = 0.0
    remaining = k.copy()
    with np.errstate(divide="ignore"):
        while True:
            selected = (remaining & 1).astype(bool)
            if selected.any():
                rows = direction[selected] @ power
                totals = rows.sum(axis=1)
                positive = totals > 0
                rows[positive] /= totals[positive, None]
                direction[selected] = rows
                log_scale[selected] += power_log + np.log(totals)
            remaining >>= 1
            if not remaining.any():
                break
            power = power @ power
            power_log *= 2.0
            biggest = float(power.max())
            power /= biggest
            power_log += math.log(biggest)

    term = direction.copy()
    result = direction.copy()
    for j in range(1, _TAYLOR_TERMS + 1):
        term = (term @ sub_generator) * (delta / j)[:, None]
        result += term
    return np.clip(result, 0.0, None), log_scale


def _as_rng(rng: np.random.Generator | int | None) -> np.random.Generator:
    return rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)


class _PhaseTypeMethods:
    """Distribution methods shared by :class:`PhaseType` and :class:`Coxian`.

    Subclasses provide ``_alpha_vector`` and ``_sub_generator_matrix`` (numpy arrays).
    """

    _alpha_vector: FloatArray
    _sub_generator_matrix: FloatArray

    @property
    def n_phases(self) -> int:
        """Number of transient phases p."""
        return int(self._alpha_vector.size)

    def initial_vector(self) -> FloatArray:
        """Initial phase probabilities alpha, shape (p,)."""
        return self._alpha_vector.copy()

    def sub_generator(self) -> FloatArray:
        """Sub-generator T, shape (p, p)."""
        return self._sub_generator_matrix.copy()

    def exit_vector(self) -> FloatArray:
        """Exit rates t = -T 1, shape (p,)."""
        return np.clip(-self._sub_generator_matrix.sum(axis=1), 0.0, None)

    # -- evaluation ----------------------------------------------------------------------------

    def _log_values(self, x: npt.ArrayLike, kind: str) -> FloatArray:
        values = np.asarray(x, dtype=float)
        flat = values.ravel()
        out = np.full(flat.shape, np.nan)
        usable = np.isfinite(flat) & (flat >= 0)
        exit_rates = self.exit_vector()
        if usable.any():
            direction, log_scale = _propagate(
                self._alpha_vector, self._sub_generator_matrix, flat[usable]
            )
            weights = np.ones_like(exit_rates) if kind == "sf" else exit_rates
            with np.errstate(divide="ignore"):
                out[usable] = np.log(direction @ weights) + log_scale
        below = flat < 0
        out[below] = 0.0 if kind == "sf" else -np.inf
        out[np.isposinf(flat)] = -np.inf
        return out.reshape(values.shape)

    def logsf(self, x: npt.ArrayLike) -> FloatArray:
        """Log survival log S(x), accurate in the far tail. Same shape as ``x``."""
        return self._log_values(x, "sf")

    def logpdf(self, x: npt.ArrayLike) -> FloatArray:
        """Log density log f(x); -inf for x < 0. Same shape as ``x``."""
        return self._log_values(x, "pdf")

    def sf(self, x: npt.ArrayLike) -> FloatArray:
        """Survival S(x) = alpha exp(T x) 1 (1 for x < 0). Same shape as ``x``."""
        return np.exp(self.logsf(x))

    def pdf(self, x: npt.ArrayLike) -> FloatArray:
        """Density f(x) = alpha exp(T x) t (0 for x < 0). Same shape as ``x``."""
        return np.exp(self.logpdf(x))

    def cdf(self, x: npt.ArrayLike) -> FloatArray:
        """Distribution function F(x) = 1 - S(x). Same shape as ``x``."""
        return -np.expm1(self.logsf(x))

    # -- moments -------------------------------------------------------------------------------

    def moments(self, n: int = 2) -> FloatArray:
        """Raw moments E[X^k] = k! alpha (-T)^{-k} 1 for k = 1..n, shape (n,)."""
        if n < 1:
            raise ValueError(f"n: must be >= 1, got {n!r}")
        negative_t = -self._sub_generator_matrix
        vector: FloatArray = np.ones(self.n_phases)
        out = np.empty(n)
        for k in range(1, n + 1):
            vector = np.asarray(np.linalg.solve(negative_t, vector), dtype=float)
            out[k - 1] = math.factorial(k) * float(self._alpha_vector @ vector)
        return out

    def mean(self) -> float:
        """Mean stay alpha (-T)^{-1} 1."""
        return float(self.moments(1)[0])

    def variance(self) -> float:
        """Variance E[X^2] - E[X]^2."""
        first, second = self.moments(2)
        return float(second - first**2)

    # -- remaining stay ------------------------------------------------------------------------

    def conditional(self, a: float) -> PhaseType:
        """Remaining-stay distribution given the stay has lasted ``a`` so far.

        Parameters
        ----------
        a : float
            Time already spent (>= 0), same unit as the rates.

        Returns
        -------
        PhaseType
            PH(alpha exp(T a) / (alpha exp(T a) 1), T): the law of X - a given X > a.
            Computed with renormalised powers, so it works where S(a) underflows.
        """
        if not (math.isfinite(a) and a >= 0):
            raise ValueError(f"a: must be finite and >= 0, got {a!r}")
        direction, _ = _propagate(
            self._alpha_vector, self._sub_generator_matrix, np.array([float(a)])
        )
        row = direction[0]
        total = row.sum()
        if not total > 0:
            raise ValueError(f"a: survival to {a!r} underflows in every phase")
        return PhaseType(alpha=tuple(float(v) for v in row / total), T=self._t_tuple())

    def _t_tuple(self) -> tuple[tuple[float, ...], ...]:
        return tuple(tuple(float(v) for v in row) for row in self._sub_generator_matrix)

    # -- quantiles -----------------------------------------------------------------------------

    def ppf(self, q: npt.ArrayLike) -> FloatArray:
        """Quantile function: the x with F(x) = q (0 for q = 0, inf for q = 1).

        Solved per value with ``scipy.optimize.brentq`` on log S(x) - log(1 - q), which is
        monotone and well scaled in the upper tail.
        """
        values = np.asarray(q, dtype=float)
        flat = values.ravel()
        if np.any(~((flat >= 0) & (flat <= 1))):
            raise ValueError(f"q: probabilities must lie in [0, 1], got {values!r}")
        out = np.empty(flat.shape)
        mean = self.mean()
        for i, prob in enumerate(flat):
            if prob == 0:
                out[i] = 0.0
                continue
            if prob == 1:
                out[i] = math.inf
                continue
            target = math.log1p(-prob)
            upper = mean
            while float(self.logsf(upper)) > target:
                upper *= 2.0
            out[i] = optimize.brentq(
                lambda x, t=target: float(self.logsf(x)) - t, 0.0, upper, xtol=1e-14, rtol=1e-13
            )
        return out.reshape(values.shape)

    def median(self) -> float:
        """Median stay, ppf(0.5)."""
        return float(self.ppf(0.5))

    # -- simulation ----------------------------------------------------------------------------

    def sample(self, n: int, rng: np.random.Generator | int | None = None) -> FloatArray:
        """Draw ``n`` stays by simulating the Markov chain phase by phase.

        Parameters
        ----------
        n : int
            Number of draws.
        rng : numpy.random.Generator, int or None
            Random generator or seed.

        Returns
        -------
        numpy.ndarray
            Shape (n,), the absorption times.
        """
        if n < 0:
            raise ValueError(f"n: must be >= 0, got {n!r}")
        generator = _as_rng(rng)
        p = self.n_phases
        t_matrix = self._sub_generator_matrix
        out_rates = -np.diag(t_matrix)
        jumps = np.concatenate([t_matrix, self.exit_vector()[:, None]], axis=1)
        np.fill_diagonal(jumps[:, :p], 0.0)
        cumulative = np.cumsum(jumps / out_rates[:, None], axis=1)
        cumulative[:, -1] = 1.0
        alpha = self._alpha_vector / self._alpha_vector.sum()
        phase = generator.choice(p, size=n, p=alpha)
        time = np.zeros(n)
        alive = np.ones(n, dtype=bool)
        while alive.any():
            idx = np.flatnonzero(alive)
            current = phase[idx]
            time[idx] += generator.exponential(1.0 / out_rates[current])
            u = generator.random(idx.size)
            nxt = (u[:, None] >= cumulative[current]).sum(axis=1)
            phase[idx] = nxt
            alive[idx] = nxt < p
        return time


# ---------------------------------------------------------------------------------------------
# Distributions
# ---------------------------------------------------------------------------------------------


def _validate_sub_generator(t_matrix: FloatArray, name: str) -> None:
    p = t_matrix.shape[0]
    if not np.all(np.isfinite(t_matrix)):
        raise ValueError(f"{name}: entries must be finite")
    if np.any(np.diag(t_matrix) >= 0):
        raise ValueError(f"{name}: diagonal must be negative, got {np.diag(t_matrix)!r}")
    off = t_matrix[~np.eye(p, dtype=bool)]
    if np.any(off < 0):
        raise ValueError(f"{name}: off-diagonal entries must be >= 0")
    row_sums = t_matrix.sum(axis=1)
    if np.any(row_sums > 1e-12 * np.abs(np.diag(t_matrix))):
        raise ValueError(f"{name}: row sums must be <= 0, got {row_sums!r}")
    try:
        expected = np.linalg.solve(-t_matrix, np.ones(p))
    except np.linalg.LinAlgError:
        raise ValueError(f"{name}: singular, some phase is never left") from None
    if not np.all(np.isfinite(expected)) or np.any(expected <= 0):
        raise ValueError(f"{name}: some phase is never left (no path to an exit)")


@dataclass(frozen=True)
class PhaseType(_PhaseTypeMethods):
    """General continuous phase-type distribution PH(alpha, T).

    Parameters
    ----------
    alpha : tuple of float, shape (p,)
        Initial phase probabilities, non-negative, summing to 1 (within 1e-9; no atom at 0).
    T : tuple of tuple of float, shape (p, p)
        Sub-generator: negative diagonal, non-negative off-diagonal, row sums <= 0,
        non-singular (every phase eventually leads to an exit).

    Notes
    -----
    Arrays passed in are stored as tuples of Python floats, so instances are hashable,
    comparable with ``==`` and round-trip exactly through JSON (``to_dict``/``from_dict``).
    """

    alpha: tuple[float, ...]
    T: tuple[tuple[float, ...], ...]

    def __post_init__(self) -> None:
        alpha = np.asarray(self.alpha, dtype=float)
        t_matrix = np.asarray(self.T, dtype=float)
        if alpha.ndim != 1 or alpha.size < 1:
            raise ValueError(f"alpha: must be a non-empty 1-D vector, got {self.alpha!r}")
        if t_matrix.shape != (alpha.size, alpha.size):
            raise ValueError(
                f"T: shape must be ({alpha.size}, {alpha.size}) to match alpha, "
                f"got {t_matrix.shape}"
            )
        if not np.all(np.isfinite(alpha)) or np.any(alpha < 0):
            raise ValueError(f"alpha: entries must be finite and >= 0, got {self.alpha!r}")
        if abs(alpha.sum() - 1.0) > 1e-9:
            raise ValueError(f"alpha: must sum to 1, sums to {alpha.sum()!r}")
        _validate_sub_generator(t_matrix, "T")
        object.__setattr__(self, "alpha", tuple(float(v) for v in alpha))
        object.__setattr__(self, "T", tuple(tuple(float(v) for v in row) for row in t_matrix))

    @cached_property
    def _alpha_vector(self) -> FloatArray:  # type: ignore[override]
        return np.array(self.alpha, dtype=float)

    @cached_property
    def _sub_generator_matrix(self) -> FloatArray:  # type: ignore[override]
        return np.array(self.T, dtype=float)

    def to_phase_type(self) -> PhaseType:
        """Return self (for symmetry with :meth:`Coxian.to_phase_type`)."""
        return self

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict; ``PhaseType.from_dict(json.loads(json.dumps(d)))`` is exact."""
        return {"family": "phase_type", "alpha": list(self.alpha), "T": [list(r) for r in self.T]}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> PhaseType:
        """Inverse of :meth:`to_dict`."""
        if data.get("family") != "phase_type":
            raise ValueError(f"data: family must be 'phase_type', got {data.get('family')!r}")
        return cls(alpha=tuple(data["alpha"]), T=tuple(tuple(r) for r in data["T"]))


@dataclass(frozen=True)
class Coxian(_PhaseTypeMethods):
    """Coxian phase-type distribution: phases in series, an exit from each.

    Parameters
    ----------
    lam : tuple of float, shape (p - 1,)
        ``lam[i]`` is the rate from phase i to phase i + 1 (>= 0).
    mu : tuple of float, shape (p,)
        ``mu[i]`` is the exit rate from phase i (>= 0; the last one > 0).

    Notes
    -----
    T has diagonal -(lam_i + mu_i) (lam_p = 0) and super-diagonal lam; alpha = (1, 0, ..., 0).
    Each phase must be left at a positive rate. The representation is not always unique:
    different rate vectors can give the same distribution, so compare fits by their curves.
    """

    lam: tuple[float, ...]
    mu: tuple[float, ...]

    def __post_init__(self) -> None:
        lam = np.asarray(self.lam, dtype=float).reshape(-1)
        mu = np.asarray(self.mu, dtype=float).reshape(-1)
        if mu.size < 1:
            raise ValueError("mu: needs at least one phase")
        if lam.size != mu.size - 1:
            raise ValueError(f"lam: must have len(mu) - 1 = {mu.size - 1} entries, got {lam.size}")
        for name, vec in (("lam", lam), ("mu", mu)):
            if not np.all(np.isfinite(vec)) or np.any(vec < 0):
                raise ValueError(f"{name}: rates must be finite and >= 0, got {vec!r}")
        if not mu[-1] > 0:
            raise ValueError(f"mu: the last phase's exit rate must be > 0, got {mu[-1]!r}")
        if np.any(lam + mu[:-1] <= 0):
            raise ValueError("lam, mu: every phase must be left at a positive rate")
        object.__setattr__(self, "lam", tuple(float(v) for v in lam))
        object.__setattr__(self, "mu", tuple(float(v) for v in mu))

    @classmethod
    def exponential(cls, rate: float) -> Coxian:
        """One phase: the exponential distribution with the given rate."""
        return cls(lam=(), mu=(float(rate),))

    @classmethod
    def erlang(cls, shape: int, rate: float) -> Coxian:
        """``shape`` phases in series at equal ``rate``, no early exit: the Erlang."""
        if shape < 1:
            raise ValueError(f"shape: must be >= 1, got {shape!r}")
        return cls(lam=(float(rate),) * (shape - 1), mu=(0.0,) * (shape - 1) + (float(rate),))

    @cached_property
    def _alpha_vector(self) -> FloatArray:  # type: ignore[override]
        alpha = np.zeros(len(self.mu))
        alpha[0] = 1.0
        return alpha

    @cached_property
    def _sub_generator_matrix(self) -> FloatArray:  # type: ignore[override]
        return _coxian_sub_generator(np.array(self.lam), np.array(self.mu))

    def to_phase_type(self) -> PhaseType:
        """The same distribution as a general :class:`PhaseType`."""
        return PhaseType(alpha=tuple(self._alpha_vector), T=self._t_tuple())

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict; ``Coxian.from_dict(json.loads(json.dumps(d)))`` is exact."""
        return {"family": "coxian", "lam": list(self.lam), "mu": list(self.mu)}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> Coxian:
        """Inverse of :meth:`to_dict`."""
        if data.get("family") != "coxian":
            raise ValueError(f"data: family must be 'coxian', got {data.get('family')!r}")
        return cls(lam=tuple(data["lam"]), mu=tuple(data["mu"]))


def _coxian_sub_generator(lam: FloatArray, mu: FloatArray) -> FloatArray:
    t_matrix = np.diag(-(mu + np.append(lam, 0.0)))
    if lam.size:
        t_matrix[np.arange(lam.size), np.arange(1, lam.size + 1)] = lam
    return t_matrix


def distribution_from_dict(data: Mapping[str, Any]) -> PhaseType | Coxian:
    """Rebuild a :class:`PhaseType` or :class:`Coxian` from its ``to_dict`` output."""
    family = data.get("family")
    if family == "coxian":
        return Coxian.from_dict(data)
    if family == "phase_type":
        return PhaseType.from_dict(data)
    raise ValueError(f"data: unknown family {family!r}")


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
