"""Erlang loss formula against published Erlang B table values and direct formulas."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize, special, stats

from app.stats.erlang import beds_for_blocking, erlang_b, mean_occupancy


def _direct(servers: int, load: float) -> float:
    """(A^c / c!) / sum_k A^k / k! with scipy.special.factorial (fine for small c)."""
    k = np.arange(servers + 1)
    terms = load**k / special.factorial(k, exact=False)
    return float(terms[-1] / terms.sum())


def test_fifteen_servers_carry_8_108_erlangs_at_one_percent() -> None:
    # Published Erlang B tables, as quoted in METHODS.md section 4: 15 servers, 1% blocking,
    # 8.108 Erlangs. The table rounds the load to 3 decimals, so the exact load giving B = 0.01
    # must lie within 0.0005 of it.
    load = optimize.brentq(lambda a: erlang_b(15, a) - 0.01, 1.0, 15.0, xtol=1e-12)
    assert abs(load - 8.108) <= 0.0005


def test_seven_servers_at_2_5_erlangs_block_just_under_one_percent() -> None:
    # Published Erlang B tables, as quoted in METHODS.md section 4.
    blocking = erlang_b(7, 2.5)
    assert 0.009 < blocking < 0.01


def test_ten_servers_at_ten_erlangs_block_0_2146() -> None:
    # Published Erlang B tables, as quoted in METHODS.md section 4 (4 decimals).
    assert abs(erlang_b(10, 10.0) - 0.2146) < 0.00005


@pytest.mark.parametrize("servers", [0, 1, 2, 5, 12, 30])
@pytest.mark.parametrize("load", [0.01, 0.8, 3.0, 9.5, 40.0])
def test_recursion_matches_direct_formula(servers: int, load: float) -> None:
    assert erlang_b(servers, load) == pytest.approx(_direct(servers, load), rel=1e-12)


def test_large_units_match_truncated_poisson() -> None:
    # B(c, A) = P(N = c) / P(N <= c) for N ~ Poisson(A) (scipy.stats), where the direct formula
    # would overflow (180^200 / 200!).
    for servers, load in ((200, 180.0), (500, 520.0), (1000, 900.0)):
        ref = stats.poisson(load)
        expected = ref.pmf(servers) / ref.cdf(servers)
        assert erlang_b(servers, load) == pytest.approx(expected, rel=1e-10)


def test_beds_for_blocking_at_the_table_value() -> None:
    # From the same table entry: 15 beds take up to 8.108 Erlangs at 1%, so 8.1 needs 15 and
    # 8.2 needs 16.
    assert beds_for_blocking(8.1, 0.01) == 15
    assert beds_for_blocking(8.2, 0.01) == 16


def test_beds_for_blocking_is_the_smallest_sufficient_unit() -> None:
    rng = np.random.default_rng(0)
    for load, target in zip(rng.uniform(0.5, 60.0, 40), rng.uniform(0.001, 0.3, 40), strict=True):
        beds = beds_for_blocking(load, target)
        assert _direct(beds, load) <= target
        assert beds == 0 or _direct(beds - 1, load) > target
    assert beds_for_blocking(5.0, 1.0) == 0


def test_mean_occupancy_matches_truncated_poisson_mean() -> None:
    # Busy beds in M/G/c/c are Poisson(A) truncated to 0..c (scipy.stats for the reference).
    for servers, load in ((10, 10.0), (25, 20.0), (4, 0.5)):
        k = np.arange(servers + 1)
        weights = stats.poisson(load).pmf(k)
        expected = float(k @ weights / weights.sum()) / servers
        assert mean_occupancy(servers, load) == pytest.approx(expected, rel=1e-12)


def test_edge_values_and_bad_input() -> None:
    assert erlang_b(0, 3.0) == 1.0
    assert erlang_b(4, 0.0) == 0.0
    assert math.isclose(erlang_b(1, 1.0), 0.5)  # A / (1 + A)
    with pytest.raises(ValueError, match="servers"):
        erlang_b(-1, 2.0)
    with pytest.raises(ValueError, match="servers"):
        erlang_b(2.5, 2.0)  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="offered_load"):
        erlang_b(3, -1.0)
    with pytest.raises(ValueError, match="target"):
        beds_for_blocking(3.0, 0.0)
