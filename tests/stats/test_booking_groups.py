"""A booking that lacks a value the admission tree splits on (its specialty named otherwise
than on the stays, no age or sex) is forecast with the electives' stays its known values
allow, not with whichever branch a missing value happens to follow.

Reference: the simulated stays themselves (their empirical mean length of stay and the share
of elective stays in each specialty), and scikit-survival's tree on the same rows."""

from __future__ import annotations

import numpy as np
import pytest

from app.stats.stay_groups import fit_stay_groups
from app.stats.survival_tree import FeatureSpec

FEATURES = (FeatureSpec("admission_type", "admission", "category", ("emergency", "elective")),
            FeatureSpec("specialty", "specialty", "category", ("cardiology", "cardiac-surgery")),
            FeatureSpec("age", "age", "number", integer=True))


def _groups(seed: int = 2):
    rng = np.random.default_rng(seed)
    n = 1600
    elective = rng.uniform(size=n) < 0.6
    surgery = rng.uniform(size=n) < np.where(elective, 0.45, 0.2)
    age = rng.integers(30, 90, n).astype(float)
    # Surgery stays about five days, cardiology about a day and a half (exponential).
    days = rng.exponential(np.where(surgery, 5.0, 1.5))
    x = np.column_stack([elective.astype(float), surgery.astype(float), age])
    kinds = np.where(elective, "elective", "emergency")
    groups = fit_stay_groups(x, days, np.ones(n, dtype=bool), kinds, FEATURES, max_depth=2,
                             min_samples_leaf=100, max_phases=3, n_starts=1)
    return groups, x, days, elective, surgery


def test_a_known_booking_keeps_its_own_group() -> None:
    groups, x, *_ = _groups()
    for row, leaf in zip(x[:50], groups.group_of(x[:50]), strict=True):
        assert groups.leaves_given(row, "elective") == {int(leaf): 1.0}


def test_a_booking_without_specialty_takes_the_electives_mixture() -> None:
    groups, x, days, elective, surgery = _groups()
    # The tree splits on specialty (its two groups' stays differ more than threefold).
    assert 1 in {int(f) for f in groups.tree.feature if f >= 0}
    booking = np.array([1.0, np.nan, np.nan])    # elective; specialty, age not known
    weights = groups.leaves_given(booking, "elective")
    assert len(weights) >= 2 and sum(weights.values()) == pytest.approx(1.0)
    # The stay groups' Coxians mixed by those weights against the electives' own mean stay
    # (the simulated data; tolerance about three standard errors of that mean, ~0.12 days).
    mean = sum(w * groups.get(n).distribution.mean() for n, w in weights.items())
    assert mean == pytest.approx(float(days[elective].mean()), abs=0.35)
    # Surgery's share of the weights is the share of elective stays that were surgery.
    surgery_leaves = set(groups.group_of(x[elective & surgery]).tolist())
    share = sum(w for n, w in weights.items() if n in surgery_leaves)
    assert share == pytest.approx(float(surgery[elective].mean()), abs=1e-9)
    # Missing-value routing, as for a stay with nothing recorded, would take one branch only.
    assert len(set(groups.group_of(booking[None, :]).tolist())) == 1


def test_a_booking_with_a_known_specialty_only_mixes_over_age() -> None:
    groups, x, days, elective, surgery = _groups()
    booking = np.array([1.0, 1.0, np.nan])   # elective cardiac surgery, age not known
    weights = groups.leaves_given(booking, "elective")
    mean = sum(w * groups.get(n).distribution.mean() for n, w in weights.items())
    assert mean == pytest.approx(float(days[elective & surgery].mean()), abs=0.6)
