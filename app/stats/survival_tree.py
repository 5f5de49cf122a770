"""Readable trees for length of stay: a discharge-hazard tree over the unit's discharge profile.

The model
---------
A stay in the unit at instant u leaves at the rate

    hazard(u) = rate[leaf(x)] * hourly[h(u)] * weekday[d(u)] * stay_day[j(u)]

where ``x`` describes the patient at the start of a census interval (admission covariates, days
in the unit, the latest scores with their change and age, how many intervals ahead), ``leaf(x)``
is the leaf of one regression tree, and the *discharge profile* gives the unit's usual pattern:
``h`` the local clock hour, ``d`` the local weekday and ``j`` the day-of-stay bin (time since
admission). The chance of leaving between a < b, present at a, is
``1 - exp(-rate * E(a, b))`` with E the profile integrated over (a, b] (the exposure, in
"typical days"); the chance of still being in at a series of census instants is the product of
those over the intervals. This is the piecewise-exponential (Poisson) form of a discrete-time
hazard model (Holford 1980; Laird & Olivier 1981, JASA 76:231-240; cited from memory), and with
the day-of-stay factors as a baseline it is the relative-risk tree of LeBlanc & Crowley (1992,
Biometrics 48:411-425; cited from memory). Consequences:

- a partial first interval (a forecast at 08:00 with the census at midnight) counts only the
  share of the day's discharges still to come after 08:00 (METHODS.md section 8);
- discharges slow at weekends for every patient alike: a single tree need not split on the
  weekday in each branch for the weekend to show (one factor per weekday, fitted from the data,
  1 if the data show no weekend effect);
- the shape over the days of a stay is carried by the profile, so the tree's leaves are about
  the patient and stay few;
- a stay censored inside an interval contributes its time at risk exactly (no dropped rows).

Fitting: scikit-learn's CART under the Poisson deviance (``criterion="poisson"``, target
``events / exposure`` with weight ``exposure``) grows the tree; splits that leave fewer than
``min_stays_leaf`` distinct stays on a side are pruned (rows of one stay are near copies); the
leaf rates and the weekday and day-of-stay factors are then refitted jointly by iterative
proportional fitting, which solves the likelihood equations of the log-linear Poisson model
``events ~ leaf + weekday + stay_day + offset(log clock exposure)``; the tree is regrown once
on the updated exposure. Clock-hour factors are the hazard by clock hour (discharges per hour at
risk) shrunk towards flat.

``TreeRules`` holds any fitted scikit-learn or scikit-survival tree as plain arrays with the
feature specifications needed to say each leaf's rule in words, and round-trips through JSON.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd
from sklearn.tree import DecisionTreeRegressor

__all__ = [
    "DischargeProfile",
    "FeatureSpec",
    "HazardTreeModel",
    "PiecewiseHazardTree",
    "TreeRules",
    "cumulative_hazard_at",
    "order_categories",
    "time_of_cumulative_hazard",
]

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]

# 1970-01-01 (day 0 of the local-day axis) was a Thursday; weekday 0 is Monday.
_EPOCH_WEEKDAY = 3
_LEAF = -1


# ---------------------------------------------------------------------------------------------
# Features and their words
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class FeatureSpec:
    """How one column of the feature matrix is coded and said in words.

    Attributes
    ----------
    name : str
        Column name (``admission_type``, ``sofa``, ``sofa_change``, ...).
    label : str
        Words for the rule text (``"SOFA"``, ``"days in the unit"``).
    kind : {"number", "category", "flag"}
        ``category`` columns hold the index of the value in ``categories`` (NaN when missing or
        unknown); ``flag`` columns hold 0/1.
    categories : tuple of str
        For ``category``: the values in code order (codes 0, 1, ...).
    integer : bool
        For ``number``: all values seen in training were whole numbers, so thresholds are said
        as whole numbers ("9 or more").
    has_missing : bool
        Missing values were seen in training, so rules say where they went.
    template : str
        For ``category``: how one value is said, ``{}`` standing for the value(s), for example
        ``"{} admission"``. Empty: ``"<label> {}"``.
    """

    name: str
    label: str
    kind: str = "number"
    categories: tuple[str, ...] = ()
    integer: bool = False
    has_missing: bool = False
    template: str = ""

    def __post_init__(self) -> None:
        if self.kind not in ("number", "category", "flag"):
            raise ValueError(f"kind: must be number, category or flag, got {self.kind!r}")
        object.__setattr__(self, "categories", tuple(str(c) for c in self.categories))

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict, exact round trip with :meth:`from_dict`."""
        return {"name": self.name, "label": self.label, "kind": self.kind,
                "categories": list(self.categories), "integer": self.integer,
                "has_missing": self.has_missing, "template": self.template}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> FeatureSpec:
        """Inverse of :meth:`to_dict`."""
        return cls(name=str(data["name"]), label=str(data["label"]), kind=str(data["kind"]),
                   categories=tuple(data["categories"]), integer=bool(data["integer"]),
                   has_missing=bool(data["has_missing"]), template=str(data["template"]))

    def encode(self, values: Sequence[Any] | npt.ArrayLike) -> FloatArray:
        """Column values as the tree sees them (category codes; NaN for missing/unknown)."""
        if self.kind == "category":
            lookup = {c: float(i) for i, c in enumerate(self.categories)}
            keys = _category_keys(values)
            return np.fromiter((lookup.get(k, np.nan) for k in keys), dtype=float,
                               count=len(keys))
        try:  # numbers and missing values (None, NaN) convert directly
            return np.asarray(values, dtype=float).reshape(-1)
        except (TypeError, ValueError):  # text among them: unreadable values are missing
            return np.asarray(pd.to_numeric(pd.Series(np.asarray(values, dtype=object)),
                                            errors="coerce"), dtype=float)


