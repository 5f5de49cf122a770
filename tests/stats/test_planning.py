"""Capacity planning: the loss-system simulation, beds needed and scenarios.

Outside references, named at each check: the Erlang loss formula and its insensitivity to the
stay distribution (app.stats.erlang, itself checked against published Erlang B tables;
METHODS.md section 4), the Poisson occupancy of an M/G/infinity unit (METHODS.md section 3)
with scipy.stats.poisson, Little's law (METHODS.md section 3), scipy.stats distributions for
the sampled stays and counts, and the occupancy shape of Bagust, Place & Posnett
(BMJ 1999;319:155, as quoted in METHODS.md section 4).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import stats

from app.stats.erlang import beds_for_blocking, erlang_b
from app.stats.phasetype import Coxian, PhaseType
from app.stats.planning import (
    DemandStream,
    ElectiveList,
    PatientGroup,
    PlanningInput,
    PlanningResult,
    beds_needed,
    capacity_curve,
    demand_scale_for_occupancy,
    draw_demand,
    scale_arrivals,
    scale_stay,
    simulate,
    t_interval,
)
from app.stats.planning.demand import _stay_quantile
from app.stats.planning_scenarios import (
    MoveElectives,
    MoveGroupShare,
    ScaleArrivals,
    ScaleStay,
    Scenario,
    SetBeds,
    compare,
)

# An invented unit like the demo critical care: a long-tailed 3-phase Coxian (mean 4.5 days)
# for medical patients, an Erlang-2 (mean 2 days) for surgical ones; overdispersed emergencies
# with a weekday pattern and an evening peak; a Monday-Friday theatre list, 10% cancelled.
MEDICAL = scale_stay(Coxian(lam=(0.9, 0.2), mu=(0.6, 0.3, 0.08)), 4.5 / (14.6 / 3.0))
SURGICAL = Coxian.erlang(2, 1.0)
EVENING = (1.0,) * 8 + (2.0,) * 4 + (3.0,) * 8 + (2.0,) * 4
AFTERNOON = (0.0,) * 13 + (1.0,) * 6 + (0.0,) * 5


def unit(beds: int | None = 16, **changes: object) -> PlanningInput:
    emergency = DemandStream("emergency", "emergency", (2.8, 2.6, 2.5, 2.5, 2.6, 2.3, 2.2),
                              {"medical": 0.8, "surgical": 0.2}, dispersion=8.0,
                              hour_profile=EVENING)
    theatre = ElectiveList("theatre", (1.2, 1.0, 1.0, 1.0, 0.8, 0.0, 0.0),
                           {"surgical": 0.7, "medical": 0.3}, cancellation=0.1,
                           hour_profile=AFTERNOON)
    inp = PlanningInput(groups=(PatientGroup("medical", MEDICAL),
                                PatientGroup("surgical", SURGICAL)),
                        streams=(emergency, theatre), beds=beds)
    return inp.replace(**changes) if changes else inp


def flat_poisson(load: float, beds: int | None, stay: Coxian | PhaseType, **kw: object
                 ) -> PlanningInput:
    """Poisson arrivals at one rate every day and hour: the Erlang loss formula's setting."""
    rate = load / stay.mean()
    return PlanningInput(groups=(PatientGroup("all", stay),),
                         streams=(DemandStream("arrivals", "emergency", (rate,) * 7,
                                                {"all": 1.0}),),
                         beds=beds, **kw)  # type: ignore[arg-type]


def test_demo_like_medical_stay_has_the_intended_mean() -> None:
    # Guards the fixture: the Coxian's mean is 14.6/3 days before scaling (computed by hand:
    # 1/1.5 + 0.6 (1/0.5 + 0.4/0.08)).
    assert Coxian(lam=(0.9, 0.2), mu=(0.6, 0.3, 0.08)).mean() == pytest.approx(14.6 / 3.0)
    assert MEDICAL.mean() == pytest.approx(4.5, rel=1e-12)


# --- sampling pieces against scipy.stats ------------------------------------------------------


