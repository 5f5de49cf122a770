"""``alpha exp(T x_i)`` at many points, compiled (numba): the method of
:mod:`app.stats.phasetype` (binary powers of ``exp(T h)``, renormalised, the scale kept as a
logarithm; a 20-term Taylor series for the remainder), point by point.

Written with NumPy it spent most of its time on the overhead of small matrix products (about
0.25 ms per call whatever the number of points; a unit's forecast asks it some seven times
for its newcomers and the patients passed on); here a call costs a few microseconds per
point. The sums run in another order than BLAS's did (log survival moved by at most 1e-13 at
400 days, 3e-16 relative); tests/stats/test_phasetype.py checks survival and density against
one ``scipy.linalg.expm`` per point.
"""

from __future__ import annotations

import math

import numba  # type: ignore[import-untyped]
import numpy as np

__all__ = ["propagate"]

TAYLOR_TERMS = 20


@numba.njit(cache=True, nogil=True)
def propagate(alpha, sub_generator, x, step, power):  # type: ignore[no-untyped-def]
    """``(direction, log_scale)`` with ``alpha exp(T x_i) = direction_i exp(log_scale_i)``;
    ``power`` is ``exp(T step)`` clipped at zero, ``x`` finite and >= 0. Rows of
    ``direction`` sum to 1 before the remainder's series (or are all zero where the state
    underflowed)."""
    n, p = x.size, alpha.size
    direction = np.empty((n, p))
    log_scale = np.zeros(n)
    remaining = np.empty(n, np.int64)
    delta = np.empty(n)
    for i in range(n):
        k = math.floor(x[i] / step)
        remaining[i] = np.int64(k)
        delta[i] = min(max(x[i] - k * step, 0.0), step)
        for a in range(p):
            direction[i, a] = alpha[a]
    power = power.copy()
    power_log = 0.0
    row = np.empty(p)
    while True:
        left = False
        for i in range(n):
            if remaining[i] & 1:
                total = 0.0
                for b in range(p):
                    value = 0.0
                    for a in range(p):
                        value += direction[i, a] * power[a, b]
                    row[b] = value
                    total += value
                for b in range(p):
                    direction[i, b] = row[b] / total if total > 0 else row[b]
                log_scale[i] += power_log + (math.log(total) if total > 0 else -np.inf)
            remaining[i] >>= 1
            if remaining[i]:
                left = True
        if not left:
            break
        power = _square(power)
        power_log *= 2.0
        biggest = power.max()
        power /= biggest
        power_log += math.log(biggest)
    result = np.empty((n, p))
    term = np.empty(p)
    nxt = np.empty(p)
    for i in range(n):
        for a in range(p):
            term[a] = direction[i, a]
            result[i, a] = direction[i, a]
        for j in range(1, TAYLOR_TERMS + 1):
            scale = delta[i] / j
            for b in range(p):
                value = 0.0
                for a in range(p):
                    value += term[a] * sub_generator[a, b]
                nxt[b] = value * scale
            for a in range(p):
                term[a] = nxt[a]
                result[i, a] += nxt[a]
        for a in range(p):
            result[i, a] = max(result[i, a], 0.0)
    return result, log_scale


@numba.njit(cache=True, nogil=True)
def _square(m):  # type: ignore[no-untyped-def]
    p = m.shape[0]
    out = np.zeros((p, p))
    for a in range(p):
        for c in range(p):
            value = m[a, c]
            for b in range(p):
                out[a, b] += value * m[c, b]
    return out