def _category_keys(values: Sequence[Any] | npt.ArrayLike) -> npt.NDArray[np.object_]:
    """Values as text, missing (None, NaN, empty) as ""."""
    array = np.asarray(values, dtype=object).reshape(-1)
    missing = pd.isna(array)
    keys = np.array([str(v) for v in array], dtype=object)
    keys[missing] = ""
    return keys


def order_categories(values: Sequence[Any], events: npt.ArrayLike,
                     exposure: npt.ArrayLike) -> tuple[str, ...]:
    """Categories in increasing order of their event rate (events / exposure).

    For a two-class or Poisson target, ordering a categorical feature's values by their mean
    response and splitting the ordered codes finds the best split over all subsets (Breiman et
    al. 1984, Classification and Regression Trees, section 9.4; Fisher 1958, cited from memory),
    so the tree can say "specialty cardiac-surgery or vascular" while splitting on one number.
    Rates are shrunk towards the overall rate with one pseudo-event so that rare values sort
    near the middle. Missing values are left out (they are NaN codes).
    """
    keys = _category_keys(values)
    d = np.asarray(events, dtype=float)
    e = np.asarray(exposure, dtype=float)
    total_rate = d.sum() / max(e.sum(), 1e-12)
    sums = pd.DataFrame({"key": keys, "d": d, "e": e}).groupby("key", sort=True)[["d", "e"]].sum()
    sums = sums.loc[sums.index != ""]
    rates = (sums["d"] + 1.0) / (sums["e"] + 1.0 / max(total_rate, 1e-12))
    order = np.argsort(rates.to_numpy(), kind="mergesort")
    return tuple(str(sums.index[i]) for i in order)


def _format_number(value: float) -> str:
    if abs(value) >= 10:
        return f"{value:.0f}"
    if abs(value) >= 1:
        return f"{value:.1f}".rstrip("0").rstrip(".")
    return f"{value:.2f}".rstrip("0").rstrip(".")