def test_stay_quantiles_match_scipy_exponential_and_erlang() -> None:
    # Inverse-CDF sampling from the tabulated log-survival: scipy.stats.expon and
    # scipy.stats.gamma (Erlang) quantiles are the reference.
    survival = np.array([0.999, 0.9, 0.5, 0.1, 1e-3, 1e-6, 1e-9, 1e-13])
    exponential = _stay_quantile(Coxian.exponential(0.25), survival)
    np.testing.assert_allclose(exponential, stats.expon(scale=4.0).isf(survival), rtol=1e-9)
    erlang = _stay_quantile(Coxian.erlang(3, 3.0), survival)
    np.testing.assert_allclose(erlang, stats.gamma(3, scale=1 / 3.0).isf(survival), rtol=1e-5)


def test_sampled_stays_follow_the_coxian() -> None:
    # Kolmogorov-Smirnov against the Coxian's own cdf, and the sample mean against its mean.
    rng = np.random.default_rng(1)
    stays = _stay_quantile(MEDICAL, 1.0 - rng.random(40_000))
    assert stats.kstest(stays, MEDICAL.cdf).pvalue > 0.01
    se = math.sqrt(MEDICAL.variance() / stays.size)
    assert abs(stays.mean() - MEDICAL.mean()) < 4 * se


def test_daily_counts_follow_poisson_and_negative_binomial() -> None:
    # Counts by weekday against scipy.stats.poisson / nbinom (NB2 with size r: p = r/(r+m)),
    # chi-square goodness of fit on Tuesdays.
    groups = (PatientGroup("g", Coxian.exponential(1.0)),)
    rates = (2.0, 6.0, 3.0, 3.0, 3.0, 1.0, 0.0)
    for dispersion in (None, 4.0):
        stream = DemandStream("s", "emergency", rates, {"g": 1.0}, dispersion=dispersion)
        inp = PlanningInput(groups=groups, streams=(stream,), beds=None, days=14_000,
                            warmup_days=0, replications=2, seed=3)
        counts = draw_demand(inp, 0).counts_by_day()
        weekday = np.arange(counts.size) % 7
        assert counts[weekday == 6].sum() == 0  # rate 0 on Sundays
        tuesdays = counts[weekday == 1]
        dist = (stats.poisson(6.0) if dispersion is None
                else stats.nbinom(dispersion, dispersion / (dispersion + 6.0)))
        top = 14
        observed = np.bincount(np.minimum(tuesdays, top), minlength=top + 1)
        expected = np.r_[dist.pmf(np.arange(top)), dist.sf(top - 1)] * tuesdays.size
        assert stats.chisquare(observed, expected).pvalue > 0.001
        assert tuesdays.var() == pytest.approx(dist.var(), rel=0.1)


def test_arrival_hours_follow_the_profile() -> None:
    # Hour shares against the profile (binomial standard errors, common practice, no source).
    inp = unit(None, days=3000, warmup_days=0, replications=2)
    demand = draw_demand(inp, 0)
    theatre = demand.stream == 1
    hours = np.floor((demand.time % 1.0) * 24).astype(int)
    assert set(hours[theatre]) <= set(range(13, 19))
    shares = np.bincount(hours[~theatre], minlength=24) / (~theatre).sum()
    profile = np.asarray(EVENING) / sum(EVENING)
    se = np.sqrt(profile * (1 - profile) / (~theatre).sum())
    assert np.all(np.abs(shares - profile) < 4 * se)


# --- the loss system against the Erlang loss formula -----------------------------------------

# METHODS.md section 4, published Erlang B table values: 15 beds carry 8.108 Erlangs at 1%;
# 7 beds at 2.5 Erlangs block just under 1%; 10 beds at 10 Erlangs block 0.2146.
ERLANG_PAIRS = [(8.108, 15), (2.5, 7), (10.0, 10)]
STAY_SHAPES = {
    "exponential": Coxian.exponential(1.0),
    "erlang-3": Coxian.erlang(3, 3.0),
    # A short first phase that often ends the stay, else a long second one (mean 1.2 before
    # scaling to 1, coefficient of variation above 1).
    "coxian-2": Coxian(lam=(0.5,), mu=(2.0, 0.25)),
}


