"""Patient groups for whole stays: a log-rank survival tree on what is known at admission.

Each leaf of the tree is a group of stays with its Kaplan-Meier curve and a Coxian phase-type
distribution fitted by maximum likelihood with censoring (phases chosen by BIC). The groups serve
where a patient's scores are not known yet or a smooth curve is needed:

- stays still to come (emergency arrivals, booked electives): their stay distribution;
- planning (mean stay, offered load);
- the far tail of a current stay beyond the census intervals the hazard tree forecasts, through
  the closed-form remaining stay given the time already spent (``Coxian.conditional``).

The tree is scikit-survival's ``SurvivalTree`` (log-rank splitting; Segal 1988, Biometrics
44:35-47; LeBlanc & Crowley 1993, JASA 88:457-467), grown on durations rounded to whole hours so
that each node stores short arrays (METHODS.md section 1).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from functools import cached_property
from typing import Any

import numpy as np
import numpy.typing as npt
from sksurv.tree import SurvivalTree
from sksurv.util import Surv

from app.stats.kaplan_meier import KaplanMeier, kaplan_meier
from app.stats.phasetype import Coxian
from app.stats.phasetype_fit import CoxianSelection, select_coxian
from app.stats.survival_tree import FeatureSpec, TreeRules

__all__ = ["StayGroup", "StayGroups", "entry_on_hours", "fit_stay_groups", "round_up_to_hours"]

FloatArray = npt.NDArray[np.float64]
HOUR = 1.0 / 24.0


def round_up_to_hours(days: npt.ArrayLike, hours: int = 1) -> FloatArray:
    """Durations in days rounded up to a grid of ``hours`` hours, at least one grid step."""
    x = np.asarray(days, dtype=float)
    per_day = 24.0 / hours
    return np.maximum(np.ceil(np.round(x * per_day, 6)), 1.0) / per_day


def entry_on_hours(entry: npt.ArrayLike, days: FloatArray) -> FloatArray:
    """Delayed entries (days) rounded down to the hour grid, at most each stay's rounded
    duration ``days``: on the grid a stay stays under observation after its entry."""
    late = np.asarray(entry, dtype=float)
    return np.minimum(np.floor(np.round(late * 24.0, 6)) / 24.0, days)


# The stored Kaplan-Meier curves are for display: on a six-hour grid they stay small in the
# model JSON (a few hundred steps per group instead of thousands).
KM_GRID_HOURS = 6


@dataclass(frozen=True, eq=False)
class StayGroup:
    """One leaf of the admission tree.

    Attributes
    ----------
    node : int
        Leaf node id in the tree.
    rule : str
        The leaf's conditions in words.
    n_stays, n_ended : float
        Stays in the group and how many had ended by the training cut-off.
    longest_days : float
        The longest stay seen in the group (ended or not): curves beyond it are extrapolation.
    share : dict
        For each admission type, the share of that type's stays that fall in this group.
    km : KaplanMeier
        Kaplan-Meier estimate of the stay from admission (durations rounded up to six hours).
    coxian : CoxianSelection
        Coxian fits for p = 1, 2, ... phases with their BIC; ``coxian.best`` is used.
    """

    node: int
    rule: str
    n_stays: float
    n_ended: float
    longest_days: float
    share: Mapping[str, float]
    km: KaplanMeier
    coxian: CoxianSelection
    # The same stays' Coxian on the unit's discharge clock (operational days), for stays still
    # to come (app/forecast/newcomer_clock.py); None in models trained before it existed.
    clock_coxian: CoxianSelection | None = None

    @property
    def distribution(self) -> Coxian:
        """The BIC-chosen Coxian (rates per day)."""
        return self.coxian.best.distribution

    @property
    def clock_distribution(self) -> Coxian | None:
        """The BIC-chosen Coxian on the discharge clock (rates per operational day)."""
        return None if self.clock_coxian is None else self.clock_coxian.best.distribution

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict, exact round trip with :meth:`from_dict`."""
        return {"node": self.node, "rule": self.rule, "n_stays": self.n_stays,
                "n_ended": self.n_ended, "longest_days": self.longest_days,
                "share": dict(self.share), "km": self.km.to_dict(),
                "coxian": self.coxian.to_dict(),
                "bic_table": self.coxian.bic_table().to_dict(orient="list"),
                "phases": self.coxian.best.n_phases,
                **({} if self.clock_coxian is None
                   else {"clock_coxian": self.clock_coxian.to_dict()})}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> StayGroup:
        """Inverse of :meth:`to_dict` (the BIC table is recomputed from the fits)."""
        return cls(node=int(data["node"]), rule=str(data["rule"]),
                   n_stays=float(data["n_stays"]), n_ended=float(data["n_ended"]),
                   longest_days=float(data["longest_days"]),
                   share={str(k): float(v) for k, v in data["share"].items()},
                   km=KaplanMeier.from_dict(data["km"]),
                   coxian=CoxianSelection.from_dict(data["coxian"]),
                   clock_coxian=(CoxianSelection.from_dict(data["clock_coxian"])
                                 if "clock_coxian" in data else None))


