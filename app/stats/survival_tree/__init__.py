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

from app.stats.survival_tree.profile import (
    DischargeProfile,
    cumulative_hazard_at,
    interval_exposure,
    time_of_cumulative_hazard,
)
from app.stats.survival_tree.rules import FeatureSpec, TreeRules, order_categories
from app.stats.survival_tree.tree import (
    HazardTreeModel,
    PiecewiseHazardTree,
    piecewise_log_likelihood,
)

__all__ = [
    "DischargeProfile",
    "FeatureSpec",
    "HazardTreeModel",
    "PiecewiseHazardTree",
    "TreeRules",
    "cumulative_hazard_at",
    "interval_exposure",
    "order_categories",
    "piecewise_log_likelihood",
    "time_of_cumulative_hazard",
]
