"""The loss paths' inner loops, compiled (numba): the same arithmetic as the NumPy steps they
replace in app/stats/loss.py, element by element, so a path's numbers do not change.

A unit's week of 1,000 paths has about 45,000 arrivals and 170 grid instants. Written as
whole-array NumPy steps, each arrival's leaving instant, its place in the time order and the
following of the paths that reach the ceiling cost a dozen passes over arrays of that size and
a Python loop over the grid; here each is one pass (tests/benchmarks/test_bench_hospital.py).
Nothing random is drawn here: the uniforms, Poisson and gamma draws stay with NumPy's
generator in the caller, in the same order as before.

Compiled functions are cached on disk beside this file (``cache=True``), so only the first
process on a machine pays the compilation (about a second).
"""

from __future__ import annotations

import numba  # type: ignore[import-untyped]
import numpy as np

__all__ = ["arrival_slots", "follow_paths", "leave_index", "path_order"]


@numba.njit(cache=True, nogil=True)
def _first_at_or_above(values, lo, hi, query):  # type: ignore[no-untyped-def]
    """``lo + np.searchsorted(values[lo:hi], query, side="left")``."""
    while lo < hi:
        mid = (lo + hi) >> 1
        if values[mid] < query:
            lo = mid + 1
        else:
            hi = mid
    return lo


@numba.njit(cache=True, nogil=True)
def _bucket_table(values, buckets):  # type: ignore[no-untyped-def]
    """For ``buckets`` equal-width buckets over the range of the non-decreasing ``values``:
    the first index at or above each bucket's lower edge (a place to start a search from),
    the range's low end and the buckets' inverse width."""
    low, high = values[0], values[values.size - 1]
    inverse = buckets / (high - low) if high > low else 0.0
    table = np.empty(buckets + 1, np.int64)
    j = 0
    for b in range(buckets + 1):
        edge = low + b / inverse if inverse > 0 else low
        while j < values.size and values[j] < edge:
            j += 1
        table[b] = j
    return table, low, inverse


@numba.njit(cache=True, nogil=True)
def _search(values, table, low, inverse, query, right=False):  # type: ignore[no-untyped-def]
    """``np.searchsorted(values, query, side="right" if right else "left")`` for
    non-decreasing ``values``: from the query's bucket (:func:`_bucket_table`) step on past
    values before the query's place and back over values after it, so the answer is exact
    whatever rounding put at the edge."""
    b = (query - low) * inverse
    top = table.size - 1
    j = table[0] if not b > 0 else (table[top] if b >= top else table[int(b)])
    n = values.size
    while j < n and (values[j] <= query if right else values[j] < query):
        j += 1
    while j > 0 and (values[j - 1] > query if right else values[j - 1] >= query):
        j -= 1
    return j


@numba.njit(cache=True, nogil=True)
def leave_index(knots, s, tau, start, u):  # type: ignore[no-untyped-def]
    """First grid index at which a stay begun at grid instant ``start[i]`` with survival draw
    ``u[i]`` is over (``tau.size``: still in at the end); ``(knots, s)``: the stay's survival
    on an hourly lattice, non-increasing (app.stats.loss._leave_index explains the method).
    Both searches start from a bucket table (eight buckets per value): a binary search of
    60,000 draws, mostly mispredicted branches, took four times as long."""
    n, m, size = start.size, s.size, tau.size
    out = np.empty(n, np.int64)
    minus_s = -s
    s_table, s_low, s_inverse = _bucket_table(minus_s, 8 * m)
    t_table, t_low, t_inverse = _bucket_table(tau, 8 * size)
    for i in range(n):
        ui = u[i]
        j = _search(minus_s, s_table, s_low, s_inverse, -ui)     # first knot with S <= u
        if j == 0:
            length = 0.0
        elif j >= m:
            length = np.inf
        else:
            s_lo, s_hi = s[j - 1], s[j]
            frac = (s_lo - ui) / (s_lo - s_hi) if s_lo > s_hi else 1.0
            frac = min(max(frac, 0.0), 1.0)
            length = knots[j - 1] + frac * (knots[j] - knots[j - 1])
        gone = _search(tau, t_table, t_low, t_inverse, tau[start[i]] + length)
        out[i] = min(max(gone, start[i] + 1), size)
    return out


@numba.njit(cache=True, nogil=True)
def arrival_slots(counts, uniform, before, day_mean, cumulative, first, last):  # type: ignore[no-untyped-def]
    """Each arrival's slot and path: ``counts[path, day]`` arrivals, taken path by path and
    day by day, the k-th placed by ``uniform[k]`` in the slot whose cumulative mean first
    exceeds ``before[day] + uniform[k] * day_mean[day]``, kept within the day's slots
    ``first[day]..last[day]``."""
    total = 0
    for q in range(counts.shape[0]):
        for d in range(counts.shape[1]):
            total += counts[q, d]
    slot = np.empty(total, np.int64)
    path = np.empty(total, np.int64)
    table, low, inverse = _bucket_table(cumulative, 8 * cumulative.size)
    k = 0
    for q in range(counts.shape[0]):
        for d in range(counts.shape[1]):
            for _ in range(counts[q, d]):
                draw = before[d] + uniform[k] * day_mean[d]
                found = _search(cumulative, table, low, inverse, draw, True)
                slot[k] = min(max(found, first[d]), last[d])
                path[k] = q
                k += 1
    return slot, path