def _unit_mean(stay: Coxian) -> Coxian:
    return scale_stay(stay, 1.0 / stay.mean())  # type: ignore[return-value]


@pytest.mark.parametrize(("load", "beds"), ERLANG_PAIRS)
@pytest.mark.parametrize("shape", sorted(STAY_SHAPES))
def test_loss_system_agrees_with_erlang_b_whatever_the_stay_shape(
    load: float, beds: int, shape: str
) -> None:
    # Insensitivity of M/G/c/c: the same Erlang B for every stay shape of the same mean
    # (reference: app.stats.erlang.erlang_b; METHODS.md section 4).
    stay = _unit_mean(STAY_SHAPES[shape])
    result = simulate(flat_poisson(load, beds, stay, days=3000, seed=11))
    blocked = result.estimate("share_turned_away")
    reference = erlang_b(beds, load)
    assert blocked.contains(reference), (blocked, reference)
    # The interval must be narrow enough for the check to mean something: near 1% blocking
    # with 15 beds, B changes by about 7% for each 1% change in the load, so +/-15% would
    # catch stays whose mean is off by 2-3%.
    assert blocked.half_width < 0.15 * reference
    # Carried load: mean occupancy = A (1 - B) (Little's law on admitted patients).
    occupied = result.estimate("mean_occupancy")
    assert occupied.mean == pytest.approx(load * (1 - reference), rel=0.01)


def test_loss_system_census_is_truncated_poisson() -> None:
    # Erlang's distribution: busy beds ~ Poisson(A) truncated to 0..c, any stay shape
    # (scipy.stats.poisson as reference).
    load, beds = 10.0, 10
    result = simulate(flat_poisson(load, beds, _unit_mean(STAY_SHAPES["coxian-2"]), days=2000))
    k = np.arange(beds + 1)
    truncated = stats.poisson.pmf(k, load) / stats.poisson.cdf(beds, load)
    assert np.abs(result.occupancy_pmf() - truncated).max() < 0.01
    assert result.estimate("share_days_full_at_census").contains(truncated[-1])


def test_unlimited_beds_census_is_poisson_with_the_offered_load() -> None:
    # M/G/infinity: occupancy ~ Poisson(lambda E[stay]) (METHODS.md section 3, thinning);
    # scipy.stats.poisson as reference.
    load = 6.0
    result = simulate(flat_poisson(load, None, _unit_mean(STAY_SHAPES["erlang-3"]), days=2000))
    pmf = result.occupancy_pmf()
    reference = stats.poisson.pmf(np.arange(pmf.size), load)
    assert 0.5 * np.abs(pmf - reference).sum() < 0.01
    assert "share_turned_away" not in result.metrics
    assert "occupancy_rate" not in result.metrics


def test_littles_law_on_the_demo_like_unit() -> None:
    # Little's law L = lambda W (METHODS.md section 3) with weekday pattern, overdispersion,
    # a cancelled booked list, clock-time profiles and long-tailed stays: within 2%, as the
    # issue asks, and inside the replication interval.
    inp = unit(None, days=1825, replications=30)
    occupied = simulate(inp).estimate("mean_occupancy")
    expected = inp.offered_load()  # sum over streams of arrivals/day x mean stay
    assert abs(occupied.mean / expected - 1) < 0.02
    assert occupied.contains(expected)
    assert occupied.half_width < 0.01 * expected


def test_littles_law_for_admitted_patients_in_a_full_unit() -> None:
    # Little's law on the patients admitted: L = lambda (1 - share turned away) W, since the
    # stay does not depend on admission; within 2%.
    inp = unit(12)
    result = simulate(inp)
    carried = sum(
        s.expected_by_weekday().mean()
        * (1 - result.estimate(f"share_turned_away_{s.admission_type}").mean)
        * inp.mean_stay(s)
        for s in inp.streams
    )
    occupied = result.estimate("mean_occupancy")
    assert abs(occupied.mean / carried - 1) < 0.02
    assert result.estimate("share_turned_away").mean > 0.1  # the unit is really full


