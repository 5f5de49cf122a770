"""Scores for count forecasts (a pmf of the census) against the census that happened.

For a forecast pmf P with cdf F and an observed count y (a whole number >= 0):

    CRPS (ranked probability score)  = sum_{k >= 0} (F(k) - 1{y <= k})^2     (lower is better)
    log score                        = -log P(y)                             (lower is better)
    randomised PIT                   u = F(y - 1) + v (F(y) - F(y - 1)),  v ~ Uniform(0, 1)

For a calibrated forecast u is Uniform(0, 1), so the share of outcomes with u in [0.1, 0.9]
should be near 0.80 and in [0.025, 0.975] near 0.95. The literal interval [q_0.1, q_0.9] of a
whole-bed count covers more than 80% even for a perfect forecast (the end points carry
probability mass), so :func:`interval_coverage` is reported but calibration is judged by the PIT.

A pmf argument is 1-D (one forecast) or 2-D (one forecast per row, rows padded with zeros to a
common length); it must sum to 1 within 1e-6.

References
----------
Czado C, Gneiting T, Held L (2009). Predictive model assessment for count data. Biometrics
65:1254-1261. (Named in METHODS.md: randomised PIT, ranked probability score for counts.)
Gneiting T, Raftery AE (2007). Strictly proper scoring rules, prediction, and estimation.
Journal of the American Statistical Association 102:359-378. (Identity
CRPS = E|X - y| - E|X - X'| / 2; cited from memory.)
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from app.stats.poisson_binomial import CUMULATIVE_SLACK, pmf_quantile

__all__ = [
    "MIN_BATCHES",
    "batch_means_se",
    "brier_score",
    "central_interval",
    "crps_pmf",
    "expected_pit_coverage",
    "interval_coverage",
    "log_score",
    "pit_band_shares",
    "pit_coverage",
    "randomised_pit",
]

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]

# Probability used for an outcome the forecast gave no mass (beyond its stored support): the
# stored pmfs drop or fold tails below 1e-12, so this is the mass such an outcome could have had.
# Without it one such day makes the average log score infinite. Common practice, no source.
DEFAULT_LOG_FLOOR = 1e-12
# Fewest batches whose means give a standard error (Schmeiser 1982 advises 10 to 30; four
# fortnights are the eight weeks of a short backtest). Common practice, no source for four.
MIN_BATCHES = 4


def _forecasts(pmf: npt.ArrayLike) -> tuple[FloatArray, bool]:
    values = np.asarray(pmf, dtype=float)
    if values.ndim not in (1, 2) or values.shape[-1] == 0:
        raise ValueError(f"pmf: must be 1-D or 2-D (forecasts x counts), got {values.shape}")
    if not np.all(np.isfinite(values)) or np.any(values < 0):
        raise ValueError("pmf: probabilities must be finite and >= 0")
    single = values.ndim == 1
    rows = values[None, :] if single else values
    totals = rows.sum(axis=1)
    if np.any(np.abs(totals - 1.0) > 1e-6):
        raise ValueError(f"pmf: each forecast must sum to 1, sums range {totals.min()!r}..")
    return rows, single


def _outcomes(y: npt.ArrayLike, n_forecasts: int, single: bool) -> IntArray:
    values = np.asarray(y)
    as_float = values.astype(float)
    if not np.all(np.isfinite(as_float)) or np.any(as_float < 0) or np.any(as_float % 1 != 0):
        raise ValueError(f"y: counts must be whole numbers >= 0, got {y!r}")
    counts = as_float.astype(np.int64)
    if single:
        if counts.ndim != 0:
            raise ValueError("y: one forecast (1-D pmf) needs one outcome")
        return counts.reshape(1)
    if counts.shape != (n_forecasts,):
        raise ValueError(f"y: needs one outcome per forecast ({n_forecasts}), got {counts.shape}")
    return counts


def _cdf_at(cumulative: FloatArray, k: IntArray) -> FloatArray:
    """F(k) row by row; F(-1) = 0 and F(k) = total mass beyond the stored support."""
    width = cumulative.shape[1]
    rows = np.arange(cumulative.shape[0])
    inside = np.clip(k, 0, width - 1)
    out = cumulative[rows, inside]
    out = np.where(k < 0, 0.0, out)
    return out


def _result(values: FloatArray, single: bool) -> float | FloatArray:
    return float(values[0]) if single else values


def crps_pmf(pmf: npt.ArrayLike, y: npt.ArrayLike) -> float | FloatArray:
    """Ranked probability score sum_k (F(k) - 1{y <= k})^2.

    Parameters
    ----------
    pmf : array_like, shape (K,) or (n, K)
    y : int or array_like of int, shape () or (n,)

    Returns
    -------
    float or numpy.ndarray of shape (n,)

    Notes
    -----
    The sum runs over k = 0..max(K - 1, y - 1): beyond both the support and y every term is 0.
    When y lies beyond the support, each k in K..y-1 adds (F(K-1) - 0)^2.
    """
    rows, single = _forecasts(pmf)
    counts = _outcomes(y, rows.shape[0], single)
    cumulative = np.cumsum(rows, axis=1)
    k = np.arange(rows.shape[1])
    indicator = (k[None, :] >= counts[:, None]).astype(float)
    inside = ((cumulative - indicator) ** 2).sum(axis=1)
    beyond = np.maximum(counts - rows.shape[1], 0) * cumulative[:, -1] ** 2
    return _result(inside + beyond, single)


def log_score(
    pmf: npt.ArrayLike, y: npt.ArrayLike, *, floor: float = DEFAULT_LOG_FLOOR
) -> float | FloatArray:
    """Log score -log P(y), with P(y) floored at ``floor`` (default 1e-12).

    Parameters
    ----------
    pmf : array_like, shape (K,) or (n, K)
    y : int or array_like of int
    floor : float
        Smallest probability used (see ``DEFAULT_LOG_FLOOR``); 0 gives inf for impossible y.

    Returns
    -------
    float or numpy.ndarray
    """
    if not floor >= 0:
        raise ValueError(f"floor: must be >= 0, got {floor!r}")
    rows, single = _forecasts(pmf)
    counts = _outcomes(y, rows.shape[0], single)
    inside = counts < rows.shape[1]
    prob = np.zeros(counts.size)
    prob[inside] = rows[np.flatnonzero(inside), counts[inside]]
    with np.errstate(divide="ignore"):
        scores = -np.log(np.maximum(prob, floor))
    return _result(scores, single)


def randomised_pit(
    pmf: npt.ArrayLike,
    y: npt.ArrayLike,
    v: npt.ArrayLike | None = None,
    *,
    rng: np.random.Generator | int | None = None,
) -> float | FloatArray:
    """Randomised probability integral transform u = F(y - 1) + v (F(y) - F(y - 1)).

    Parameters
    ----------
    pmf : array_like, shape (K,) or (n, K)
    y : int or array_like of int
    v : float or array_like, optional
        Uniform(0, 1) draws, one per forecast. Drawn from ``rng`` when omitted.
    rng : numpy.random.Generator, int or None
        Used only when ``v`` is omitted.

    Returns
    -------
    float or numpy.ndarray
        In [0, 1]; Uniform(0, 1) when y is drawn from the forecast (Czado et al. 2009).
    """
    rows, single = _forecasts(pmf)
    counts = _outcomes(y, rows.shape[0], single)
    if v is None:
        generator = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
        draws = generator.random(counts.size)
    else:
        draws = np.asarray(v, dtype=float).reshape(-1)
        if draws.size != counts.size:
            raise ValueError(f"v: needs one draw per forecast ({counts.size}), got {draws.size}")
        if np.any((draws < 0) | (draws > 1)):
            raise ValueError("v: draws must lie in [0, 1]")
    cumulative = np.cumsum(rows, axis=1)
    upper = _cdf_at(cumulative, counts)
    lower = _cdf_at(cumulative, counts - 1)
    return _result(np.clip(lower + draws * (upper - lower), 0.0, 1.0), single)


def _check_band(lower: float, upper: float) -> None:
    if not 0 <= lower <= upper <= 1:
        raise ValueError(f"lower, upper: need 0 <= lower <= upper <= 1, got {lower!r}, {upper!r}")


def pit_coverage(u: npt.ArrayLike, lower: float = 0.1, upper: float = 0.9) -> float:
    """Share of PIT values in [lower, upper]; upper - lower for a calibrated forecast."""
    values = np.asarray(u, dtype=float).reshape(-1)
    if values.size == 0:
        raise ValueError("u: needs at least one PIT value")
    _check_band(lower, upper)
    return float(np.mean((values >= lower) & (values <= upper)))


def pit_band_shares(pmf: npt.ArrayLike, y: npt.ArrayLike, lower: float = 0.1,
                    upper: float = 0.9) -> FloatArray:
    """Each forecast's chance that its randomised PIT falls in [lower, upper].

    Given the outcome, the randomised PIT is uniform on [F(y - 1), F(y)] (Czado et al. 2009),
    so the chance it falls in [lower, upper] is the overlap's share of that interval (1 or 0
    where the interval is a point). One value per row of ``pmf``.
    """
    _check_band(lower, upper)
    rows, single = _forecasts(pmf)
    counts = _outcomes(y, rows.shape[0], single)
    cumulative = np.cumsum(rows, axis=1)
    hi = np.clip(_cdf_at(cumulative, counts), 0.0, 1.0)
    lo = np.clip(_cdf_at(cumulative, counts - 1), 0.0, 1.0)
    width = hi - lo
    overlap = np.clip(np.minimum(hi, upper) - np.maximum(lo, lower), 0.0, None)
    point = (lo >= lower) & (lo <= upper)
    return np.asarray(np.where(width > 0, overlap / np.where(width > 0, width, 1.0), point),
                      dtype=float)


def expected_pit_coverage(pmf: npt.ArrayLike, y: npt.ArrayLike, lower: float = 0.1,
                          upper: float = 0.9) -> float:
    """Share of randomised PIT values in [lower, upper], averaged over the randomisation: the
    mean of :func:`pit_band_shares`. It is what :func:`pit_coverage` of
    :func:`randomised_pit` gives on average, without the noise of one set of draws: the same
    target (upper - lower for a calibrated forecast), estimated with less variance.
    """
    return float(np.mean(pit_band_shares(pmf, y, lower, upper)))


def batch_means_se(values: npt.ArrayLike, batch: int) -> float | None:
    """Standard error of the mean of a serially dependent series, by non-overlapping batch means.

    The series is cut into consecutive batches of ``batch`` values (a partial last batch is
    left out); the batch means of a long enough batch are nearly independent, so the
    standard error is their standard deviation over the square root of their number
    (Schmeiser 1982). Forecasts made on neighbouring mornings share most of their nights and
    miss together, so a share computed over them is far less certain than the binomial
    formula says. None with fewer than :data:`MIN_BATCHES` batches.

    References
    ----------
    Schmeiser B (1982). Batch size effects in the analysis of simulation output. Operations
    Research 30:556-568 (cited from memory).
    """
    if batch < 1:
        raise ValueError(f"batch: needs at least 1, got {batch!r}")
    x = np.asarray(values, dtype=float).reshape(-1)
    count = x.size // batch
    if count < MIN_BATCHES:
        return None
    means = x[: count * batch].reshape(count, batch).mean(axis=1)
    return float(np.std(means, ddof=1) / np.sqrt(count))


def central_interval(pmf: npt.ArrayLike, level: float = 0.8) -> tuple[int, int]:
    """Central interval [q_{(1-level)/2}, q_{(1+level)/2}] of a count pmf (end points included)."""
    if not 0 < level < 1:
        raise ValueError(f"level: must be in (0, 1), got {level!r}")
    low = pmf_quantile(pmf, (1.0 - level) / 2.0)
    high = pmf_quantile(pmf, (1.0 + level) / 2.0)
    return int(low), int(high)


def interval_coverage(pmfs: npt.ArrayLike, y: npt.ArrayLike, level: float = 0.8) -> float:
    """Share of outcomes inside their forecast's central interval (end points included).

    Parameters
    ----------
    pmfs : array_like, shape (n, K)
        One forecast per row.
    y : array_like of int, shape (n,)
    level : float, default 0.8

    Returns
    -------
    float
        Expect more than ``level`` even from a perfect forecast (discreteness; see the module
        docstring).
    """
    if not 0 < level < 1:
        raise ValueError(f"level: must be in (0, 1), got {level!r}")
    rows, single = _forecasts(pmfs)
    counts = _outcomes(y, rows.shape[0], single)
    cumulative = np.cumsum(rows, axis=1)
    last = rows.shape[1] - 1

    def quantile(q: float) -> IntArray:
        # Same rule as pmf_quantile, row by row: the number of k with F(k) < q - slack.
        below = (cumulative < q - CUMULATIVE_SLACK).sum(axis=1)
        return np.minimum(below, last)

    low, high = quantile((1.0 - level) / 2.0), quantile((1.0 + level) / 2.0)
    return float(np.mean((counts >= low) & (counts <= high)))


def brier_score(p: npt.ArrayLike, outcome: npt.ArrayLike) -> float:
    """Mean (p - outcome)^2 for binary outcomes, e.g. "still here at the next census".

    Parameters
    ----------
    p : array_like, shape (n,)
        Forecast probabilities in [0, 1].
    outcome : array_like of bool or 0/1, shape (n,)
    """
    probs = np.asarray(p, dtype=float).reshape(-1)
    events = np.asarray(outcome).reshape(-1)
    if probs.shape != events.shape or probs.size == 0:
        raise ValueError(
            f"p, outcome: need the same non-zero length, got {probs.size}, {events.size}"
        )
    if np.any((probs < 0) | (probs > 1)) or not np.all(np.isfinite(probs)):
        raise ValueError("p: probabilities must lie in [0, 1]")
    if not np.all(np.isin(events, (0, 1))):
        raise ValueError("outcome: must be booleans or 0/1")
    return float(np.mean((probs - events.astype(float)) ** 2))