@dataclass(frozen=True, eq=False)
class StayGroups:
    """The admission tree and its groups."""

    tree: TreeRules
    groups: tuple[StayGroup, ...]

    @cached_property
    def _by_node(self) -> dict[int, StayGroup]:
        return {g.node: g for g in self.groups}

    def group_of(self, x: npt.ArrayLike) -> npt.NDArray[np.int64]:
        """Leaf node id of each row of the admission covariates ``x``."""
        return self.tree.apply(x)

    def get(self, node: int) -> StayGroup:
        try:
            return self._by_node[int(node)]
        except KeyError:
            raise ValueError(f"node: {node!r} is not a leaf of the admission tree") from None

    def leaves_given(self, x: npt.ArrayLike, admission_type: str) -> dict[int, float]:
        """The groups a patient still to come may fall in, from the values known in advance.

        A booking records less than a stay (often no age, sex or source) and may name its
        specialty differently; those values are NaN in ``x`` (one row of admission
        covariates). Where the tree splits on one of them the booking may go either way, so
        every branch is followed, and each leaf reached is weighted by its share of the
        ``admission_type``'s training stays: the type's mixture (:meth:`mixture_sf`) kept to
        the leaves the known values allow. (For a stay NaN means "not recorded" and follows
        the tree's missing-value side, :meth:`group_of`.) Returns leaf id: weight, summing to 1.
        """
        row = np.asarray(x, dtype=float).reshape(-1)
        tree = self.tree
        leaves = set(int(n) for n in tree.leaves)
        stack, reached = [0], []
        while stack:
            node = stack.pop()
            if node in leaves:
                reached.append(node)
                continue
            value = row[int(tree.feature[node])]
            if np.isnan(value):
                stack += [int(tree.left[node]), int(tree.right[node])]
            else:
                stack.append(int(tree.left[node] if value <= tree.threshold[node]
                                 else tree.right[node]))
        weights = {n: float(self.get(n).share.get(admission_type, 0.0)) for n in reached}
        if sum(weights.values()) <= 0:  # no stay of that type there: by the leaves' sizes
            weights = {n: float(tree.weight[n]) for n in reached}
        total = sum(weights.values())
        return {n: w / total for n, w in sorted(weights.items()) if w > 0}

    def mixture_sf(self, admission_type: str, t: npt.ArrayLike) -> FloatArray:
        """Survival of a stay still to come of this admission type, not yet assigned to a group:
        the groups' Coxian curves mixed by the type's shares."""
        times = np.asarray(t, dtype=float)
        total = np.zeros(times.shape)
        weight = 0.0
        for g in self.groups:
            share = float(g.share.get(admission_type, 0.0))
            if share > 0:
                total = total + share * g.distribution.sf(times)
                weight += share
        if weight == 0:
            raise ValueError(f"admission_type: no stays of type {admission_type!r} in training")
        return total / weight

    @property
    def on_clock(self) -> bool:
        """Every group has its Coxian on the discharge clock too."""
        return all(g.clock_coxian is not None for g in self.groups)

    def with_clock_fits(self, x: npt.ArrayLike, clock_durations: npt.ArrayLike,
                        observed: npt.ArrayLike, *, max_phases: int = 10, n_starts: int = 2,
                        rng: int = 0, entry: npt.ArrayLike | None = None) -> StayGroups:
        """The groups with each one's Coxian also fitted on its stays' durations measured on
        the discharge clock (``clock_durations``, operational days; the stays the groups were
        fitted on, in the same order as ``x``); ``entry``: each stay's delayed entry on the
        same clock (as in :func:`fit_stay_groups`)."""
        days = round_up_to_hours(clock_durations)
        ended = np.asarray(observed, dtype=bool)
        late = entry_on_hours(np.zeros(days.size) if entry is None
                              else np.clip(np.asarray(entry, dtype=float), 0.0, None), days)
        node = self.group_of(x)
        out = []
        for g in self.groups:
            mask = node == g.node
            if not (mask & ended).any():
                mask = np.ones(days.size, dtype=bool)  # as the calendar fit: the unit's curve
            fit = select_coxian(**_hour_bins(days[mask], ended[mask], late[mask]),
                                max_phases=max_phases, n_starts=n_starts, rng=rng)
            out.append(dataclasses.replace(g, clock_coxian=fit))
        return StayGroups(tree=self.tree, groups=tuple(out))

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict, exact round trip with :meth:`from_dict`."""
        return {"tree": self.tree.to_dict(), "groups": [g.to_dict() for g in self.groups]}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> StayGroups:
        """Inverse of :meth:`to_dict`."""
        return cls(tree=TreeRules.from_dict(data["tree"]),
                   groups=tuple(StayGroup.from_dict(g) for g in data["groups"]))


def _hour_bins(days: FloatArray, ended: npt.NDArray[np.bool_], entry: FloatArray
               ) -> dict[str, Any]:
    """Durations rounded up to the hour moved back half an hour for the Coxian fit.

    A stay of k whole hours after rounding up lasted between k - 1 and k hours; the fit reads
    a duration as lying in the grid bin that starts there (``app.stats.phasetype``), so the
    rounded value would sit one bin late and lengthen the fitted mean by about half an hour.
    Returns the keyword arguments ``durations``, ``observed`` and ``entry`` of
    ``select_coxian``.
    """
    centred = days - HOUR / 2.0
    return {"durations": centred, "observed": ended, "entry": np.minimum(entry, centred)}


def _leaf_curve(days: FloatArray, ended: npt.NDArray[np.bool_], entry: FloatArray
                ) -> KaplanMeier:
    """The leaf's Kaplan-Meier curve on the display grid, entries rounded down to it."""
    shown = round_up_to_hours(days, KM_GRID_HOURS)
    per_step = 24.0 / KM_GRID_HOURS
    return kaplan_meier(shown, ended, entry=np.minimum(np.floor(entry * per_step) / per_step,
                                                       shown))


