"""Capacity planning: a unit of c beds simulated over months as a loss system.

Demand
------
Patients arrive in streams (:class:`DemandStream`: emergency or other unbooked arrivals, a
Poisson or negative binomial count per day with a weekday pattern; :class:`ElectiveList`: booked
operations per weekday, each cancelled with a given probability). Each arrival belongs to a
:class:`PatientGroup`, chosen by its stream's group weights, and draws its stay from that group's
phase-type distribution. Times are in days; day 0 is ``start_weekday`` (0 = Monday) and an
arrival's clock time within its day follows the stream's 24-hour profile.

The unit
--------
A loss system: an arrival that finds every bed taken is turned away (placed elsewhere,
transferred, or the operation cancelled on the day) and never enters; nobody waits for a bed.
With ``beds=None`` there is no limit (the "offered" occupancy, an M/G/infinity system). For
Poisson arrivals at a flat rate the share turned away is the Erlang loss formula
(``app.stats.erlang.erlang_b``) whatever the stay distribution's shape (M/G/c/c insensitivity),
which the tests use as the oracle.

What is measured (per replication, over ``days`` days after ``warmup_days`` of warm-up)
-----------------------------------------------------------------------------------------
``mean_occupancy``
    Time-average number of occupied beds.
``occupancy_rate``
    ``mean_occupancy / beds``: the "average bed occupancy" of the trade (loss systems only).
``mean_census``
    Mean number of occupied beds at the daily census instant (``census_hour``).
``share_turned_away`` (and ``share_turned_away_<admission_type>``)
    Arrivals that found no bed / arrivals, over the measured days.
``share_days_turning_away``
    The days "over capacity": share of calendar days on which at least one arrival found no
    bed (demand exceeded the beds at least once that day). A loss system is never over its bed
    count, so this, not a census above c, is what over capacity means here.
``share_days_full_at_census``
    Share of census instants with every bed occupied.
``arrivals_per_day``, ``turned_away_per_day``
    Offered arrivals and arrivals that found no bed, per day.

With ``beds=None`` only ``mean_occupancy``, ``mean_census`` and ``arrivals_per_day`` are
reported (nobody is turned away).

The census distribution (``occupancy_pmf``) is the share of census instants with k beds
occupied. Across the independent replications each figure is reported as a mean with a
Student-t confidence interval (``scipy.stats.t``).

Common random numbers
---------------------
Every random quantity is tied to a slot, not to the order of drawing: stream s on day d has
its own uniform for the day's count (inverted through the count distribution's quantile
function), and its k-th arrival of the day its own uniforms for the clock time, the group and
the stay (inverted through the group's stay quantile function, tabulated on a fine grid). The
uniforms come from generators keyed by (seed, replication, stream name, purpose), filled one
slot row at a time, so for the same days and warm-up (``compare`` in
``app.stats.planning_scenarios`` makes them common) a different rate or a different stay
distribution changes only what it must: more arrivals add slots, a stay scaled by f is
exactly f times as long, and a patient moved to another group keeps their stay quantile.
Bed counts share the very same demand. The curve of the share turned away against beds is
therefore smooth, and scenario differences are estimated from paired replications (much
narrower intervals than two independent runs).

Limits
------
Rates vary by weekday only (no season or trend: scale a stream for a winter scenario); days
are independent; a stay runs from the arrival instant for its drawn length, so discharges have
no clock-time profile of their own; nobody waits for a bed (a queue is not modelled).

References
----------
Erlang loss formula and its insensitivity: METHODS.md section 4 (Erlang B tables).
Little's law L = lambda W: METHODS.md section 3.
Bagust A, Place M, Posnett JW (1999). Dynamics of bed use in accommodating emergency
admissions: stochastic simulation model. BMJ 319:155-158 (title and pages from memory; the
85% / 90% occupancy shape as quoted in METHODS.md).
Law AM (2015). Simulation Modeling and Analysis, 5th ed.: independent replications with
t intervals and common random numbers (cited from memory; standard practice).
"""

from __future__ import annotations

from app.stats.planning.capacity import (
    BedsNeeded,
    CapacityCurve,
    beds_needed,
    capacity_curve,
    demand_scale_for_occupancy,
)
from app.stats.planning.demand import Demand, draw_demand
from app.stats.planning.inputs import (
    WEEKDAYS,
    DemandStream,
    ElectiveList,
    PatientGroup,
    PlanningInput,
    scale_arrivals,
    scale_stay,
)
from app.stats.planning.simulation import Estimate, PlanningResult, simulate, t_interval

__all__ = [
    "BedsNeeded",
    "CapacityCurve",
    "Demand",
    "DemandStream",
    "ElectiveList",
    "Estimate",
    "PatientGroup",
    "PlanningInput",
    "PlanningResult",
    "WEEKDAYS",
    "beds_needed",
    "capacity_curve",
    "demand_scale_for_occupancy",
    "draw_demand",
    "scale_arrivals",
    "scale_stay",
    "simulate",
    "t_interval",
]