# ---------------------------------------------------------------------------------------------
# Tree structure and rules
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class TreeRules:
    """A fitted binary tree as plain arrays, with the words for each leaf.

    Attributes
    ----------
    features : tuple of FeatureSpec
        One per column of the feature matrix.
    left, right : numpy.ndarray of int, shape (n_nodes,)
        Child node ids (-1 at leaves).
    feature : numpy.ndarray of int, shape (n_nodes,)
        Column split on (-1 at leaves).
    threshold : numpy.ndarray of float, shape (n_nodes,)
        Go left when ``x <= threshold``.
    missing_left : numpy.ndarray of bool, shape (n_nodes,)
        Where a missing value goes.
    value : numpy.ndarray of float, shape (n_nodes,)
        A number per node (for the hazard tree: the discharge rate per typical day).
    weight : numpy.ndarray of float, shape (n_nodes,)
        Training rows (or exposure) reaching the node.
    """

    features: tuple[FeatureSpec, ...]
    left: IntArray
    right: IntArray
    feature: IntArray
    threshold: FloatArray
    missing_left: npt.NDArray[np.bool_]
    value: FloatArray
    weight: FloatArray

    @classmethod
    def from_sklearn(cls, tree: Any, features: Sequence[FeatureSpec],
                     value: npt.ArrayLike | None = None) -> TreeRules:
        """From a fitted ``sklearn.tree._tree.Tree`` (also what scikit-survival's tree holds)."""
        n = tree.node_count
        if value is None:
            raw = np.asarray(tree.value, dtype=float).reshape(n, -1)
            value = raw[:, 0]
        return cls(
            features=tuple(features),
            left=np.asarray(tree.children_left, dtype=np.int64).copy(),
            right=np.asarray(tree.children_right, dtype=np.int64).copy(),
            feature=np.where(np.asarray(tree.children_left) == _LEAF, -1,
                             np.asarray(tree.feature)).astype(np.int64),
            threshold=np.where(np.asarray(tree.children_left) == _LEAF, np.nan,
                               np.asarray(tree.threshold, dtype=float)),
            missing_left=np.asarray(tree.missing_go_to_left, dtype=bool).copy(),
            value=np.asarray(value, dtype=float).copy(),
            weight=np.asarray(tree.weighted_n_node_samples, dtype=float).copy(),
        )

    # -- structure ---------------------------------------------------------------------------

    @property
    def n_nodes(self) -> int:
        return int(self.left.size)

    @cached_property
    def leaves(self) -> IntArray:
        """Node ids of the leaves, in node order."""
        return np.flatnonzero(self.left == _LEAF).astype(np.int64)

    @cached_property
    def _parents(self) -> dict[int, tuple[int, bool]]:
        parents: dict[int, tuple[int, bool]] = {}
        for node in range(self.n_nodes):
            if self.left[node] != _LEAF:
                parents[int(self.left[node])] = (node, True)
                parents[int(self.right[node])] = (node, False)
        return parents

    def apply(self, x: npt.ArrayLike) -> IntArray:
        """Leaf node id for each row of ``x`` (shape (n, n_features)); NaN follows missing_left."""
        matrix = np.asarray(x, dtype=float)
        if matrix.ndim != 2 or matrix.shape[1] != len(self.features):
            raise ValueError(f"x: expected shape (n, {len(self.features)}), got {matrix.shape}")
        node = np.zeros(matrix.shape[0], dtype=np.int64)
        active = np.flatnonzero(self.left[node] != _LEAF)
        while active.size:
            current = node[active]
            values = matrix[active, self.feature[current]]
            missing = np.isnan(values)
            go_left = np.where(missing, self.missing_left[current],
                               values <= self.threshold[current])
            node[active] = np.where(go_left, self.left[current], self.right[current])
            active = active[self.left[node[active]] != _LEAF]
        return node

    def path(self, node: int) -> list[tuple[int, bool]]:
        """(split node, went left) pairs from the root down to ``node``."""
        steps: list[tuple[int, bool]] = []
        while node in self._parents:
            parent, went_left = self._parents[node]
            steps.append((parent, went_left))
            node = parent
        return steps[::-1]

    def rule(self, node: int, omit: Sequence[str] = ()) -> str:
        """The conditions leading to ``node`` in plain words, one clause per feature.

        Conditions on one feature are merged into a range or a set ("SOFA 6 to 8", "specialty
        cardiac-surgery or vascular"); "or not recorded" is added where missing values follow
        the branch and the feature had missing values in training. Features named in ``omit``
        are left out of the words. With no condition left the rule is "all stays".
        """
        if not 0 <= node < self.n_nodes:
            raise ValueError(f"node: must be in 0..{self.n_nodes - 1}, got {node!r}")
        skipped = {i for i, f in enumerate(self.features) if f.name in omit}
        lower: dict[int, float] = {}
        upper: dict[int, float] = {}
        missing_ok: dict[int, bool] = {}
        order: list[int] = []
        for split, went_left in self.path(node):
            j = int(self.feature[split])
            if j in skipped:
                continue
            t = float(self.threshold[split])
            if j not in order:
                order.append(j)
            if went_left:
                upper[j] = min(upper.get(j, math.inf), t)
            else:
                lower[j] = max(lower.get(j, -math.inf), t)
            follows = bool(self.missing_left[split]) == went_left
            missing_ok[j] = missing_ok.get(j, True) and follows
        if not order:
            return "all stays"
        clauses = [self._clause(j, lower.get(j, -math.inf), upper.get(j, math.inf),
                                missing_ok[j]) for j in order]
        return ", ".join(clauses)

    def _clause(self, j: int, lo: float, hi: float, missing_ok: bool) -> str:
        spec = self.features[j]
        if spec.kind == "category":
            codes = [i for i in range(len(spec.categories)) if lo < i <= hi]
            chosen = [spec.categories[i] for i in codes]
            others = [c for c in spec.categories if c not in chosen]
            if len(chosen) <= max(1, len(others)) or not others:
                words = " or ".join(chosen) if chosen else "none"
                text = spec.template.format(words) if spec.template else f"{spec.label} {words}"
            else:
                words = " or ".join(others)
                text = (spec.template.format("not " + words) if spec.template
                        else f"{spec.label} not {words}")
        elif spec.kind == "flag":
            if lo >= 0.0 and hi >= 1.0:
                text = f"{spec.label}: yes"
            elif hi < 1.0 and lo < 0.0:
                text = f"{spec.label}: no"
            else:
                text = f"{spec.label}: yes or no"
        else:
            text = f"{spec.label} {self._range_words(spec, lo, hi)}"
        if missing_ok and spec.has_missing:
            text += " or not recorded"
        return text

    @staticmethod
    def _range_words(spec: FeatureSpec, lo: float, hi: float) -> str:
        if spec.integer:
            low = math.floor(lo) + 1 if math.isfinite(lo) else None
            high = math.floor(hi) if math.isfinite(hi) else None
            if low is not None and high is not None:
                return f"{low}" if low == high else f"{low} to {high}"
            if low is not None:
                return f"{low} or more"
            return f"{high} or less"
        if math.isfinite(lo) and math.isfinite(hi):
            return f"over {_format_number(lo)} up to {_format_number(hi)}"
        if math.isfinite(lo):
            return f"over {_format_number(lo)}"
        return f"{_format_number(hi)} or less"

    def pruned(self, keep_split: npt.NDArray[np.bool_]) -> tuple[TreeRules, IntArray]:
        """The tree with every split not in ``keep_split`` (and all below it) made a leaf.

        Returns the new tree (nodes renumbered in depth-first order) and, for each old node, its
        new id (-1 for nodes removed).
        """
        new_id = np.full(self.n_nodes, -1, dtype=np.int64)
        order: list[int] = []
        stack = [0]
        while stack:
            node = stack.pop()
            new_id[node] = len(order)
            order.append(node)
            if self.left[node] != _LEAF and keep_split[node]:
                stack.append(int(self.right[node]))
                stack.append(int(self.left[node]))
        old = np.asarray(order, dtype=np.int64)
        split = np.array([self.left[o] != _LEAF and bool(keep_split[o]) for o in old], dtype=bool)
        left = np.where(split, new_id[np.where(split, self.left[old], 0)], _LEAF)
        right = np.where(split, new_id[np.where(split, self.right[old], 0)], _LEAF)
        tree = TreeRules(
            features=self.features, left=left.astype(np.int64), right=right.astype(np.int64),
            feature=np.where(split, self.feature[old], -1).astype(np.int64),
            threshold=np.where(split, self.threshold[old], np.nan),
            missing_left=self.missing_left[old].copy(), value=self.value[old].copy(),
            weight=self.weight[old].copy())
        return tree, new_id

    # -- JSON --------------------------------------------------------------------------------

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict, exact round trip with :meth:`from_dict` (NaN thresholds as None)."""
        return {
            "features": [f.to_dict() for f in self.features],
            "left": [int(v) for v in self.left],
            "right": [int(v) for v in self.right],
            "feature": [int(v) for v in self.feature],
            "threshold": [None if math.isnan(v) else float(v) for v in self.threshold],
            "missing_left": [bool(v) for v in self.missing_left],
            "value": [float(v) for v in self.value],
            "weight": [float(v) for v in self.weight],
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> TreeRules:
        """Inverse of :meth:`to_dict`."""
        return cls(
            features=tuple(FeatureSpec.from_dict(f) for f in data["features"]),
            left=np.asarray(data["left"], dtype=np.int64),
            right=np.asarray(data["right"], dtype=np.int64),
            feature=np.asarray(data["feature"], dtype=np.int64),
            threshold=np.array([np.nan if v is None else v for v in data["threshold"]],
                               dtype=float),
            missing_left=np.asarray(data["missing_left"], dtype=bool),
            value=np.asarray(data["value"], dtype=float),
            weight=np.asarray(data["weight"], dtype=float),
        )


# ---------------------------------------------------------------------------------------------
# The discharge profile: clock hour, weekday and day of stay
# ---------------------------------------------------------------------------------------------

# Day-of-stay bins (days since admission): fine early, where discharges ramp up, coarse late.
DEFAULT_STAY_EDGES = (0.25, 0.5, 1.0, 1.5, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 10.0, 12.0, 14.0,
                      17.0, 21.0, 28.0, 42.0)


@dataclass(frozen=True, eq=False)
class DischargeProfile:
    """The unit's usual discharge rate by local clock hour, weekday and day of stay.

    The hazard of a stay at instant u is ``rate[leaf] * profile(u)`` with

        profile(u) = hourly[h(u)] / mean(hourly) * weekday[d(u)] * stay_day[j(u)]

    where h is the local clock hour (bins (h, h + 1], right-closed, so a discharge at 00:00
    belongs to the day before, like a census at 00:00 that no longer counts it), d the local
    weekday (Monday 0) and j the day-of-stay bin of the time since admission. A whole day at
    factors 1 counts one "typical day" of exposure.

    Time is in *local days*: wall-clock time in the site's zone as days since 1970-01-01 00:00.

    Attributes
    ----------
    hourly : numpy.ndarray, shape (24,)
        Relative intensity by clock hour (only ratios matter).
    weekday : numpy.ndarray, shape (7,)
        Factor by weekday, Monday first.
    stay_edges : numpy.ndarray, shape (B - 1,)
        Inner edges of the day-of-stay bins, in days since admission, increasing.
    stay_day : numpy.ndarray, shape (B,)
        Factor by day-of-stay bin.
    """

    hourly: FloatArray
    weekday: FloatArray
    stay_edges: FloatArray
    stay_day: FloatArray

    def __post_init__(self) -> None:
        values = {name: np.asarray(getattr(self, name), dtype=float)
                  for name in ("hourly", "weekday", "stay_edges", "stay_day")}
        for name, size in (("hourly", 24), ("weekday", 7)):
            v = values[name]
            if v.shape != (size,) or not np.all(v > 0) or not np.all(np.isfinite(v)):
                raise ValueError(f"{name}: needs {size} positive finite values")
        edges, factors = values["stay_edges"], values["stay_day"]
        if edges.ndim != 1 or np.any(np.diff(edges) <= 0) or np.any(edges <= 0):
            raise ValueError("stay_edges: must be positive and increasing")
        if factors.shape != (edges.size + 1,) or not np.all(factors > 0):
            raise ValueError("stay_day: needs one positive factor per bin (len(stay_edges) + 1)")
        for name, v in values.items():
            object.__setattr__(self, name, v)

    @classmethod
    def flat(cls, stay_edges: Sequence[float] = DEFAULT_STAY_EDGES) -> DischargeProfile:
        """All factors 1: exposure is elapsed time."""
        edges = np.asarray(stay_edges, dtype=float)
        return cls(np.ones(24), np.ones(7), edges, np.ones(edges.size + 1))

    @cached_property
    def _hour_share(self) -> FloatArray:
        # Normalised here, not in __post_init__, so stored values round-trip exactly.
        return self.hourly / self.hourly.sum()

    @cached_property
    def _hour_cumulative(self) -> FloatArray:
        return np.concatenate([[0.0], np.cumsum(self._hour_share)])

    def within_day(self, fraction: npt.ArrayLike) -> FloatArray:
        """Share of a day's clock intensity between 00:00 and ``fraction`` of the day."""
        f = np.clip(np.asarray(fraction, dtype=float), 0.0, 1.0) * 24.0
        hour = np.minimum(np.floor(f).astype(np.int64), 23)
        return self._hour_cumulative[hour] + self._hour_share[hour] * (f - hour)

    def stay_bin(self, days_in: npt.ArrayLike) -> IntArray:
        """Day-of-stay bin of a time since admission (right-closed like the clock)."""
        return np.searchsorted(self.stay_edges, np.asarray(days_in, dtype=float), side="left")

    def pieces(self, start: npt.ArrayLike, stop: npt.ArrayLike, days_in: npt.ArrayLike
               ) -> tuple[IntArray, IntArray, IntArray, FloatArray]:
        """Split each [start, stop) at local midnights and day-of-stay edges.

        Parameters
        ----------
        start, stop : array_like, shape (n,)
            Local days, ``stop >= start``.
        days_in : array_like, shape (n,)
            Days since admission at ``start``.

        Returns
        -------
        row, weekday, stay_bin : numpy.ndarray of int, shape (P,)
        share : numpy.ndarray, shape (P,)
            Clock-hour share of a day in each piece (weekday and stay factors not applied).
        """
        a = np.asarray(start, dtype=float)
        b = np.asarray(stop, dtype=float)
        d0 = np.asarray(days_in, dtype=float)
        n = a.size
        if n == 0:
            zi = np.zeros(0, dtype=np.int64)
            return zi, zi, zi, np.zeros(0)
        span = int(np.ceil(np.max(b - a))) + 1
        midnights = np.floor(a)[:, None] + np.arange(1, span + 1)[None, :]
        # Only the day-of-stay edges inside each row's span, padded with +inf.
        first = np.searchsorted(self.stay_edges, d0, side="right")
        last = np.searchsorted(self.stay_edges, d0 + (b - a), side="left")
        width = int(np.max(last - first, initial=0))
        padded = np.concatenate([self.stay_edges, np.full(width + 1, np.inf)])
        index = first[:, None] + np.arange(width)[None, :]
        edges = a[:, None] + (padded[index] - d0[:, None])
        cuts = np.concatenate([a[:, None], midnights, edges, b[:, None]], axis=1)
        cuts = np.where((cuts > a[:, None]) & (cuts < b[:, None]), cuts, np.inf)
        cuts[:, 0] = a
        cuts = np.sort(cuts, axis=1)
        cuts = np.where(np.isinf(cuts), b[:, None], cuts)
        cuts = np.concatenate([cuts, b[:, None]], axis=1)
        lo, hi = cuts[:, :-1], cuts[:, 1:]
        keep = hi > lo
        row = np.broadcast_to(np.arange(n)[:, None], lo.shape)[keep]
        lo, hi = lo[keep], hi[keep]
        day = np.floor(lo)
        share = self.within_day(hi - day) - self.within_day(lo - day)
        weekday = (day.astype(np.int64) + _EPOCH_WEEKDAY) % 7
        stay_bin = self.stay_bin(d0[row] + (0.5 * (lo + hi) - a[row]))
        return row.astype(np.int64), weekday, stay_bin, share

    def exposure(self, start: npt.ArrayLike, stop: npt.ArrayLike,
                 days_in: npt.ArrayLike) -> FloatArray:
        """Typical days of exposure in each [start, stop) (profile integrated over it)."""
        a = np.asarray(start, dtype=float)
        row, weekday, stay_bin, share = self.pieces(a, stop, days_in)
        values = share * self.weekday[weekday] * self.stay_day[stay_bin]
        return np.asarray(np.bincount(row, weights=values, minlength=a.size), dtype=float)

    def intensity(self, at: npt.ArrayLike, days_in: npt.ArrayLike) -> FloatArray:
        """Profile value (per typical day) at local instants, right-continuous from the left
        (an instant on a bin edge belongs to the bin before)."""
        u = np.asarray(at, dtype=float)
        day = np.ceil(u) - 1.0
        hour = np.clip(np.ceil((u - day) * 24.0).astype(np.int64) - 1, 0, 23)
        weekday = (day.astype(np.int64) + _EPOCH_WEEKDAY) % 7
        return (24.0 * self._hour_share[hour] * self.weekday[weekday]
                * self.stay_day[self.stay_bin(days_in)])

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict, exact round trip with :meth:`from_dict`."""
        return {"hourly": [float(v) for v in self.hourly],
                "weekday": [float(v) for v in self.weekday],
                "stay_edges": [float(v) for v in self.stay_edges],
                "stay_day": [float(v) for v in self.stay_day]}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> DischargeProfile:
        """Inverse of :meth:`to_dict`."""
        return cls(hourly=np.asarray(data["hourly"], dtype=float),
                   weekday=np.asarray(data["weekday"], dtype=float),
                   stay_edges=np.asarray(data["stay_edges"], dtype=float),
                   stay_day=np.asarray(data["stay_day"], dtype=float))


def _hourly_profile(start: FloatArray, stop: FloatArray, event: npt.NDArray[np.bool_],
                    weight: FloatArray, pseudo_events: float = 2.0) -> FloatArray:
    """Hazard by clock hour (events per hour at risk), relative to its mean, shrunk to flat.

    Each hour gets ``pseudo_events / 24`` discharges at the overall rate, so an hour with none
    keeps a small positive intensity (a discharge at 03:00 is rare, not impossible).
    """
    at_risk = np.zeros(24)
    full = np.floor(stop - start)
    at_risk += float(np.sum(weight * full)) / 24.0  # a whole day gives each hour 1/24 day
    rest_start = start + full
    frac0 = (rest_start - np.floor(rest_start)) * 24.0
    frac1 = frac0 + (stop - rest_start) * 24.0  # may pass 24: wrap into the next day
    for h in range(24):
        for shift in (0.0, 24.0):
            lo = np.clip(frac0, h + shift, h + shift + 1)
            hi = np.clip(frac1, h + shift, h + shift + 1)
            at_risk[h] += float(np.sum(weight * (hi - lo))) / 24.0
    ev_day = np.ceil(stop[event]) - 1.0
    hour = np.clip(np.ceil((stop[event] - ev_day) * 24.0).astype(np.int64) - 1, 0, 23)
    counts = np.bincount(hour, weights=weight[event], minlength=24)
    overall = counts.sum() / max(at_risk.sum(), 1e-12)
    per_hour = pseudo_events / 24.0
    rate = (counts + per_hour) / (at_risk + per_hour / max(overall, 1e-12))
    rate = np.maximum(rate / max(overall, 1e-12), 1e-3)
    return rate / rate.mean()


# ---------------------------------------------------------------------------------------------
# Survival along census intervals
# ---------------------------------------------------------------------------------------------


def _interval_exposure(profile: DischargeProfile, bounds: FloatArray,
                       days_in: FloatArray) -> FloatArray:
    n, k1 = bounds.shape
    starts = bounds[:, :-1].ravel()
    stops = bounds[:, 1:].ravel()
    d = (days_in[:, None] + (bounds[:, :-1] - bounds[:, :1])).ravel()
    return profile.exposure(starts, stops, d).reshape(n, k1 - 1)


def cumulative_hazard_at(profile: DischargeProfile, rates: npt.ArrayLike, bounds: npt.ArrayLike,
                         days_in: npt.ArrayLike, query: npt.ArrayLike) -> FloatArray:
    """Cumulative hazard at query instants along consecutive intervals with their own rates.

    Parameters
    ----------
    profile : DischargeProfile
    rates : array_like, shape (n, K)
        Rate in interval k, (bounds[:, k], bounds[:, k + 1]].
    bounds : array_like, shape (n, K + 1)
        Interval bounds in local days, increasing; ``bounds[:, 0]`` is the landmark.
    days_in : array_like, shape (n,)
        Days since admission at the landmark.
    query : array_like, shape (n, Q)
        Local-day instants at or after the landmark. Beyond the last bound the last rate goes on.

    Returns
    -------
    numpy.ndarray, shape (n, Q)
        H(query); the probability of still being in the unit is exp(-H).
    """
    r = np.asarray(rates, dtype=float)
    b = np.asarray(bounds, dtype=float)
    d = np.asarray(days_in, dtype=float)
    q = np.asarray(query, dtype=float)
    n, k = r.shape
    if b.shape != (n, k + 1) or q.ndim != 2 or q.shape[0] != n or d.shape != (n,):
        raise ValueError(f"bounds, days_in, query: shapes {b.shape}, {d.shape}, {q.shape} "
                         f"do not fit rates {r.shape}")
    h_bounds = np.concatenate(
        [np.zeros((n, 1)), np.cumsum(r * _interval_exposure(profile, b, d), axis=1)], axis=1)
    step = (b[:, None, 1:k] < q[:, :, None]).sum(axis=2)  # interval index 0..K-1
    rows = np.broadcast_to(np.arange(n)[:, None], step.shape)
    start = b[rows, step]
    stop = np.maximum(q, start)
    partial = profile.exposure(start.ravel(), stop.ravel(),
                               (d[rows] + (start - b[rows, 0])).ravel()).reshape(q.shape)
    return h_bounds[rows, step] + r[rows, step] * partial


def time_of_cumulative_hazard(profile: DischargeProfile, rates: npt.ArrayLike,
                              bounds: npt.ArrayLike, days_in: npt.ArrayLike,
                              target: float) -> FloatArray:
    """First local-day instant where the cumulative hazard reaches ``target`` (NaN if not
    within the bounds). With ``target = log 2`` this is the median time of leaving. Found by
    bisection inside the interval where it is reached (exposure is increasing in time)."""
    r = np.asarray(rates, dtype=float)
    b = np.asarray(bounds, dtype=float)
    d = np.asarray(days_in, dtype=float)
    n, k = r.shape
    h_bounds = np.concatenate(
        [np.zeros((n, 1)), np.cumsum(r * _interval_exposure(profile, b, d), axis=1)], axis=1)
    reached = h_bounds[:, 1:] >= target
    out = np.full(n, np.nan)
    has = reached.any(axis=1)
    if not has.any():
        return out
    rows = np.flatnonzero(has)
    step = np.argmax(reached[has], axis=1)
    need = (target - h_bounds[rows, step]) / np.maximum(r[rows, step], 1e-300)
    lo = b[rows, step].copy()
    hi = b[rows, step + 1].copy()
    start_days = d[rows] + (lo - b[rows, 0])
    base = lo.copy()
    for _ in range(24):  # 2^-24 of a day is 5 ms
        mid = 0.5 * (lo + hi)
        enough = profile.exposure(base, mid, start_days) >= need
        hi = np.where(enough, mid, hi)
        lo = np.where(enough, lo, mid)
    out[rows] = hi
    return out


# ---------------------------------------------------------------------------------------------
# The hazard tree
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class HazardTreeModel:
    """A fitted discharge-hazard tree: leaf rates relative to the unit's usual profile.

    Attributes
    ----------
    tree : TreeRules
        ``tree.value`` at a leaf is its discharge rate per typical day (profile factors 1).
    profile : DischargeProfile
    rate_prior : float
        Pseudo-exposure (typical days) at the overall rate added to every leaf.
    info : dict
        Training summary (rows, discharges, exposure).
    """

    tree: TreeRules
    profile: DischargeProfile
    rate_prior: float = 1.0
    info: Mapping[str, Any] = field(default_factory=dict)

    def rate(self, x: npt.ArrayLike) -> FloatArray:
        """Discharge rate per typical day for each row of ``x``."""
        return self.tree.value[self.tree.apply(x)]

    def leaf(self, x: npt.ArrayLike) -> IntArray:
        """Leaf node id of each row of ``x``."""
        return self.tree.apply(x)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict, exact round trip with :meth:`from_dict`."""
        return {"tree": self.tree.to_dict(), "profile": self.profile.to_dict(),
                "rate_prior": self.rate_prior, "info": dict(self.info)}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> HazardTreeModel:
        """Inverse of :meth:`to_dict`."""
        return cls(tree=TreeRules.from_dict(data["tree"]),
                   profile=DischargeProfile.from_dict(data["profile"]),
                   rate_prior=float(data["rate_prior"]), info=dict(data["info"]))


