"""Capacity planning speed: a 2-year simulation with 20 replications (target 30 s), and the
beds-needed search and a scenario comparison on the same unit (printed, same target)."""

from __future__ import annotations

from app.stats.phasetype import Coxian
from app.stats.planning import (
    DemandStream,
    ElectiveList,
    PatientGroup,
    PlanningInput,
    beds_needed,
    scale_stay,
    simulate,
)
from app.stats.planning_scenarios import MoveGroupShare, ScaleArrivals, ScaleStay, Scenario, compare
from tests.benchmarks.conftest import timed

# Like the demo critical care: 16 beds, about 2.5 emergencies a day (overdispersed, weekday
# pattern, evening peak), about 1 booked operation each weekday (10% cancelled), stays from a
# 3-phase Coxian with mean 4.5 days (and a shorter 2-phase group).
MEDICAL = scale_stay(Coxian(lam=(0.9, 0.2), mu=(0.6, 0.3, 0.08)), 4.5 / (14.6 / 3.0))
UNIT = PlanningInput(
    groups=(PatientGroup("medical", MEDICAL), PatientGroup("surgical", Coxian.erlang(2, 1.0))),
    streams=(
        DemandStream("emergency", "emergency", (2.8, 2.6, 2.5, 2.5, 2.6, 2.3, 2.2),
                      {"medical": 0.8, "surgical": 0.2}, dispersion=8.0,
                      hour_profile=(1.0,) * 8 + (2.0,) * 4 + (3.0,) * 8 + (2.0,) * 4),
        ElectiveList("theatre", (1.2, 1.0, 1.0, 1.0, 0.8, 0.0, 0.0),
                     {"surgical": 0.7, "medical": 0.3}, cancellation=0.1,
                     hour_profile=(0.0,) * 13 + (1.0,) * 6 + (0.0,) * 5),
    ),
    beds=16,
    days=730,
    replications=20,
)


def test_two_year_simulation_with_20_replications() -> None:
    out: dict[str, float] = {}
    with timed("planning: 2-year simulation, 20 replications, 16 beds", 30, out):
        result = simulate(UNIT)
    blocked = result.estimate("share_turned_away")
    occupancy = result.estimate("occupancy_rate")
    print(f"BENCH   offered load {UNIT.offered_load():.2f} Erlangs, warm-up "
          f"{UNIT.resolved_warmup_days()} days, occupancy {occupancy.mean:.3f}, turned away "
          f"{blocked.mean:.4f} [{blocked.ci_low:.4f}, {blocked.ci_high:.4f}]")
    assert 0 < blocked.mean < 1


def test_beds_needed_and_scenarios() -> None:
    out: dict[str, float] = {}
    with timed("planning: beds needed for 5% turned away (2 years, 20 replications)", 30, out):
        answer = beds_needed(UNIT, 0.05)
    print(f"BENCH   beds {answer.beds} (confident {answer.beds_confident}), Erlang "
          f"{answer.erlang_beds}; bed counts simulated {list(answer.curve.beds)}")
    scenarios = [Scenario("more emergencies", (ScaleArrivals(1.1, admission_type="emergency"),)),
                 Scenario("step-down", (ScaleStay("medical", 0.85),)),
                 Scenario("earlier treatment", (MoveGroupShare("medical", "surgical", 0.2),))]
    with timed("planning: current state and 3 scenarios (2 years, 20 replications)", 30, out):
        frame = compare(UNIT, scenarios)
    assert answer.beds >= 1
    assert len(frame["scenario"].unique()) == 4


def test_demo_unit_from_its_trained_model(demo_db: str, tmp_path) -> None:
    """The demo's surgical ward (invented), its planning input built from a trained model:
    the plain 2-year x 20 simulation and the whole `morrow plan` report with two scenarios."""
    from app.forecast.planning_inputs import unit_planning_input
    from app.forecast.planning_report import (
        PlanSettings,
        arrivals_scenario,
        run_plan,
        stay_scenario,
    )
    from app.store import db
    from tests.conftest import UTC_ZONE
    from tests.web.served import DEMO_NOW, trained_copy

    url = trained_copy(demo_db, tmp_path, ("KV-SURG",))
    with db.session_scope(url) as session:
        demand = unit_planning_input(session, "KV-SURG", DEMO_NOW, UTC_ZONE)
    out: dict[str, float] = {}
    with timed("planning: demo KV-SURG from its model, 2 years x 20 replications", 30, out):
        result = simulate(demand.baseline)
    scenarios = [arrivals_scenario(demand, "emergency", 1.1), stay_scenario(demand, "longest", 0.8)]
    with timed("planning: demo KV-SURG report (curve, beds needed, 2 scenarios), 2 years x 20",
               30, out):
        report = run_plan(demand, PlanSettings(), scenarios)
    needed = report["beds_needed"]
    print(f"BENCH   KV-SURG offered load {report['demand']['offered_load']:.2f} Erlangs, "
          f"staffed {report['staffed_beds']}, beds needed for 5%: simulation "
          f"{needed['simulation']} (confident {needed['simulation_confident']}), Erlang "
          f"{needed['erlang']}; bed counts on the curve {len(report['curve'])}")
    assert 0 < result.estimate("share_turned_away").mean < 1
    assert needed["simulation"] >= 1