# --- Bagust, Place & Posnett (BMJ 1999;319:155): the occupancy shape -------------------------


def test_turned_away_rises_steeply_between_85_and_92_percent_occupancy() -> None:
    # "Risks are discernible when average bed occupancy rates exceed about 85%, and an acute
    # hospital can expect regular bed shortages and periodic bed crises if average bed
    # occupancy rises to 90% or more" (Bagust, Place & Posnett, BMJ 1999;319:155, quoted in
    # METHODS.md). Tested on a 100-bed acute pool of emergency admissions (weekday pattern,
    # overdispersed, long-tailed stays), demand set so mean occupancy is 78%, 85% and 92%.
    # "Steeply" here means: going from 85% to 92% occupancy (x1.08) more than triples the
    # share of arrivals finding no bed (and even the cautious ratio, lower bound at 92% over
    # upper bound at 85%, exceeds 2.5), more than doubles the days with a shortage, and the
    # rise from 85% to 92% is more than twice the rise from 78% to 85% (it accelerates). The
    # thresholds are ours (common practice, no source): the Erlang loss formula for 100 beds
    # and Poisson arrivals gives x4.5 (0.0152 -> 0.0690, app.stats.erlang); overdispersion
    # and the weekday pattern flatten the curve somewhat (measured x3.6-3.9 with seeds 0, 1,
    # 2 and 5).
    # A 16-bed unit turns away about 23% at 85% already, so the ratio there is only ~1.8
    # (Erlang: 1.84): the quoted thresholds describe a hospital-sized pool of beds.
    groups = (PatientGroup("acute", MEDICAL),)
    rate = 100 * 0.85 / MEDICAL.mean()
    pattern = np.array([1.1, 1.0, 1.0, 1.0, 1.0, 0.95, 0.95]) * rate
    pool = PlanningInput(groups=groups,
                         streams=(DemandStream("emergency", "emergency", tuple(pattern),
                                                {"acute": 1.0}, dispersion=20.0),),
                         beds=100, seed=5)
    shares, days_short = {}, {}
    for target in (0.78, 0.85, 0.92):
        factor = demand_scale_for_occupancy(pool, target, tolerance=0.002)
        result = simulate(scale_arrivals(pool, factor))
        assert result.estimate("occupancy_rate").mean == pytest.approx(target, abs=0.01)
        shares[target] = result.estimate("share_turned_away")
        days_short[target] = result.estimate("share_days_turning_away")
    assert shares[0.92].mean > 3 * shares[0.85].mean
    assert shares[0.92].ci_low > 2.5 * shares[0.85].ci_high
    assert days_short[0.92].mean > 2 * days_short[0.85].mean
    assert days_short[0.92].ci_low > days_short[0.85].ci_high
    rise_high = shares[0.92].mean - shares[0.85].mean
    rise_low = shares[0.85].mean - shares[0.78].mean
    assert rise_high > 2 * rise_low


# --- beds needed and the curve ---------------------------------------------------------------


def test_beds_needed_matches_erlang_for_poisson_arrivals() -> None:
    # Erlang: B(14, 10) = 0.057 > 5% > B(15, 10) = 0.036 (app.stats.erlang), so 15 beds.
    inp = flat_poisson(10.0, None, _unit_mean(STAY_SHAPES["coxian-2"]), days=2000)
    answer = beds_needed(inp, 0.05)
    assert answer.erlang_beds == beds_for_blocking(10.0, 0.05) == 15
    assert answer.beds == 15
    assert answer.beds_confident == 15
    frame = answer.curve.to_frame()
    assert list(frame["beds"]) == list(range(14, 16))
    row = frame.set_index("beds").loc[14]
    assert row["share_turned_away_low"] <= row["erlang_b"] <= row["share_turned_away_high"]