class PiecewiseHazardTree:
    """Discharge-hazard regression tree over the unit's discharge profile (scikit-learn
    contract).

    The hazard is ``rate[leaf(x)] * profile(u)``: clock hour, weekday and day of stay enter as
    multiplicative factors common to all leaves, fitted jointly with the leaf rates; the tree
    splits only on the patient. With the day-of-stay factors as the baseline this is the
    relative-risk tree of LeBlanc & Crowley (1992, Biometrics 48:411-425; cited from memory),
    which grows the tree by the Poisson deviance of events against the baseline cumulative
    hazard, here with time-varying features on interval rows.

    Parameters
    ----------
    max_depth : int, default 4
        Depth of the tree; choose by validation split by stay and by time.
    min_samples_leaf : int, default 200
        Fewest rows in a leaf while growing.
    min_stays_leaf : int, default 1
        Fewest distinct stays on each side of a split (needs ``groups`` in ``fit``): splits
        below it are pruned, because the rows of one stay are near copies and a leaf of many
        rows from a handful of long stays does not generalise.
    rounds : int, default 2
        Grow-then-refit rounds (the exposure depends on the profile, the profile on the leaves).
    rate_prior : float, default 1.0
        Pseudo-exposure in typical days at the overall rate added to each leaf, so a leaf with
        no discharges keeps a small positive rate.
    profile_prior : float, default 2.0
        Pseudo-discharges at factor 1 added to each weekday and day-of-stay bin.
    stay_edges : sequence of float
        Inner edges of the day-of-stay bins in days.
    fit_clock : bool, default True
        Fit the clock-hour and weekday factors. False keeps them at 1 (data without clock
        times, such as whole-day lengths of stay).
    fit_stay_day : bool, default True
        Fit the day-of-stay factors (the baseline hazard); False keeps them at 1.
    random_state : int, default 0

    Attributes
    ----------
    model_ : HazardTreeModel
    log_likelihood_ : float
        Piecewise-exponential log-likelihood of the training rows.
    """

    def __init__(self, *, max_depth: int = 4, min_samples_leaf: int = 200,
                 min_stays_leaf: int = 1, rounds: int = 2, rate_prior: float = 1.0,
                 profile_prior: float = 2.0, stay_edges: Sequence[float] = DEFAULT_STAY_EDGES,
                 fit_clock: bool = True, fit_stay_day: bool = True,
                 random_state: int = 0) -> None:
        self.max_depth = max_depth
        self.min_samples_leaf = min_samples_leaf
        self.min_stays_leaf = min_stays_leaf
        self.rounds = rounds
        self.rate_prior = rate_prior
        self.profile_prior = profile_prior
        self.stay_edges = stay_edges
        self.fit_clock = fit_clock
        self.fit_stay_day = fit_stay_day
        self.random_state = random_state

    def fit(self, x: npt.ArrayLike, event: npt.ArrayLike, start: npt.ArrayLike,
            stop: npt.ArrayLike, days_in: npt.ArrayLike, *, features: Sequence[FeatureSpec],
            groups: npt.ArrayLike | None = None,
            sample_weight: npt.ArrayLike | None = None) -> PiecewiseHazardTree:
        """Fit on interval rows.

        Parameters
        ----------
        x : array_like, shape (n, p)
            Features at the start of each row's interval (NaN where missing).
        event : array_like of bool, shape (n,)
            The stay left at ``stop``.
        start, stop : array_like, shape (n,)
            Time at risk of each row in local days (``stop`` is the discharge, the interval's
            end, or the training cut-off, whichever comes first).
        days_in : array_like, shape (n,)
            Days since admission at ``start``.
        features : sequence of FeatureSpec, length p
        groups : array_like of int, shape (n,), optional
            Stay of each row, for ``min_stays_leaf``.
        sample_weight : array_like, shape (n,), optional
            Row weights (for example inverse sampling probabilities).

        Returns
        -------
        self
        """
        matrix = np.asarray(x, dtype=np.float32)
        d = np.asarray(event, dtype=bool)
        a = np.asarray(start, dtype=float)
        b = np.asarray(stop, dtype=float)
        d0 = np.asarray(days_in, dtype=float)
        n = matrix.shape[0]
        if matrix.ndim != 2 or matrix.shape[1] != len(features):
            raise ValueError(f"x: expected shape (n, {len(features)}), got {matrix.shape}")
        if not (d.shape == a.shape == b.shape == d0.shape == (n,)):
            raise ValueError("event, start, stop, days_in: must be 1-D, one value per row of x")
        if n == 0 or not d.any():
            raise ValueError("event: needs at least one discharge")
        if np.any(~(b > a)):
            raise ValueError("stop: must be after start in every row")
        if self.max_depth < 1 or self.min_samples_leaf < 1 or self.min_stays_leaf < 1:
            raise ValueError(f"max_depth, min_samples_leaf, min_stays_leaf: must be >= 1, got "
                             f"{self.max_depth!r}, {self.min_samples_leaf!r}, "
                             f"{self.min_stays_leaf!r}")
        s = np.ones(n) if sample_weight is None else np.asarray(sample_weight, dtype=float)
        stay = (np.arange(n) if groups is None
                else pd.factorize(np.asarray(groups))[0].astype(np.int64))
        edges = np.asarray(self.stay_edges, dtype=float)
        hourly = _hourly_profile(a, b, d, s) if self.fit_clock else np.ones(24)
        profile = DischargeProfile(hourly, np.ones(7), edges, np.ones(edges.size + 1))
        row, weekday, stay_bin, share = profile.pieces(a, b, d0)
        n_bins = edges.size + 1
        dw = d * s
        ev_day = (np.ceil(b[d]) - 1.0).astype(np.int64)
        events_weekday = np.bincount((ev_day + _EPOCH_WEEKDAY) % 7, weights=s[d], minlength=7)
        events_bin = np.bincount(profile.stay_bin(d0[d] + (b[d] - a[d])), weights=s[d],
                                 minlength=n_bins)
        raw_bin = np.bincount(stay_bin, weights=share * s[row], minlength=n_bins)
        w = np.ones(7)
        f = np.ones(n_bins)
        prior = self.profile_prior
        tree: TreeRules | None = None
        leaf_of_row = np.zeros(n, dtype=np.int64)
        leaves = np.zeros(0, dtype=np.int64)
        leaf_rate = np.zeros(0)
        for _ in range(max(self.rounds, 1)):
            exposure = np.bincount(row, weights=share * w[weekday] * f[stay_bin], minlength=n)
            keep = exposure > 1e-12
            regressor = DecisionTreeRegressor(
                criterion="poisson", max_depth=self.max_depth,
                min_samples_leaf=self.min_samples_leaf, random_state=self.random_state)
            regressor.fit(matrix[keep], d[keep] / exposure[keep],
                          sample_weight=(s * exposure)[keep])
            grown = TreeRules.from_sklearn(regressor.tree_, features,
                                           value=np.zeros(regressor.tree_.node_count))
            # Rows of one stay are near copies: a split is kept only if each side holds at
            # least min_stays_leaf stays, whatever its number of rows.
            path = regressor.decision_path(matrix).tocoo()
            pairs = np.unique(path.col.astype(np.int64) * (int(stay.max()) + 1)
                              + stay[path.row])
            stays_per_node = np.bincount(pairs // (int(stay.max()) + 1),
                                         minlength=grown.n_nodes)
            inner = grown.left != _LEAF
            keep_split = inner & (stays_per_node[np.where(inner, grown.left, 0)]
                                  >= self.min_stays_leaf) & (
                stays_per_node[np.where(inner, grown.right, 0)] >= self.min_stays_leaf)
            tree, _ = grown.pruned(keep_split)
            leaf_of_row = tree.apply(matrix)
            leaves, leaf_index = np.unique(leaf_of_row, return_inverse=True)
            # The likelihood equations only need the clock exposure summed by (leaf, weekday,
            # day-of-stay bin): iterate on that small table.
            cell = np.zeros((leaves.size, 7, n_bins))
            np.add.at(cell, (leaf_index[row], weekday, stay_bin), share * s[row])
            num = np.bincount(leaf_index, weights=dw, minlength=leaves.size)
            for _ in range(1000):
                by_leaf = np.einsum("lwb,w,b->l", cell, w, f)
                total_rate = dw.sum() / max(float(by_leaf.sum()), 1e-300)
                leaf_rate = (num + self.rate_prior * total_rate) / (by_leaf + self.rate_prior)
                new_w, new_f = w, f
                if self.fit_clock:
                    den_w = np.einsum("lwb,l,b->w", cell, leaf_rate, f)
                    scale = events_weekday.sum() / max(den_w.sum(), 1e-300)
                    new_w = (events_weekday + prior) / (den_w + prior / scale)
                    new_w = np.maximum(new_w / new_w.mean(), 1e-3)
                if self.fit_stay_day:
                    den_f = np.einsum("lwb,l,w->b", cell, leaf_rate, new_w)
                    scale = events_bin.sum() / max(den_f.sum(), 1e-300)
                    new_f = (events_bin + prior) / (den_f + prior / scale)
                    # Exposure-weighted mean 1: leaf rates stay "per typical day".
                    new_f = np.maximum(new_f / (np.sum(new_f * raw_bin) / raw_bin.sum()), 1e-3)
                change = max(float(np.max(np.abs(new_w - w))), float(np.max(np.abs(new_f - f))))
                w, f = new_w, new_f
                if change < 1e-9:
                    break
            by_leaf = np.einsum("lwb,w,b->l", cell, w, f)
            total_rate = dw.sum() / max(float(by_leaf.sum()), 1e-300)
            leaf_rate = (num + self.rate_prior * total_rate) / (by_leaf + self.rate_prior)
        assert tree is not None
        profile = DischargeProfile(hourly, w, edges, f)
        exposure = np.bincount(row, weights=share * w[weekday] * f[stay_bin], minlength=n)
        total_rate = dw.sum() / max(float(np.sum(s * exposure)), 1e-300)
        # Every node's rate (inner nodes for display): its rows' discharges over exposure.
        node_events = np.asarray(np.bincount(leaf_of_row, weights=dw, minlength=tree.n_nodes),
                                 dtype=np.float64)
        node_exposure = np.asarray(np.bincount(leaf_of_row, weights=s * exposure,
                                               minlength=tree.n_nodes), dtype=np.float64)
        for node in range(tree.n_nodes - 1, -1, -1):  # children come after their parent
            if tree.left[node] != _LEAF:
                for total in (node_events, node_exposure):
                    total[node] = total[tree.left[node]] + total[tree.right[node]]
        value = ((node_events + self.rate_prior * total_rate)
                 / (node_exposure + self.rate_prior))
        value[leaves] = leaf_rate
        tree = TreeRules(features=tree.features, left=tree.left, right=tree.right,
                         feature=tree.feature, threshold=tree.threshold,
                         missing_left=tree.missing_left, value=value, weight=node_exposure)
        self.model_ = HazardTreeModel(tree=tree, profile=profile, rate_prior=self.rate_prior,
                                      info={"rows": int(n), "stays": int(stay.max() + 1),
                                            "discharges": float(dw.sum()),
                                            "exposure_days": float(np.sum(s * exposure))})
        rate = value[leaf_of_row]
        intensity = profile.intensity(b[d], d0[d] + (b[d] - a[d]))
        self.log_likelihood_ = float(np.sum(dw[d] * np.log(rate[d] * intensity))
                                     - np.sum(s * rate * exposure))
        return self

    def _check(self) -> HazardTreeModel:
        if not hasattr(self, "model_"):
            raise ValueError("PiecewiseHazardTree: call fit first")
        return self.model_


