"""One scale on the hazard tree's rates, fitted on the forecasts the tree makes at landmarks.

The tree's leaves are fitted interval by interval (events over exposure), but a forecast asks
for something else: the product of several intervals' survivals from one landmark, with the
patient's covariates held at their landmark values. Where the patients of a leaf differ more
than the leaf can tell (some recover fast, some slowly), or a leaf pools landmarks of
different histories, that product leans one way: on the demo's surgical ward, in the model's
own training landmarks of the last half year, still in at the third census was forecast
0.517 and observed 0.539; on held-out mornings the gap was 0.05-0.07 for emergencies and
patients passed on by critical care.

The correction is one number c per model, scaling every rate (so every cumulative hazard):
a current stay's chance of being in becomes S(t)^c. It keeps each curve a survival curve
(non-increasing, 1 at the landmark) at every instant, not only at census instants, and c = 1
is the tree as fitted. c is fitted by maximum likelihood on the landmarks of the last
``WINDOW_DAYS`` before the cut-off, each followed to the census instant at which it was
last seen in (censored) or to the interval it left in: the grouped-time likelihood

    L(c) = prod over landmarks  [S_{j-1}^c - S_j^c]  (left in census interval j)
                                 S_m^c               (last seen in at census instant m),

the same as a proportional-hazards calibration slope on the cumulative hazard scale
(van Houwelingen 2000, Statistics in Medicine 19:3401-3415, "validation, calibration,
revision and combination of prognostic survival models", cited from memory). One parameter
fitted on thousands of landmarks learns little of the tree's noise; whether it helps on days
the model did not see was measured by backtests (Morrow alone, retrained every 28 days):

- fitted on the stored tree's own landmarks (what is kept): mean CRPS over horizons 1-7 of
  the demo's surgical ward 1.7558 -> 1.7351 and critical care 1.2442 -> 1.2430 (180
  mornings); the six stress units (tests/stress, 252 mornings) -0.0013, -0.0030, +0.0013,
  -0.0019, -0.0092, +0.0025 (ST-CARD, -MEDW, -HDU, -RESP, -ORTH, -NEURO). c was 0.95-0.98
  on the ward, 0.99-1.06 on the stress units. The held-out Brier score over days 1-14 of
  the model trained at each unit's last morning moved by -0.0006 to +0.0006;
- fitted instead on the validation tree's forecasts of the held-out half of the stays (split
  by stay and time, app/forecast/los/selection.py): c moved more (0.84-1.00 on the ward) and
  the stress units lost up to 0.055 (ST-RESP), so the in-sample fit was kept.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt
from scipy import optimize

FloatArray = npt.NDArray[np.float64]

# The landmarks the scale is fitted on: the last half year (recent enough to follow a change
# of practice, long enough for every weekday and most leaves), at most MAX_LANDMARKS of them
# (sampled), followed over the next STEPS census instants (the forecast's default week).
WINDOW_DAYS = 182
MAX_LANDMARKS = 20_000
STEPS = 7
# Fewer landmarks than this leave the tree as fitted (c = 1).
MIN_LANDMARKS = 200
# c is looked for in [1 / BOUND, BOUND]: a tree off by more than that is a tree to refit,
# not to rescale.
BOUND = 2.0


@dataclass(frozen=True)
class HazardScale:
    """The fitted scale and its evidence: the landmarks it was fitted on, and the log-likelihood
    per landmark gained over c = 1 (0 when not fitted)."""

    value: float = 1.0
    landmarks: int = 0
    gain: float = 0.0

    def to_dict(self) -> dict[str, float | int]:
        return {"value": self.value, "landmarks": self.landmarks, "gain_per_landmark": self.gain}

    @classmethod
    def from_dict(cls, data: dict[str, float | int] | None) -> HazardScale:
        if not data:
            return cls()
        return cls(float(data["value"]), int(data["landmarks"]),
                   float(data["gain_per_landmark"]))


def outcome_steps(end_ns: npt.ArrayLike, ended: npt.ArrayLike, bounds_ns: npt.ArrayLike
                  ) -> tuple[npt.NDArray[np.int64], npt.NDArray[np.int64]]:
    """Per landmark, the census interval j (1..K) it left in (0: not seen to leave) and the last
    census instant m (0..K) it was seen in at.

    ``bounds_ns`` (n, K + 1): the landmark, then the next K census instants; ``end_ns``: the
    discharge, or the cut-off for a stay still in (``ended`` False)."""
    end = np.asarray(end_ns, dtype=np.int64)[:, None]
    b = np.asarray(bounds_ns, dtype=np.int64)[:, 1:]
    seen_in = (end > b).sum(axis=1)                     # census instants passed still in
    left = np.asarray(ended, dtype=bool) & (seen_in < b.shape[1])
    return np.where(left, seen_in + 1, 0).astype(np.int64), seen_in.astype(np.int64)


def _neg_log_lik(log_c: float, survival: FloatArray, left: npt.NDArray[np.int64],
                 seen: npt.NDArray[np.int64]) -> float:
    c = math.exp(log_c)
    s = np.concatenate([np.ones((survival.shape[0], 1)), survival], axis=1) ** c
    rows = np.arange(s.shape[0])
    gone = left > 0
    p_left = s[rows[gone], left[gone] - 1] - s[rows[gone], left[gone]]
    p_in = s[rows[~gone], seen[~gone]]
    return -float(np.log(np.maximum(p_left, 1e-300)).sum() + np.log(np.maximum(p_in, 1e-300)).sum())


def fit_hazard_scale(survival: npt.ArrayLike, left: npt.ArrayLike, seen: npt.ArrayLike
                     ) -> HazardScale:
    """The maximum-likelihood scale c (module docstring).

    Parameters
    ----------
    survival : array_like, shape (n, K)
        Each landmark's forecast chance of being in at its next K census instants.
    left, seen : array_like of int, shape (n,)
        :func:`outcome_steps`.

    Returns
    -------
    HazardScale
        c = 1 (not fitted) with fewer than ``MIN_LANDMARKS`` landmarks.
    """
    s = np.clip(np.asarray(survival, dtype=float), 0.0, 1.0)
    s = np.minimum.accumulate(s, axis=1)
    j = np.asarray(left, dtype=np.int64)
    m = np.asarray(seen, dtype=np.int64)
    n = s.shape[0]
    if n < MIN_LANDMARKS:
        return HazardScale(1.0, n, 0.0)
    found = optimize.minimize_scalar(_neg_log_lik, bounds=(-math.log(BOUND), math.log(BOUND)),
                                     args=(s, j, m), method="bounded",
                                     options={"xatol": 1e-4})
    at_one = _neg_log_lik(0.0, s, j, m)
    return HazardScale(float(math.exp(found.x)), n, float((at_one - found.fun) / n))


def scale_on(curves: Any, landmarks: Any) -> HazardScale:
    """The scale fitted on a model's forecasts from ``landmarks`` (``curves``: its curves
    from them over at least ``STEPS`` census intervals,
    ``app.forecast.los.model._landmark_curves``), each landmark followed to its outcome."""
    bounds = curves.bounds_ns[:, : STEPS + 1]
    left, seen = outcome_steps(landmarks.end_ns, landmarks.ended, bounds)
    return fit_hazard_scale(curves.survival(bounds[:, 1:]), left, seen)
