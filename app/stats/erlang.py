"""Erlang loss formula for a unit of c beds.

Arrivals are Poisson with rate lambda, stays have mean W, and an arrival that finds every bed
taken is turned away (lost). With offered load A = lambda W (in Erlangs), the share of arrivals
turned away is the Erlang B blocking probability

    B(c, A) = (A^c / c!) / sum_{k=0..c} A^k / k!,

computed by the recursion B(0) = 1, B(k) = A B(k-1) / (k + A B(k-1)), which stays within
[0, 1] at every step (the direct formula overflows for c in the hundreds). B depends on the stay
distribution only through its mean (the M/G/c/c insensitivity), so it is a test oracle for
simulations whatever the stay shape. The number of busy beds is then a Poisson(A) count
truncated to 0..c: the carried load is A (1 - B) and the mean bed occupancy A (1 - B) / c.

References
----------
METHODS.md section 4 (recursion and published Erlang B table values used in the tests).
Bagust A, Place M, Posnett JW (1999). BMJ 319:155. (As named in METHODS.md: bed shortages
become regular as mean occupancy passes about 85-90%; ``mean_occupancy`` gives that axis.)
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["beds_for_blocking", "erlang_b", "mean_occupancy"]


def _check_load(offered_load: float) -> float:
    load = float(offered_load)
    if not (math.isfinite(load) and load >= 0):
        raise ValueError(f"offered_load: must be finite and >= 0, got {offered_load!r}")
    return load


def _check_servers(servers: int) -> int:
    if isinstance(servers, bool) or not isinstance(servers, int | np.integer) or servers < 0:
        raise ValueError(f"servers: must be a whole number >= 0, got {servers!r}")
    return int(servers)


def erlang_b(servers: int, offered_load: float) -> float:
    """Erlang B blocking probability: the share of arrivals that find all beds taken.

    Parameters
    ----------
    servers : int
        Number of beds c (>= 0).
    offered_load : float
        A = arrival rate x mean stay, in Erlangs (>= 0).

    Returns
    -------
    float
        B(c, A) in [0, 1]; B(0, A) = 1 and B(c, 0) = 0 for c >= 1.
    """
    c = _check_servers(servers)
    load = _check_load(offered_load)
    blocking = 1.0
    for k in range(1, c + 1):
        blocking = load * blocking / (k + load * blocking)
    return blocking


def mean_occupancy(servers: int, offered_load: float) -> float:
    """Mean share of the c beds in use, A (1 - B(c, A)) / c.

    Parameters
    ----------
    servers : int
        Number of beds c (>= 1).
    offered_load : float
        A in Erlangs.

    Returns
    -------
    float
        Mean occupancy in [0, 1].
    """
    c = _check_servers(servers)
    if c < 1:
        raise ValueError(f"servers: must be >= 1 for an occupancy, got {servers!r}")
    load = _check_load(offered_load)
    return load * (1.0 - erlang_b(c, load)) / c


def beds_for_blocking(offered_load: float, target: float, *, max_servers: int = 100_000) -> int:
    """Smallest number of beds c with B(c, A) <= target.

    Parameters
    ----------
    offered_load : float
        A in Erlangs.
    target : float
        Largest acceptable share of arrivals turned away, in (0, 1].
    max_servers : int, default 100000
        Search limit; exceeding it raises ValueError.

    Returns
    -------
    int
        The number of beds. B(c, A) decreases in c, so the search walks the recursion upwards.
    """
    load = _check_load(offered_load)
    if not (math.isfinite(target) and 0 < target <= 1):
        raise ValueError(f"target: must be in (0, 1], got {target!r}")
    blocking = 1.0
    c = 0
    while blocking > target:
        c += 1
        if c > max_servers:
            raise ValueError(
                f"target: {target!r} needs more than max_servers={max_servers} beds at "
                f"offered_load={offered_load!r}"
            )
        blocking = load * blocking / (c + load * blocking)
    return c
