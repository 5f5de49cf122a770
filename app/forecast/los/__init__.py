"""Length-of-stay model of a unit: training rows from the "as of" state, training, prediction.

Design (measured choices are in the payload's ``selection`` and ``metrics``)
----------------------------------------------------------------------------
Rows
    One *landmark* per stay per morning in the unit (``LANDMARK_CLOCK`` local time): the
    stay's admission covariates, days in the unit, and for each observation name its latest
    value known then, its change since the previous value and the hours since it was taken
    (the same columns as ``UnitState.current_stays()``). From each landmark, one row per census
    interval ahead (the partial interval to the next census instant, then whole ones, up to
    ``HORIZON_STEPS``) while the stay is in the unit and before the cut-off: the target is
    "leaves in this interval", with the time at risk in the interval (METHODS.md section 8).
    Stays in progress at the cut-off contribute their time at risk up to it, censored; none is
    dropped. Landmarks start at the extract's start (``app.state.extract.extract_start_ns``): a stay
    admitted before it is on record only for having lasted into it, so its earlier mornings
    are left out and its later ones keep the true days in (delayed entry); the groups and the
    test's Kaplan-Meier baseline take such stays from their days in the unit then.
Model
    A discharge-hazard tree (``app.stats.survival_tree``): a Poisson regression tree on the
    interval rows gives each leaf a discharge rate relative to the unit's discharge profile
    (clock hour x weekday x day of stay, fitted jointly with the leaves). So the per-day
    probabilities follow the weekday of each future day and the partial first interval for
    every patient, and the tree's rules are about the patient.
    P(still in at census instant k) = exp(-sum of rate x profile exposure over the intervals).
    Leaves must hold a share of the stays (not only of the rows: a stay's rows are near copies).
Scale
    One number c multiplies every rate of the stored tree, fitted by maximum likelihood on the
    tree's own forecasts from the landmarks of the last half year (``calibration``): a current
    stay's chance of being in is S^c. The test period scores the tree with its own scale,
    fitted the same way on the training period.
Groups
    A log-rank tree on admission covariates (``app.stats.stay_groups``), each leaf with its
    Kaplan-Meier curve and a BIC-chosen Coxian: used for stays still to come and for the tail
    of a current stay past the hazard tree's horizon (median remaining stay beyond it).
Validation
    Depth and leaf size of both trees are chosen on a later period (train on the state as of
    an earlier instant, validate on landmarks after it) for a held-out half of the stays (by a
    hash of the stay id): split by stay and by time, never by row.
Test
    The last ``test_days`` before ``until`` are held out: the model trained on the state as of
    the test start is scored on every landmark in the test period (concordance, integrated
    Brier score over days 1..14, variance explained on completed stays), beside the
    no-covariate Kaplan-Meier given the days already spent and a gradient-boosted ensemble on
    the same rows (the yardstick: what the single readable tree gives up). The stored model is
    then refitted on everything known at ``until`` with the chosen sizes.
Alternatives measured (tests/forecast/test_los.py, demo test period): scikit-survival's
    log-rank SurvivalTree on one row per landmark predicts worse than this tree on both demo
    units (integrated Brier score and concordance), so the hazard tree is kept.
"""

from app.forecast.los.design import Design, make_design
from app.forecast.los.metrics import EVAL_DAYS, survival_metrics
from app.forecast.los.model import LosModel, StayPredictions, predict_stays
from app.forecast.los.rows import (
    IntervalRows,
    Landmarks,
    build_landmarks,
    forecast_bounds,
    interval_rows,
    observation_names,
    observations_at,
)
from app.forecast.los.train import format_metrics, train_los, train_unit

__all__ = [
    "EVAL_DAYS", "Design", "IntervalRows", "Landmarks", "LosModel", "StayPredictions",
    "build_landmarks", "forecast_bounds", "format_metrics", "interval_rows", "make_design",
    "observation_names", "observations_at", "predict_stays", "survival_metrics", "train_los",
    "train_unit",
]
