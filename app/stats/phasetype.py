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
from scipy import linalg, optimize
from threadpoolctl import ThreadpoolController

from app.stats import phasetype_kernel as kernel

__all__ = ["Coxian", "PhaseType", "distribution_from_dict"]

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]


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
    """Return ``alpha exp(T x_i)`` for each x_i as ``direction_i * exp(log_scale_i)`` (the
    module's numerics, compiled: app/stats/phasetype_kernel.py).

    ``x`` must be 1-D, finite and >= 0. Rows of ``direction`` sum to 1 (or are all zero when the
    state underflowed relative to the largest entry of a matrix power).
    """
    if x.size == 0:
        return np.zeros((0, alpha.size)), np.zeros(0)
    norm = float(np.abs(sub_generator).sum(axis=1).max())
    step = 1.0 / norm
    if float(x.max()) / step > 2.0**62:
        raise ValueError(
            f"x: {x.max()!r} is too large relative to the phase rates (more than 2^62 steps)"
        )
    with _single_threaded_blas():       # a threaded BLAS wakes threads for a 10 x 10 product
        power = np.clip(linalg.expm(sub_generator * step), 0.0, None)
    return kernel.propagate(np.ascontiguousarray(alpha, dtype=float),
                            np.ascontiguousarray(sub_generator, dtype=float),
                            np.ascontiguousarray(x, dtype=float), step, power)


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
                out[usable] = np.log((direction * weights).sum(axis=1)) + log_scale
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