def test_capacity_curve_is_smooth_with_common_random_numbers() -> None:
    # Same demand for every bed count: fewer turned away and more beds occupied with each bed,
    # and replication by replication never more turned away (with the same arrivals and
    # stays an extra bed does not turn more away; no published value, common practice).
    inp = unit(None, days=365, replications=5)
    curve = capacity_curve(inp, range(10, 21))
    frame = curve.to_frame()
    assert np.all(np.diff(frame["share_turned_away"]) < 0)
    assert np.all(np.diff(frame["mean_occupancy"]) > 0)
    per_rep = np.array([curve.result(b).values["share_turned_away"] for b in curve.beds])
    assert np.all(np.diff(per_rep, axis=0) <= 0)
    np.testing.assert_allclose(frame["erlang_b"],
                               [erlang_b(b, inp.offered_load()) for b in range(10, 21)])


def test_beds_needed_on_the_demo_like_unit() -> None:
    inp = unit(None)
    answer = beds_needed(inp, 0.05)
    frame = answer.curve.to_frame().set_index("beds")
    assert frame.loc[answer.beds, "share_turned_away"] <= 0.05
    assert frame.loc[answer.beds - 1, "share_turned_away"] > 0.05
    assert answer.beds_confident >= answer.beds
    assert frame.loc[answer.beds_confident, "share_turned_away_high"] <= 0.05
    # The Erlang loss formula takes the same offered load; a weekday pattern, a booked list
    # and overdispersion add variability, which does not lower the beds needed.
    assert answer.beds >= answer.erlang_beds
    assert answer.offered_load == pytest.approx(inp.offered_load())


# --- scenarios -------------------------------------------------------------------------------


def test_scaling_a_group_stay_scales_its_distribution_and_its_draws() -> None:
    inp = unit(16, days=200, warmup_days=28, replications=2)
    halved = ScaleStay("medical", 0.5).apply(inp)
    stay = halved.group("medical").stay
    assert isinstance(stay, Coxian)
    assert stay.mean() == pytest.approx(0.5 * MEDICAL.mean(), rel=1e-12)
    # Time scaling: S_new(x) = S_old(2x) (phase-type identity, T / f).
    x = np.linspace(0.1, 30, 50)
    np.testing.assert_allclose(stay.sf(x), MEDICAL.sf(2 * x), rtol=1e-9)
    general = scale_stay(MEDICAL.to_phase_type(), 0.5)
    assert isinstance(general, PhaseType)
    np.testing.assert_allclose(general.sf(x), MEDICAL.sf(2 * x), rtol=1e-9)
    assert halved.group("surgical") == inp.group("surgical")
    # Common random numbers: the same patients, the medical ones staying exactly half as long.
    before, after = draw_demand(inp, 0), draw_demand(halved, 0)
    np.testing.assert_array_equal(before.time, after.time)
    medical = before.group == 0
    np.testing.assert_allclose(after.stay[medical], 0.5 * before.stay[medical], rtol=1e-6)
    np.testing.assert_array_equal(after.stay[~medical], before.stay[~medical])


def test_scaling_arrivals_scales_the_offered_load_and_adds_patients() -> None:
    inp = unit(16, days=365, replications=2)
    emergency_load = inp.streams[0].expected_by_weekday().mean() * inp.mean_stay(inp.streams[0])
    more = ScaleArrivals(1.3, admission_type="emergency").apply(inp)
    assert more.offered_load() == pytest.approx(inp.offered_load() + 0.3 * emergency_load)
    everything = ScaleArrivals(1.3).apply(inp)
    assert everything.offered_load() == pytest.approx(1.3 * inp.offered_load())
    booked = ScaleArrivals(2.0, stream="theatre").apply(inp).streams[1]
    assert booked.booked_by_weekday == (2.4, 2.0, 2.0, 2.0, 1.6, 0.0, 0.0)
    # Inverse-CDF counts: every day has at least as many arrivals as before.
    before = draw_demand(inp, 0).counts_by_day(0)
    after = draw_demand(more, 0).counts_by_day(0)
    assert np.all(after >= before)
    assert after.sum() / before.sum() == pytest.approx(1.3, rel=0.05)


