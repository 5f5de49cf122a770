"""Features of a tree (numbers and ordered categories) and its rules in words."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from functools import cached_property
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]
_LEAF = -1


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