@numba.njit(cache=True, nogil=True)
def path_order(path, at, n_paths, size):  # type: ignore[no-untyped-def]
    """The stable order of arrivals by (path, grid index) (a counting sort), each arrival's
    rank among its path's arrivals at the same grid index, and where each path's arrivals
    start in that order (``n_paths + 1`` offsets)."""
    cells = n_paths * size
    start = np.zeros(cells + 1, np.int64)
    for a in range(at.size):
        start[path[a] * size + at[a] + 1] += 1
    for c in range(cells):
        start[c + 1] += start[c]
    order = np.empty(at.size, np.int64)
    rank = np.empty(at.size, np.int64)
    fill = start[:cells].copy()
    for a in range(at.size):
        key = path[a] * size + at[a]
        order[fill[key]] = a
        rank[fill[key]] = fill[key] - start[key]
        fill[key] += 1
    starts = np.empty(n_paths + 1, np.int64)
    for q in range(n_paths + 1):
        starts[q] = start[q * size]
    return order, rank, starts


@numba.njit(cache=True, nogil=True)
def follow_paths(p, uniform, booking_starts, booking_in, booking_out, starts, at, leave,  # type: ignore[no-untyped-def]
                 stream, rank, ceiling, census_index, n_streams):
    """Every path, one after another, with arrivals turned away at ``ceiling`` (one per grid
    instant).

    ``p`` (stays, grid): the current stays' chance of being in, non-increasing along a row;
    stay i is in on path q while ``2i - p[i, g] < 2i - uniform[i, q]`` (as the NumPy search
    over all rows laid end to end compared). Bookings and arrivals are grouped by path
    (app.stats.loss.LossDraws). Returns the count with nobody turned away at each census
    instant (K, paths) and the arrivals turned away still in then, by stream
    (K, paths, streams)."""
    n_stays, size = p.shape
    n = starts.size - 1
    k_count = census_index.size
    free = np.empty((k_count, n), np.int64)
    lost = np.zeros((k_count, n, n_streams), np.int64)
    fixed_change = np.empty(size + 1, np.int64)   # current stays and bookings
    free_change = np.empty(size + 1, np.int64)    # arrivals, nobody turned away
    moves = np.empty(size + 1, np.int64)          # arrivals admitted, on a followed path
    fixed = np.empty(size, np.int64)
    free_in = np.empty(size, np.int64)
    gone = np.empty((n_stays, n), np.int64)     # the first grid index a stay is out
    row = np.empty(size)
    for i in range(n_stays):
        two_i = 2.0 * i
        for g in range(size):
            row[g] = two_i - p[i, g]
        table, low, inverse = _bucket_table(row, 8 * size)
        for q in range(n):
            gone[i, q] = _search(row, table, low, inverse, two_i - uniform[i, q])
    for q in range(n):
        fixed_change[:] = 0
        free_change[:] = 0
        for i in range(n_stays):
            fixed_change[gone[i, q]] -= 1
        for b in range(booking_starts[q], booking_starts[q + 1]):
            fixed_change[booking_in[b]] += 1
            fixed_change[booking_out[b]] -= 1
        for a in range(starts[q], starts[q + 1]):
            free_change[at[a] + 1] += 1
            free_change[leave[a]] -= 1
        running_fixed, running_free = n_stays, 0
        for g in range(size):
            running_fixed += fixed_change[g]
            running_free += free_change[g]
            fixed[g] = running_fixed
            free_in[g] = running_free
        for k in range(k_count):
            free[k, q] = fixed[census_index[k]] + free_in[census_index[k]]
        # Followed only if some arrival would find the unit full even with everyone admitted.
        touching = False
        for a in range(starts[q], starts[q + 1]):
            if fixed[at[a]] + free_in[at[a]] + rank[a] >= ceiling[at[a]]:
                touching = True
                break
        if not touching:
            continue
        moves[:] = 0
        inside, applied = 0, -1
        for a in range(starts[q], starts[q + 1]):
            g = at[a]
            while applied < g:
                applied += 1
                inside += moves[applied]
            if rank[a] < ceiling[g] - fixed[g] - inside:
                moves[g + 1] += 1
                moves[leave[a]] -= 1
            else:
                for k in range(k_count):
                    c = census_index[k]
                    if g < c and leave[a] > c:
                        lost[k, q, stream[a]] += 1
    return free, lost