def test_moving_a_share_between_groups() -> None:
    inp = unit(16, days=1000, replications=2)
    moved = MoveGroupShare("medical", "surgical", 0.25, admission_type="emergency").apply(inp)
    assert dict(moved.streams[0].group_weights) == pytest.approx(
        {"medical": 0.6, "surgical": 0.4})
    assert moved.streams[1] == inp.streams[1]  # the theatre list is not emergency
    mean_stay = 0.6 * MEDICAL.mean() + 0.4 * SURGICAL.mean()
    assert moved.mean_stay(moved.streams[0]) == pytest.approx(mean_stay)
    before, after = draw_demand(inp, 0), draw_demand(moved, 0)
    np.testing.assert_array_equal(before.time, after.time)  # the same arrivals
    emergency = after.stream == 0
    share = np.mean(after.group[emergency] == 1)
    se = math.sqrt(0.4 * 0.6 / emergency.sum())
    assert abs(share - 0.4) < 4 * se
    # Only medical patients change group, into surgical.
    changed = before.group != after.group
    assert np.all(before.group[changed] == 0) and np.all(after.group[changed] == 1)


def test_moving_electives_between_weekdays() -> None:
    inp = unit(16, days=700, warmup_days=0, replications=2)
    moved = MoveElectives(from_weekday=4, to_weekday=0).apply(inp)
    assert moved.streams[1].booked_by_weekday == (2.0, 1.0, 1.0, 1.0, 0.0, 0.0, 0.0)
    counts = draw_demand(moved, 0).counts_by_day(1)
    weekday = np.arange(counts.size) % 7
    assert counts[weekday == 4].sum() == 0
    mondays = counts[weekday == 0]
    # Two bookings each Monday, each going ahead with probability 0.9: Binomial(2, 0.9).
    assert mondays.max() <= 2
    assert mondays.mean() == pytest.approx(1.8, abs=4 * math.sqrt(2 * 0.9 * 0.1 / mondays.size))
    half = MoveElectives(0, 5, share=0.5).apply(inp)
    assert half.streams[1].booked_by_weekday[0] == pytest.approx(0.6)
    assert half.streams[1].booked_by_weekday[5] == pytest.approx(0.6)
    assert half.offered_load() == pytest.approx(inp.offered_load())


def test_compare_pairs_replications_with_common_random_numbers() -> None:
    inp = unit(16, days=365, replications=10)
    scenarios = [Scenario("step-down", (ScaleStay("medical", 0.8),)),
                 Scenario("two more beds", (SetBeds(18),)),
                 Scenario("busier", (ScaleArrivals(1.2, admission_type="emergency"),
                                     MoveElectives(4, 0)))]
    frame = compare(inp, scenarios)
    assert list(frame["scenario"].unique()) == ["current", "step-down", "two more beds", "busier"]
    table = frame.set_index(["scenario", "metric"])
    assert (table.xs("current")["difference"].fillna(0) == 0).all()
    assert table.loc[("two more beds", "beds"), "mean"] == 18
    assert table.loc[("busier", "offered_load"), "difference"] > 0
    assert table.loc[("step-down", "share_turned_away"), "difference_high"] < 0
    assert table.loc[("two more beds", "share_turned_away"), "difference_high"] < 0
    assert table.loc[("busier", "share_turned_away"), "difference_low"] > 0
    # Paired differences are far narrower than two independent intervals would give.
    row = table.loc[("step-down", "share_turned_away")]
    base = table.loc[("current", "share_turned_away")]
    paired = row["difference_high"] - row["difference_low"]
    unpaired = math.hypot(row["ci_high"] - row["ci_low"], base["ci_high"] - base["ci_low"])
    assert paired < 0.6 * unpaired


# --- intervals, round trips and bad input ----------------------------------------------------


def test_t_interval_matches_scipy() -> None:
    # scipy.stats.t.interval as reference.
    x = np.array([0.12, 0.08, 0.1, 0.15, 0.11])
    e = t_interval(x, 0.9)
    low, high = stats.t.interval(0.9, x.size - 1, loc=x.mean(), scale=stats.sem(x))
    assert (e.ci_low, e.ci_high) == pytest.approx((low, high), rel=1e-12)
    with pytest.raises(ValueError, match="at least 2"):
        t_interval([0.1])


