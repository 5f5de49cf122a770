"""Occupancy pmfs: Poisson-binomial counts of current stays, Poisson and negative binomial counts
of arrivals, their sums, and summaries of a pmf.

A pmf here is a 1-D float array ``pmf[k] = P(X = k)`` for k = 0..K-1 that sums to 1.

Poisson-binomial: X = sum_i B_i with independent B_i ~ Bernoulli(p_i) (stay i still present at
the census instant). The exact pmf comes from the recursion, one stay at a time,

    pmf_new[k] = pmf[k] (1 - p_i) + pmf[k - 1] p_i,

O(n^2) for n stays. Every term is a product and sum of non-negative numbers, so there is no
cancellation and the result is non-negative and sums to 1 up to rounding; the DFT of the
characteristic function (Hong 2013) is O(n log n) but can return tiny negative values, and n is at
most a few hundred beds here.

References
----------
Hong Y (2013). On computing the distribution function for the Poisson binomial distribution.
Computational Statistics & Data Analysis 59:41-51. (Named in METHODS.md.)
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
import numpy.typing as npt
from scipy import special, stats

__all__ = [
    "convolve_pmfs",
    "negative_binomial_pmf",
    "pmf_mean",
    "pmf_quantile",
    "pmf_sf_over",
    "poisson_binomial_pmf",
    "poisson_pmf",
]

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]

# Truncation of unbounded count pmfs: the mass beyond the last entry is below this.
DEFAULT_TAIL = 1e-12
# Round-off allowance when a cumulative probability is compared with a level q: a cumsum that
# should reach exactly q can fall short by a few ulps.
CUMULATIVE_SLACK = 1e-12


def poisson_binomial_pmf(p: npt.ArrayLike) -> FloatArray:
    """Exact pmf of the number of successes among independent Bernoulli trials.

    Parameters
    ----------
    p : array_like, shape (n,) or (n, d)
        Success probabilities in [0, 1]: one per stay, or one per stay (rows) and day (columns),
        e.g. ``p_present`` of each current stay at each of d census instants.

    Returns
    -------
    numpy.ndarray
        Shape (n + 1,) for 1-D input; shape (d, n + 1), one pmf per day, for 2-D input.

    Notes
    -----
    Recursion pmf <- pmf (1 - p_i) + shift(pmf) p_i over the stays; with 2-D input the days are
    updated together, so the cost is n Python steps whatever d is.
    """
    probs = np.asarray(p, dtype=float)
    if probs.ndim not in (1, 2):
        raise ValueError(f"p: must be 1-D (stays) or 2-D (stays x days), got shape {probs.shape}")
    if not np.all(np.isfinite(probs)) or np.any((probs < 0) | (probs > 1)):
        raise ValueError("p: probabilities must be finite and in [0, 1]")
    by_day = probs if probs.ndim == 2 else probs[:, None]
    n, n_days = by_day.shape
    pmf = np.zeros((n_days, n + 1))
    pmf[:, 0] = 1.0
    for j in range(n):
        present = by_day[j][:, None]
        pmf[:, 1 : j + 2] = pmf[:, 1 : j + 2] * (1.0 - present) + pmf[:, : j + 1] * present
        pmf[:, 0] *= 1.0 - by_day[j]
    return pmf if probs.ndim == 2 else pmf[0]


def _as_pmf(pmf: npt.ArrayLike, name: str = "pmf") -> FloatArray:
    values = np.asarray(pmf, dtype=float)
    if values.ndim != 1 or values.size == 0:
        raise ValueError(f"{name}: must be a non-empty 1-D array, got shape {values.shape}")
    # Two reductions (a forecast checks about a hundred pmfs per unit): the least value is
    # NaN or negative, or the sum infinite, exactly when a value is not finite and >= 0.
    total = float(values.sum())
    if not values.min() >= 0 or not math.isfinite(total):
        raise ValueError(f"{name}: probabilities must be finite and >= 0")
    if abs(total - 1.0) > 1e-6:
        raise ValueError(f"{name}: must sum to 1, sums to {total!r}")
    return values


def convolve_pmfs(*pmfs: npt.ArrayLike) -> FloatArray:
    """pmf of the sum of independent counts, by direct convolution.

    Parameters
    ----------
    *pmfs : array_like
        One or more 1-D pmfs.

    Returns
    -------
    numpy.ndarray
        Length sum(len) - (number of pmfs - 1).

    Notes
    -----
    Direct (not FFT) convolution: non-negative inputs give non-negative outputs, with no
    round-off ripple in the far tail.
    """
    if not pmfs:
        raise ValueError("pmfs: needs at least one pmf")
    result = _as_pmf(pmfs[0], "pmfs[0]")
    for i, other in enumerate(pmfs[1:], start=1):
        result = np.convolve(result, _as_pmf(other, f"pmfs[{i}]"))
    return result


def _truncated(dist: stats.rv_discrete, kmax: int | None, tail: float) -> FloatArray:
    if kmax is None:
        if not 0 < tail < 1:
            raise ValueError(f"tail: must be in (0, 1), got {tail!r}")
        kmax = int(dist.isf(tail))
        while dist.sf(kmax) >= tail:
            kmax += 1
        while kmax > 0 and dist.sf(kmax - 1) < tail:
            kmax -= 1
    elif kmax < 0:
        raise ValueError(f"kmax: must be >= 0, got {kmax!r}")
    pmf = dist.pmf(np.arange(kmax + 1))
    pmf[-1] += dist.sf(kmax)
    return np.asarray(pmf, dtype=float)


def poisson_pmf(mean: float, kmax: int | None = None, *, tail: float = DEFAULT_TAIL) -> FloatArray:
    """Poisson pmf on 0..kmax, the tail mass folded into the last entry.

    Parameters
    ----------
    mean : float
        Poisson mean (>= 0).
    kmax : int, optional
        Last count kept. Default: the smallest k with P(X > k) < ``tail``.
    tail : float, default 1e-12
        Tail mass allowed beyond kmax when kmax is chosen here.

    Returns
    -------
    numpy.ndarray
        Shape (kmax + 1,). Entries 0..kmax-1 are P(X = k); the last is P(X >= kmax), so the
        vector sums to 1 up to rounding and the cdf is exact at every k < kmax.
    """
    if not (math.isfinite(mean) and mean >= 0):
        raise ValueError(f"mean: must be finite and >= 0, got {mean!r}")
    if mean == 0:
        return np.ones(1) if not kmax else np.r_[1.0, np.zeros(kmax)]
    if kmax is None:
        # scipy.stats.poisson.sf is special.pdtrc; called directly it costs a tenth.
        found = _direct(mean, math.sqrt(mean), tail, lambda k: special.pdtrc(k, mean),
                        lambda k: k * math.log(mean) - mean - special.gammaln(k + 1))
        if found is not None:
            return found
    return _truncated(stats.poisson(mean), kmax, tail)


def _direct(mean: float, sd: float, tail: float, sf: Callable[[IntArray], FloatArray],
            logpmf: Callable[[IntArray], FloatArray]) -> FloatArray | None:
    """pmf on 0..kmax with kmax the smallest k where P(X > k) < ``tail``, evaluated directly:
    building a frozen scipy distribution costs milliseconds, and a forecast needs dozens of
    these pmfs. None when the tail reaches past mean + 12 sd + 40 (then scipy searches)."""
    if not 0 < tail < 1:
        raise ValueError(f"tail: must be in (0, 1), got {tail!r}")
    k = np.arange(int(mean + 12 * sd + 40))
    upper = np.asarray(sf(k), dtype=float)
    below = upper < tail
    if not below.any():
        return None
    kmax = int(np.argmax(below))
    pmf = np.exp(logpmf(k[: kmax + 1]))
    pmf[-1] += upper[kmax]
    return pmf


def negative_binomial_pmf(
    mean: float, size: float, kmax: int | None = None, *, tail: float = DEFAULT_TAIL
) -> FloatArray:
    """Negative binomial pmf with mean ``mean`` and variance mean + mean^2 / size.

    Parameters
    ----------
    mean : float
        Mean count (>= 0).
    size : float
        Dispersion ("size", scipy's ``n``; > 0). As size grows the pmf tends to the Poisson.
    kmax : int, optional
        Last count kept. Default: the smallest k with P(X > k) < ``tail``.
    tail : float, default 1e-12
        Tail mass allowed beyond kmax when kmax is chosen here.

    Returns
    -------
    numpy.ndarray
        Shape (kmax + 1,), the last entry P(X >= kmax) (see :func:`poisson_pmf`).
    """
    if not (math.isfinite(mean) and mean >= 0):
        raise ValueError(f"mean: must be finite and >= 0, got {mean!r}")
    if not (math.isfinite(size) and size > 0):
        raise ValueError(f"size: must be finite and > 0, got {size!r}")
    if mean == 0:
        return np.ones(1) if not kmax else np.r_[1.0, np.zeros(kmax)]
    p = size / (size + mean)
    if kmax is None:
        found = _direct(mean, math.sqrt(mean + mean * mean / size), tail,
                        # P(X > k) = I_{1-p}(k + 1, size), the regularized incomplete
                        # beta function (scipy.stats.nbinom.sf's value, without its cost).
                        lambda k: special.betainc(k + 1, size, 1.0 - p),
                        lambda k: (special.gammaln(k + size) - special.gammaln(size)
                                   - special.gammaln(k + 1) + size * math.log(p)
                                   + k * math.log1p(-p)))
        if found is not None:
            return found
    return _truncated(stats.nbinom(size, p), kmax, tail)


def pmf_mean(pmf: npt.ArrayLike) -> float:
    """Mean sum_k k pmf[k]."""
    values = _as_pmf(pmf)
    return float(np.arange(values.size) @ values)


def pmf_quantile(pmf: npt.ArrayLike, q: npt.ArrayLike) -> int | IntArray:
    """Smallest k whose cumulative probability reaches q.

    Parameters
    ----------
    pmf : array_like, shape (K,)
    q : float or array_like
        Levels in [0, 1].

    Returns
    -------
    int or numpy.ndarray of int
        min{k : F(k) >= q - 1e-12}; the allowance absorbs round-off in the cumulative sum
        (otherwise q = 1 could land past the support).
    """
    values = _as_pmf(pmf)
    levels = np.asarray(q, dtype=float)
    if not np.all((levels >= 0) & (levels <= 1)):
        raise ValueError(f"q: levels must lie in [0, 1], got {q!r}")
    cumulative = np.cumsum(values)
    k = np.searchsorted(cumulative, levels - CUMULATIVE_SLACK, side="left")
    k = np.minimum(k, values.size - 1).astype(np.int64)
    return int(k) if k.ndim == 0 else k


def pmf_sf_over(pmf: npt.ArrayLike, beds: npt.ArrayLike) -> float | FloatArray:
    """P(X > beds): the chance the census exceeds the number of beds.

    Parameters
    ----------
    pmf : array_like, shape (K,)
    beds : int or array_like of int

    Returns
    -------
    float or numpy.ndarray
        sum_{k > beds} pmf[k], summed from the far tail inwards so small tails keep their
        relative accuracy (1 - cdf would lose them).
    """
    values = _as_pmf(pmf)
    b = np.asarray(beds)
    if not np.issubdtype(b.dtype, np.integer):
        if not np.all(np.isfinite(b)) or np.any(np.asarray(b, dtype=float) % 1 != 0):
            raise ValueError(f"beds: must be whole numbers, got {beds!r}")
        b = b.astype(np.int64)
    upper_tail = np.r_[np.cumsum(values[::-1])[::-1], 0.0]  # upper_tail[k] = P(X >= k)
    index = np.clip(b + 1, 0, values.size)
    out = upper_tail[index]
    return float(out) if out.ndim == 0 else out