def fit_stay_groups(x: npt.ArrayLike, durations: npt.ArrayLike, observed: npt.ArrayLike,
                    admission_type: Sequence[str], features: Sequence[FeatureSpec], *,
                    max_depth: int = 2, min_samples_leaf: int = 100, max_phases: int = 10,
                    n_starts: int = 2, rng: int = 0,
                    entry: npt.ArrayLike | None = None) -> StayGroups:
    """Grow the log-rank tree on admission covariates and fit each leaf's curves.

    Parameters
    ----------
    x : array_like, shape (n, p)
        Admission covariates, coded as ``features`` say (NaN where missing).
    durations : array_like, shape (n,)
        Stay length in days, time so far for stays still in the unit.
    observed : array_like of bool, shape (n,)
        True where the stay had ended by the cut-off.
    admission_type : sequence of str, shape (n,)
        For the groups' shares of each admission type.
    features : sequence of FeatureSpec
    max_depth, min_samples_leaf : int
        Size of the tree (choose by validation).
    max_phases : int, default 10
        Largest Coxian tried in each group (fits stop once two in a row raise the BIC).
    n_starts : int, default 2
        Optimiser starts per fit (Erlang-like and the previous optimum; measured to give the
        same BIC choice as four starts on the demo units at half the time).
    rng : int
        Seed for the Coxian random starts.
    entry : array_like, shape (n,), optional
        Days each stay had already spent in the unit when the extract began (0 for stays
        admitted after it). Such left-truncated stays are only the ones that lasted into the
        extract: they are left out of growing the tree (scikit-survival's log-rank tree has no
        delayed entry, and dropping them keeps its splits unbiased at the cost of a few stays),
        and enter each leaf's Kaplan-Meier curve and Coxian likelihood conditioned on their
        time at entry.

    Returns
    -------
    StayGroups
    """
    matrix = np.asarray(x, dtype=float)
    days = round_up_to_hours(durations)
    ended = np.asarray(observed, dtype=bool)
    kinds = np.asarray([str(v) for v in admission_type], dtype=object)
    if matrix.shape[0] != days.size or days.size != ended.size or kinds.size != days.size:
        raise ValueError("x, durations, observed, admission_type: lengths differ")
    if not ended.any():
        raise ValueError("observed: needs at least one ended stay")
    raw = np.asarray(durations, dtype=float)
    late = np.zeros(days.size) if entry is None else np.asarray(entry, dtype=float)
    if late.shape != days.shape:
        raise ValueError(f"entry: shape {late.shape} does not match durations {days.shape}")
    if np.any(~np.isfinite(late) | (late < 0) | (late > raw + 1e-9)):
        raise ValueError("entry: must be finite, >= 0 and at most each stay's duration")
    late = entry_on_hours(late, days)
    seen_from_admission = late == 0
    if not (ended & seen_from_admission).any():
        raise ValueError("entry: no ended stay was seen from its admission")
    tree = SurvivalTree(max_depth=max_depth, min_samples_leaf=min_samples_leaf,
                        low_memory=False, random_state=0)
    tree.fit(matrix[seen_from_admission],
             Surv.from_arrays(event=ended[seen_from_admission], time=days[seen_from_admission]))
    weights = np.asarray(tree.tree_.weighted_n_node_samples, dtype=float)
    rules = TreeRules.from_sklearn(tree.tree_, features, value=weights)
    node = rules.apply(matrix)
    groups = []
    # Shares of each admission type by group (for stays still to come) count the stays seen
    # from admission: those admitted before the extract are there for having stayed long.
    # (A kind only truncated stays have still counts them.) Membership against the distinct
    # kinds: np.isin of two object arrays compares every pair (12 s at 20,000 stays).
    counted = seen_from_admission | ~np.isin(kinds, np.unique(kinds[seen_from_admission]))
    type_totals = {k: float(np.sum(counted & (kinds == k))) for k in sorted(set(kinds))}
    for leaf in rules.leaves:
        mask = node == leaf
        if not mask.any():
            continue
        leaf_days, leaf_ended, leaf_entry = days[mask], ended[mask], late[mask]
        if leaf_ended.any():
            selection = select_coxian(**_hour_bins(leaf_days, leaf_ended, leaf_entry),
                                      max_phases=max_phases, n_starts=n_starts, rng=rng)
        else:  # no ended stay: borrow the whole unit's curve rather than invent one
            selection = select_coxian(**_hour_bins(days, ended, late), max_phases=max_phases,
                                      n_starts=n_starts, rng=rng)
        groups.append(StayGroup(
            node=int(leaf), rule=rules.rule(int(leaf)), n_stays=float(mask.sum()),
            n_ended=float(leaf_ended.sum()), longest_days=float(leaf_days.max()),
            share={k: float(np.sum(mask & counted & (kinds == k)) / v)
                   for k, v in type_totals.items()},
            km=_leaf_curve(leaf_days, leaf_ended, leaf_entry),
            coxian=selection))
    return StayGroups(tree=rules, groups=tuple(groups))