def piecewise_log_likelihood(model: HazardTreeModel, x: npt.ArrayLike, event: npt.ArrayLike,
                             start: npt.ArrayLike, stop: npt.ArrayLike, days_in: npt.ArrayLike,
                             sample_weight: npt.ArrayLike | None = None,
                             rate: npt.ArrayLike | None = None) -> float:
    """Mean piecewise-exponential log-likelihood per row (higher is better):
    sum w [d log(rate * profile(stop)) - rate * exposure] / sum w.

    The event term uses the full hazard at the discharge instant, so models with different
    profiles are compared on the same scale. ``rate`` overrides the tree's rates (to score
    another model's rates with this profile).
    """
    d = np.asarray(event, dtype=bool)
    a = np.asarray(start, dtype=float)
    b = np.asarray(stop, dtype=float)
    d0 = np.asarray(days_in, dtype=float)
    s = np.ones(d.size) if sample_weight is None else np.asarray(sample_weight, dtype=float)
    r = model.rate(x) if rate is None else np.asarray(rate, dtype=float)
    exposure = model.profile.exposure(a, b, d0)
    loglik = -r * exposure
    hazard = r[d] * model.profile.intensity(b[d], d0[d] + (b[d] - a[d]))
    loglik[d] += np.log(np.maximum(hazard, 1e-300))
    return float(np.sum(s * loglik) / np.sum(s))