def test_json_round_trips_are_exact() -> None:
    inp = unit(14, days=60, warmup_days=14, replications=3)
    assert PlanningInput.from_dict(json.loads(json.dumps(inp.to_dict()))) == inp
    result = simulate(inp)
    again = PlanningResult.from_dict(json.loads(json.dumps(result.to_dict())))
    assert again.to_dict() == result.to_dict()
    scenario = Scenario("mix", (ScaleArrivals(1.1, stream="emergency"), ScaleStay("medical", 0.9),
                                MoveGroupShare("medical", "surgical", 0.1), MoveElectives(4, 1),
                                SetBeds(None)))
    assert Scenario.from_dict(json.loads(json.dumps(scenario.to_dict()))) == scenario
    curve = capacity_curve(inp, [12, 14])
    assert type(curve).from_dict(json.loads(json.dumps(curve.to_dict()))).to_dict() == (
        curve.to_dict())


def test_same_seed_same_result_other_seed_other_result() -> None:
    inp = unit(16, days=120, replications=3)
    assert simulate(inp).to_dict() == simulate(inp).to_dict()
    assert simulate(inp).values != simulate(inp.replace(seed=1)).values


def test_bad_input_is_refused_with_the_argument_named() -> None:
    groups = (PatientGroup("g", Coxian.exponential(1.0)),)
    stream = DemandStream("s", "emergency", (1.0,) * 7, {"g": 1.0})
    with pytest.raises(ValueError, match="rate_by_weekday: needs 7"):
        DemandStream("s", "emergency", (1.0,) * 6, {"g": 1.0})
    with pytest.raises(ValueError, match="dispersion"):
        DemandStream("s", "emergency", (1.0,) * 7, {"g": 1.0}, dispersion=0.0)
    with pytest.raises(ValueError, match="hour_profile"):
        DemandStream("s", "emergency", (1.0,) * 7, {"g": 1.0}, hour_profile=(1.0,) * 23)
    with pytest.raises(ValueError, match="cancellation"):
        ElectiveList("e", (1.0,) * 7, {"g": 1.0}, cancellation=1.5)
    with pytest.raises(ValueError, match="unknown groups"):
        PlanningInput(groups=groups, streams=(DemandStream("s", "emergency", (1.0,) * 7,
                                                            {"h": 1.0}),), beds=3)
    with pytest.raises(ValueError, match="beds"):
        PlanningInput(groups=groups, streams=(stream,), beds=0)
    with pytest.raises(ValueError, match="replications"):
        PlanningInput(groups=groups, streams=(stream,), beds=3, replications=1)
    with pytest.raises(ValueError, match="expected number of arrivals is 0"):
        PlanningInput(groups=groups, streams=(DemandStream("s", "emergency", (0.0,) * 7,
                                                            {"g": 1.0}),), beds=3)
    inp = PlanningInput(groups=groups, streams=(stream,), beds=3)
    with pytest.raises(ValueError, match="no patient group 'x'"):
        ScaleStay("x", 0.5).apply(inp)
    with pytest.raises(ValueError, match="factor"):
        ScaleStay("g", 0.0)
    with pytest.raises(ValueError, match="share"):
        MoveGroupShare("g", "h", 1.5)
    with pytest.raises(ValueError, match="to_weekday"):
        MoveElectives(2, 2)
    with pytest.raises(ValueError, match="no elective stream"):
        MoveElectives(2, 3).apply(inp)
    with pytest.raises(ValueError, match="no stream matches"):
        ScaleArrivals(2.0, admission_type="elective").apply(inp)
    with pytest.raises(ValueError, match="target"):
        beds_needed(inp, 1.5)
    with pytest.raises(ValueError, match="beds must be set"):
        demand_scale_for_occupancy(inp.replace(beds=None), 0.85)
    with pytest.raises(ValueError, match="names must be unique"):
        compare(inp, [Scenario("current", (SetBeds(4),))])
