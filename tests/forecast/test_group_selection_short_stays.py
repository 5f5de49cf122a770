"""Training a unit none of whose stays ends within a day (a high-dependency unit with
minimum stays, or a short history): the admission tree's size is still chosen by its
integrated Brier score, which scikit-survival only scores from the shortest validation stay
on. Found on a stress unit with five months of history, where training raised
scikit-survival's "all times must be within follow-up time of test data"."""

from __future__ import annotations

import numpy as np
import pandas as pd

from app.forecast.los.selection import _select_groups
from app.forecast.los.train import train_los
from tests.forecast.unit_state import unit_state

START = pd.Timestamp("2026-01-01", tz="UTC")


def _stays(n_days: int, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    rows = []
    for day in range(n_days):
        for _ in range(rng.poisson(3.0)):
            admitted = START + pd.Timedelta(days=day, minutes=int(rng.integers(0, 1440)))
            # Every stay lasts more than a day and a half; a few run past two weeks.
            los = 1.5 + rng.gamma(0.8, 5.0)
            rows.append({"stay_id": f"S{len(rows):05d}", "admitted_at": admitted,
                         "discharged_at": admitted + pd.Timedelta(minutes=round(los * 1440)),
                         "admission_type": "emergency" if rng.uniform() < 0.7 else "elective",
                         "outcome": "home", "age": int(rng.integers(20, 90)),
                         "sex": str(rng.choice(["f", "m"])), "specialty": "medicine",
                         "source": "emergency-dept", "booking_id": None, "patient": None,
                         "from_unit": None, "to_unit": None})
    return pd.DataFrame(rows)


def test_training_chooses_the_tree_size_when_no_stay_ends_within_a_day() -> None:
    # No admission in the last two days either: every stay in progress is a day and a half in.
    as_of = START + pd.Timedelta(days=160)
    stays = _stays(158, 8)
    stays.loc[stays["discharged_at"] > as_of, "discharged_at"] = pd.NaT
    state = unit_state("HD-1", stays, as_of, beds=20)
    payload = train_los(state, evaluate=False, compare=False)   # raised ValueError before
    assert payload["los"]["groups"]["groups"]
    # The sizes were compared on scored validation stays, not skipped as if there were too
    # little data (that fallback leaves every score NaN). A regression check of a crash: the
    # scores themselves are scikit-survival's.
    from app.forecast.los.design import make_design
    from app.forecast.los.rows import build_landmarks, interval_rows

    landmarks = build_landmarks(state, names=[])
    design = make_design(landmarks, interval_rows(landmarks, state.census_time, state.tz,
                                                  rng=np.random.default_rng(0)), [])
    _, results = _select_groups(design, state.stays, int(as_of.value), None)
    scores = [r["val_ibs"] for r in results]
    assert all(np.isfinite(scores)) and all(0 < v < 0.25 for v in scores), scores
