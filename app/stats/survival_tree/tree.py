"""The discharge-hazard tree: a Poisson regression tree fitted with the profile."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd
from sklearn.tree import DecisionTreeRegressor

from app.stats.survival_tree.profile import (
    _EPOCH_WEEKDAY,
    DEFAULT_STAY_EDGES,
    DischargeProfile,
    _hourly_profile,
)
from app.stats.survival_tree.rules import _LEAF, FeatureSpec, FloatArray, IntArray, TreeRules


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
