"""The network simulation (app.stats.planning.network) against queueing theory.

Outside checks: Jackson's traffic equations for an open network with no bed limits, Little's
law per unit, the product-form (independent Poisson) distribution of a two-unit tandem, the
Erlang loss formula and the existing one-unit loss simulation.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from app.stats.erlang import erlang_b
from app.stats.phasetype import Coxian
from app.stats.planning import DemandStream, PatientGroup, PlanningInput, simulate
from app.stats.planning.network import (
    NetworkInput,
    NetworkUnit,
    Transfer,
    simulate_network,
    traffic_equations,
    unit_seed,
)


def _exponential(mean: float) -> Coxian:
    return Coxian(lam=(), mu=(1.0 / mean,))


def _unit(name: str, stay: Coxian, per_day: float, beds: int | None = None,
          escalation: int = 0) -> NetworkUnit:
    streams = ((DemandStream("emergency", "emergency", (per_day,) * 7, (("g", 1.0),)),)
               if per_day > 0 else ())
    return NetworkUnit(name, (PatientGroup("g", stay),), streams, beds=beds,
                       escalation=escalation)


def _to(source: str, target: str, share: float) -> Transfer:
    return Transfer(source, target, share, (("g", 1.0),))


# -- Jackson (1957): traffic equations, no bed limits ------------------------------------------

def _jackson_network(seed: int = 11) -> NetworkInput:
    # Three units with feedback (C -> A, B -> A) and stays of different shapes: a two-phase
    # Coxian, an exponential and an Erlang-2. With no bed limits each unit is an infinite-
    # server station and the mean number present is lambda_i x mean stay_i whatever the
    # shape (Jackson 1957 for exponential stays; the mean holds for any stay by Little).
    units = (
        _unit("A", Coxian(lam=(0.5,), mu=(0.8, 0.4)), 2.0),
        _unit("B", _exponential(5.0), 1.0),
        _unit("C", Coxian(lam=(1.0,), mu=(0.0, 1.0)), 0.5),
    )
    transfers = (_to("A", "B", 0.5), _to("A", "C", 0.2), _to("B", "C", 0.4),
                 _to("B", "A", 0.1), _to("C", "A", 0.1))
    return NetworkInput(units, transfers, days=730, warmup_days=70, replications=20, seed=seed)


def test_jackson_traffic_equations_give_the_mean_occupancies() -> None:
    # Jackson JR (1957), Networks of waiting lines, Operations Research 5:518-521 (from
    # memory): lambda = gamma + R^T lambda, solved here directly with numpy.linalg.solve
    # (not through the module's own traffic_equations, which is checked against it below).
    net = _jackson_network()
    gamma = np.array([2.0, 1.0, 0.5])
    routing = np.zeros((3, 3))
    routing[0, 1], routing[0, 2], routing[1, 2], routing[1, 0], routing[2, 0] = (
        0.5, 0.2, 0.4, 0.1, 0.1)
    rates = np.linalg.solve(np.eye(3) - routing.T, gamma)
    mean_stay = np.array([u.groups[0].stay.mean() for u in net.units])
    theory = rates * mean_stay
    module_rates, module_occupancy = traffic_equations(net)
    np.testing.assert_allclose(module_rates, rates, rtol=1e-12)
    np.testing.assert_allclose(module_occupancy, theory, rtol=1e-12)

    result = simulate_network(net)
    # Error bound: Student-t 99.9% interval over 20 independent replications of two years
    # each (Law 2015, independent replications; each replication's figure is an average over
    # a long run, close to normal); 99.9% per check so that the six checks together fail by
    # chance less than 1% of the time (Bonferroni).
    ignoring_routing = gamma * mean_stay
    for i, name in enumerate(net.names()):
        occupancy = result.estimate(name, "mean_occupancy", level=0.999)
        assert occupancy.contains(theory[i]), (name, occupancy, theory[i])
        assert occupancy.half_width < 0.05 * theory[i]  # tight enough to mean something
        # A simulation that ignored routing would sit at gamma x stay: far outside the bound.
        assert not occupancy.contains(ignoring_routing[i])
        entries = result.estimate(name, "entries_per_day", level=0.999)
        assert entries.contains(rates[i]), (name, entries, rates[i])


# -- Little (1961) per unit, with exit block ---------------------------------------------------

def test_littles_law_holds_per_unit_with_waiting_included() -> None:
    # Little JDC (1961), A proof for the queuing formula L = lambda W, Operations Research
    # 9:383-387 (from memory): time-average number in the unit = entries per day x mean time
    # in the unit, here with the time a patient waits in the sending unit's bed counted in
    # that unit. Measured on one run: the two sides are measured separately (an integral of
    # the beds held over the measured days; entries counted and followed to their end), so
    # they differ only by edge effects of order (mean time in unit / days measured), under
    # 1.5% for stays of days over 3 years (bound: common practice, no source).
    units = (_unit("A", _exponential(4.0), 2.0, beds=10),
             _unit("B", _exponential(5.0), 2.5, beds=16))
    net = NetworkInput(units, (_to("A", "B", 0.6), _to("B", "A", 0.05)), days=3 * 365,
                       warmup_days=60, replications=2, seed=5)
    result = simulate_network(net)
    for name in net.names():
        for r in range(net.replications):
            occupancy = result.values[name]["mean_occupancy"][r]
            entries = result.values[name]["entries_per_day"][r]
            stay = result.values[name]["mean_time_in_unit"][r]
            assert entries * stay == pytest.approx(occupancy, rel=0.015), (name, r)
    # A waits for beds in B, so its time in unit is longer than its stay (4 days): the check
    # above would fail if the waits were left out of the time in unit.
    assert result.estimate("A", "waiting_bed_days_per_week").mean > 0.5
    assert result.estimate("A", "mean_time_in_unit").ci_low > 4.05


# -- product form: a two-unit tandem ------------------------------------------------------------

def test_tandem_of_exponential_stays_has_independent_poisson_counts() -> None:
    # Jackson (1957) product form, for infinite-server stations in tandem: in the stationary
    # state the counts are independent Poisson with means lambda / mu_1 and lambda / mu_2
    # (from memory; the standard M/M/infinity tandem result). lambda = 10 a day, stays 0.2 and
    # 0.3 days: means 2 and 3. Daily census instants are 3+ mean stays apart, so the samples
    # are close to independent (lag-one correlation exp(-1/0.3) = 0.036 for the second unit).
    net = NetworkInput((_unit("A", _exponential(0.2), 10.0), _unit("B", _exponential(0.3), 0.0)),
                       (_to("A", "B", 1.0),), days=3650, warmup_days=7, replications=4, seed=2)
    census = np.concatenate(simulate_network(net).census)
    a, b = census[:, 0], census[:, 1]
    n = a.size

    def chi_square(mean_a: float, mean_b: float) -> tuple[float, float]:
        # Joint cells k_a x k_b for k up to 5 and 7, the rest pooled into the last
        # row / column (every expected count stays above 5).
        top_a, top_b = 5, 7
        pa = stats.poisson.pmf(np.arange(top_a + 1), mean_a)
        pa[-1] = stats.poisson.sf(top_a - 1, mean_a)
        pb = stats.poisson.pmf(np.arange(top_b + 1), mean_b)
        pb[-1] = stats.poisson.sf(top_b - 1, mean_b)
        expected = n * np.outer(pa, pb).ravel()
        observed = np.zeros((top_a + 1, top_b + 1))
        np.add.at(observed, (np.minimum(a, top_a), np.minimum(b, top_b)), 1)
        return float(stats.chisquare(observed.ravel(), expected).pvalue), float(expected.min())

    p_value, smallest = chi_square(2.0, 3.0)
    assert smallest > 5  # the chi-square approximation's usual rule (common practice)
    assert p_value > 0.001
    # The test has power: the wrong means (the second unit's count taken as the first's)
    # are rejected at once.
    assert chi_square(2.0, 2.0)[0] < 1e-9
    # Independence: the sample correlation has standard error about 1 / sqrt(n).
    assert abs(np.corrcoef(a, b)[0, 1]) < 4.0 / np.sqrt(n)


# -- finite beds --------------------------------------------------------------------------------

def test_exit_block_grows_as_the_receiving_unit_loses_beds() -> None:
    # Common practice, no source: fewer beds in the receiving unit cannot make the sending
    # unit's patients wait less (the means over paired replications must rise strictly).
    def network(ward_beds: int | None) -> NetworkInput:
        return NetworkInput((_unit("CRIT", _exponential(4.0), 1.5, beds=8),
                             _unit("WARD", _exponential(5.0), 2.0, beds=ward_beds)),
                            (_to("CRIT", "WARD", 0.7),), days=730, warmup_days=60,
                            replications=6, seed=4)

    waiting = []
    previous = None
    for beds in (16, 14, 12, 10):
        result = simulate_network(network(beds))
        waiting.append(result.estimate("CRIT", "waiting_bed_days_per_week").mean)
        if previous is not None:  # paired: the same seed, so the same patients
            change = previous.difference(result, "CRIT", "waiting_bed_days_per_week")
            assert change.ci_low > 0
        previous = result
    assert all(x < y for x, y in zip(waiting, waiting[1:], strict=False))
    unlimited = simulate_network(network(None))
    assert max(unlimited.values["CRIT"]["waiting_bed_days_per_week"]) == 0.0
    assert max(unlimited.values["CRIT"]["waits_per_week"]) == 0.0


def test_one_unit_matches_the_loss_simulation_and_erlang_b() -> None:
    # With one unit and no routing the network is the one-unit loss system: with the same
    # seed it replays the same demand and must give the very same figures; and with Poisson
    # arrivals at a flat rate the share turned away is the Erlang loss formula (insensitive
    # to the stay's shape; app.stats.erlang, checked against published Erlang B tables in
    # tests/stats/test_erlang.py).
    stay = Coxian(lam=(0.5,), mu=(0.8, 0.4))
    unit = _unit("U", stay, 8.0 / stay.mean())  # offered load 8 Erlangs
    net = NetworkInput((NetworkUnit("U", unit.groups, unit.streams, beds=10),),
                       days=730, warmup_days=56, replications=12, seed=9)
    network = simulate_network(net)
    single = simulate(PlanningInput(groups=unit.groups, streams=unit.streams, beds=10,
                                    days=730, warmup_days=56, replications=12,
                                    seed=unit_seed(9, "U")))
    np.testing.assert_allclose(network.values["U"]["share_turned_away"],
                               single.values["share_turned_away"], rtol=1e-12)
    np.testing.assert_allclose(network.values["U"]["mean_occupancy"],
                               single.values["mean_occupancy"], rtol=1e-9)
    blocked = network.estimate("U", "share_turned_away", level=0.99)
    assert blocked.contains(erlang_b(10, 8.0)), (blocked, erlang_b(10, 8.0))
    # Time full = Erlang B too for Poisson arrivals (arrivals see time averages, PASTA).
    assert network.estimate("U", "share_time_full", level=0.99).contains(erlang_b(10, 8.0))


def test_escalation_beds_count_as_beds_and_are_reported() -> None:
    # Escalation beds take arrivals like any bed; their use is the time above the staffed
    # count (an identity of the model, no outside source).
    base = dict(days=365, warmup_days=28, replications=3, seed=1)
    with_escalation = simulate_network(NetworkInput(
        (_unit("U", _exponential(2.0), 4.0, beds=8, escalation=2),), **base))
    ten = simulate_network(NetworkInput((_unit("U", _exponential(2.0), 4.0, beds=10),), **base))
    assert with_escalation.values["U"]["turned_away_per_week"] == \
        ten.values["U"]["turned_away_per_week"]
    assert min(with_escalation.values["U"]["escalation_bed_days_per_week"]) > 0
    assert max(ten.values["U"]["escalation_bed_days_per_week"]) == 0


def test_two_full_units_waiting_on_each_other_swap_instead_of_deadlocking() -> None:
    # Every patient of each unit goes to the other with high probability and both are small:
    # without the swap the run would stall with both units held by waiting patients. The
    # transfers out of one unit are the transfers into the other (conservation).
    units = (_unit("A", _exponential(2.0), 2.0, beds=3), _unit("B", _exponential(2.0), 2.0,
                                                                  beds=3))
    net = NetworkInput(units, (_to("A", "B", 0.9), _to("B", "A", 0.9)), days=365,
                       warmup_days=28, replications=2, seed=3)
    result = simulate_network(net)
    assert result.values["A"]["transfers_out_per_week"] == \
        result.values["B"]["transfers_in_per_week"]
    assert min(result.values["A"]["transfers_out_per_week"]) > 1.0
    assert min(result.values["A"]["entries_per_day"]) > 0.5


def test_bad_inputs_are_refused() -> None:
    unit = _unit("A", _exponential(2.0), 1.0)
    with pytest.raises(ValueError, match="add up"):
        NetworkInput((unit, _unit("B", _exponential(1.0), 1.0), _unit("C", _exponential(1.0), 0)),
                     (_to("A", "B", 0.7), _to("A", "C", 0.5)))
    with pytest.raises(ValueError, match="unknown unit"):
        NetworkInput((unit,), (Transfer("A", "C", 0.5, (("g", 1.0),)),))
    with pytest.raises(ValueError, match="itself"):
        Transfer("A", "A", 0.5, (("g", 1.0),))
