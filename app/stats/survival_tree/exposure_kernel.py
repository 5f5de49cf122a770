"""A discharge profile's exposure over many intervals, compiled (numba): the pieces of
:meth:`app.stats.survival_tree.profile.DischargeProfile.pieces` (cut at local midnights and
day-of-stay edges), walked interval by interval instead of laid out as arrays.

A forecast asks for the exposure of each current stay's intervals, of every stay at every
instant of the shared grid and of the cuts around each median: about 2,000 short intervals
per unit, for which building, sorting and masking the arrays of cuts cost more than the
arithmetic. The sums run piece by piece in the same order as the arrays'; the tests compare
the two on random intervals (tests/forecast/test_survival_tree.py).
"""

from __future__ import annotations

import math

import numba  # type: ignore[import-untyped]
import numpy as np

__all__ = ["exposure"]


@numba.njit(cache=True, nogil=True)
def _within_day(fraction, hour_share, hour_cumulative):  # type: ignore[no-untyped-def]
    f = min(max(fraction, 0.0), 1.0) * 24.0
    hour = min(int(math.floor(f)), 23)
    return hour_cumulative[hour] + hour_share[hour] * (f - hour)


@numba.njit(cache=True, nogil=True)
def exposure(start, stop, days_in, hour_share, hour_cumulative, weekday, stay_edges,  # type: ignore[no-untyped-def]
             stay_day, epoch_weekday):
    """Typical days of exposure in each [start, stop) (local days), ``days_in`` days after
    admission at ``start``: every piece between consecutive cuts (the start, local
    midnights, day-of-stay edges, the stop) at its clock-hour share of the day times its
    weekday and day-of-stay factors."""
    n, m = start.size, stay_edges.size
    out = np.zeros(n)
    for i in range(n):
        a, b, d0 = start[i], stop[i], days_in[i]
        midnight = math.floor(a) + 1.0
        j = np.searchsorted(stay_edges, d0, side="right")
        edge = a + (stay_edges[j] - d0) if j < m else np.inf
        while edge <= a:
            j += 1
            edge = a + (stay_edges[j] - d0) if j < m else np.inf
        lo = a
        total = 0.0
        while lo < b:
            hi = min(b, midnight, edge)
            if hi > lo:
                day = math.floor(lo)
                share = (_within_day(hi - day, hour_share, hour_cumulative)
                         - _within_day(lo - day, hour_share, hour_cumulative))
                w = (np.int64(day) + epoch_weekday) % 7
                k = np.searchsorted(stay_edges, d0 + (0.5 * (lo + hi) - a), side="left")
                total += share * weekday[w] * stay_day[k]
            lo = hi
            while midnight <= lo:
                midnight += 1.0
            while edge <= lo:
                j += 1
                edge = a + (stay_edges[j] - d0) if j < m else np.inf
        out[i] = total
    return out
