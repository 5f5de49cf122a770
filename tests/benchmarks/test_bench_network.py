"""Speed of the network simulation (units together): the demo-like pair, 2 years x 20
replications (target 30 s, the one-unit planning target), and the page's plan of the pair
(a year x 10 replications, six bed counts; target 20 s)."""

from __future__ import annotations

from app.stats.phasetype import Coxian
from app.stats.planning import DemandStream, PatientGroup, scale_stay
from app.stats.planning.network import NetworkInput, NetworkUnit, Transfer, simulate_network
from tests.benchmarks.conftest import timed

# Like the demo pair: critical care of 16 beds (about 3.5 admissions a day, stays of 4.5 days
# on average), half of whose patients step down to a 28-bed surgical ward (about 3.7 other
# admissions a day, stays of 5 days).
MEDICAL = scale_stay(Coxian(lam=(0.9, 0.2), mu=(0.6, 0.3, 0.08)), 4.5 / (14.6 / 3.0))
CRIT = NetworkUnit("KV-CRIT", (PatientGroup("medical", MEDICAL),),
                   (DemandStream("emergency", "emergency", (3.5,) * 7, {"medical": 1.0},
                                 dispersion=8.0),), beds=16)
WARD = NetworkUnit("KV-SURG", (PatientGroup("ward", Coxian.erlang(2, 0.4)),),
                   (DemandStream("emergency", "emergency", (3.7,) * 7, {"ward": 1.0}),), beds=28)
PAIR = NetworkInput((CRIT, WARD), (Transfer("KV-CRIT", "KV-SURG", 0.5, {"ward": 1.0}),),
                    days=730, replications=20)


def test_pair_two_years_20_replications() -> None:
    out: dict[str, float] = {}
    with timed("network: 2 units, 2 years, 20 replications", 30, out):
        result = simulate_network(PAIR)
    waiting = result.estimate("KV-CRIT", "waiting_bed_days_per_week")
    print(f"BENCH   KV-CRIT bed-days waiting a week {waiting.mean:.2f} "
          f"[{waiting.ci_low:.2f}, {waiting.ci_high:.2f}]")
    assert result.estimate("KV-SURG", "transfers_in_per_week").mean > 0


def test_page_plan_of_the_pair() -> None:
    out: dict[str, float] = {}
    short = PAIR.replace(days=365, replications=10)
    with timed("network: the page's plan, 6 bed counts, 1 year, 10 replications", 20, out):
        for extra in range(6):
            simulate_network(short.with_beds({"KV-SURG": 28 + extra}))
