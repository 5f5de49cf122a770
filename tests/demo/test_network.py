"""The demo hospital as a network: step-downs from KV-CRIT to KV-SURG and exit block.

Measured on the committed ``demo_data`` files (they are what the generator writes; see
``test_generate.py``). The invariants follow DATA_CONTRACT.md's meaning of ``patient``,
``from_unit`` and ``to_unit`` and the contract's occupancy rule (a stay is present at t when
admitted_at <= t < discharged_at); the flow's shares and windows are the invented scenario's
(``STEP_DOWN`` in app/demo/scenario.py), so they are common practice, no source, unless a
comment names one.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from app.demo.generate import END, START

DEMO = Path(__file__).resolve().parents[2] / "demo_data"
CRIT, WARD, OTHER_WARD = "KV-CRIT", "KV-SURG", "KV-MEDW"
WARD_BEDS = 28  # units.csv: one row, no valid_from
ANCHOR = pd.Timestamp(END)


@pytest.fixture(scope="module")
def stays() -> pd.DataFrame:
    frame = pd.read_csv(DEMO / "stays.csv", dtype=str, keep_default_na=False)
    for column in ("admitted_at", "discharged_at"):
        frame[column] = pd.to_datetime(frame[column].where(frame[column] != ""))
    return frame


@pytest.fixture(scope="module")
def flags(stays: pd.DataFrame) -> pd.DataFrame:
    obs = pd.read_csv(DEMO / "observations.csv", dtype=str, keep_default_na=False)
    obs = obs[(obs.name == "fit_for_discharge") & (obs.value.astype(float) == 1)]
    obs = obs.assign(observed_at=pd.to_datetime(obs.observed_at))
    return obs.merge(stays, on="stay_id", how="left", validate="many_to_one")


def _present(stays: pd.DataFrame, unit: str, at: np.ndarray) -> np.ndarray:
    rows = stays[stays.unit == unit]
    admitted = np.sort(rows.admitted_at.to_numpy())
    discharged = np.sort(rows.discharged_at.fillna(pd.Timestamp.max).to_numpy())
    return np.searchsorted(admitted, at, side="right") - np.searchsorted(
        discharged, at, side="right"
    )


@pytest.fixture(scope="module")
def step_downs(stays: pd.DataFrame, flags: pd.DataFrame) -> pd.DataFrame:
    """Each ended KV-CRIT stay that went to KV-SURG, with its flag and the ward at the flag."""
    out = stays[(stays.unit == CRIT) & (stays.to_unit == WARD)]
    first_flag = flags.groupby("stay_id").observed_at.min().rename("flagged_at")
    out = out.join(first_flag, on="stay_id")
    out = out[out.flagged_at.notna() & (out.flagged_at >= pd.Timestamp(START))]
    out = out.assign(
        wait_hours=(out.discharged_at - out.flagged_at).dt.total_seconds() / 3600,
        ward_at_flag=_present(stays, WARD, out.flagged_at.to_numpy()),
    )
    return out.assign(full=out.ward_at_flag >= WARD_BEDS)


def test_every_step_down_continues_a_critical_care_stay(stays: pd.DataFrame) -> None:
    arrived = stays[(stays.unit == WARD) & (stays.from_unit == CRIT)]
    assert len(arrived) > 1000
    assert (arrived.source == "critical-care").all()
    assert (arrived.admission_type == "emergency").all()
    left = stays[(stays.unit == CRIT) & (stays.to_unit == WARD)]
    joined = arrived.merge(left, left_on=["patient", "admitted_at"],
                           right_on=["patient", "discharged_at"], how="left",
                           suffixes=("", "_crit"), validate="one_to_one")
    # The same person leaves KV-CRIT for KV-SURG at exactly the ward admission instant.
    assert joined.stay_id_crit.notna().all()
    assert (joined.outcome_crit == "ward").all()
    # ...and every KV-CRIT stay that ended towards KV-SURG is continued there.
    assert len(left) == len(arrived)
    # Only the step-downs name a unit they came from; other to_unit values are not units.
    assert set(stays.from_unit) == {"", CRIT}
    assert set(stays.to_unit) == {"", WARD, OTHER_WARD}
    assert (stays.to_unit[stays.to_unit != ""].index.isin(
        stays.index[stays.outcome == "ward"])).all()


def test_every_stay_has_a_patient_and_no_patient_is_in_two_units_at_once(
    stays: pd.DataFrame,
) -> None:
    assert stays.patient.str.match(r"^P\d{6}$").all()
    ordered = stays.sort_values(["patient", "admitted_at"])
    same = ordered.patient.eq(ordered.patient.shift())
    previous_end = ordered.discharged_at.shift()
    # A patient's next stay starts no earlier than the previous one ended (a still-open
    # stay, blank discharge, must be the patient's last).
    assert not (same & previous_end.isna() & ordered.patient.shift().notna()).any()
    assert (ordered.admitted_at[same] >= previous_end[same]).all()
    # Readmissions get a new id (the scenario's choice): only step-downs share one.
    per_patient = stays.groupby("patient").size()
    assert per_patient.max() == 2
    assert per_patient[per_patient == 2].index.isin(stays.patient[stays.from_unit != ""]).all()


def test_ward_never_holds_more_than_staffed_beds_plus_escalation_at_a_transfer(
    stays: pd.DataFrame,
) -> None:
    arrived = stays[(stays.unit == WARD) & (stays.from_unit == CRIT)]
    at = arrived.admitted_at.to_numpy()
    occupancy = _present(stays, WARD, at)
    assert (occupancy <= WARD_BEDS + 1).all()
    # A step-down takes a free staffed bed, never the escalation bed (census.csv has beds).
    census = pd.read_csv(DEMO / "census.csv", dtype=str, keep_default_na=False)
    beds = census[census.stay_id.isin(arrived.stay_id)].bed
    assert len(beds) > 100 and not beds.str.endswith("X1").any()
    # Ward policy: transfers between 08:00 and 22:00 only.
    minutes = arrived.admitted_at.dt.hour * 60 + arrived.admitted_at.dt.minute
    assert minutes.between(8 * 60, 22 * 60 - 1).all()


def test_readiness_flag_marks_every_live_critical_care_discharge(
    stays: pd.DataFrame, flags: pd.DataFrame
) -> None:
    crit = stays[(stays.unit == CRIT) & stays.discharged_at.notna()]
    crit = crit[crit.discharged_at < ANCHOR - pd.Timedelta(hours=12)]  # flag recorded by then
    live = crit[crit.outcome != "died"]
    flagged = flags[flags.unit == CRIT]
    assert set(live.stay_id) <= set(flagged.stay_id)
    assert not flagged.stay_id.isin(crit.stay_id[crit.outcome == "died"]).any()
    one = flagged.drop_duplicates("stay_id").set_index("stay_id")
    assert (one.observed_at <= one.discharged_at).all()
    # A step-down is flagged before it moves (a handover of 15 to 60 minutes at least).
    moved = one[one.to_unit == WARD]
    assert ((moved.discharged_at - moved.observed_at) >= pd.Timedelta(minutes=15)).all()


def test_about_three_fifths_of_live_critical_care_discharges_step_down(
    stays: pd.DataFrame,
) -> None:
    crit = stays[(stays.unit == CRIT) & stays.outcome.isin(["home", "ward", "transfer"])]
    share = (crit.to_unit == WARD).mean()
    assert 0.55 <= share <= 0.65


def test_exit_block_a_full_ward_holds_patients_in_critical_care(
    step_downs: pd.DataFrame,
) -> None:
    full = step_downs[step_downs.full].wait_hours
    room = step_downs[~step_downs.full].wait_hours
    assert len(full) > 100 and len(room) > 300
    # The median wait from the readiness flag to the transfer is longer when the ward was
    # full at the flag; scipy.stats.mannwhitneyu says the shift is no accident.
    assert full.median() > 3 * room.median()
    assert full.quantile(0.9) > room.quantile(0.9)
    assert stats.mannwhitneyu(full, room, alternative="greater").pvalue < 1e-6


@pytest.mark.parametrize("unit", [CRIT, WARD])
def test_littles_law_holds_per_unit(stays: pd.DataFrame, unit: str) -> None:
    # Little 1961 (J. D. C. Little, "A proof for the queuing formula L = lambda W",
    # Operations Research 9(3)): mean number present = arrival rate x mean time in system.
    # A window well inside the history; stays admitted in it, each with its whole stay
    # (a stay still open at the anchor counts to the anchor: a handful, and short).
    first = pd.Timestamp(START) + pd.Timedelta(days=60)
    last = ANCHOR.normalize() - pd.Timedelta(days=90)
    days = (last - first).total_seconds() / 86400
    rows = stays[(stays.unit == unit) & (stays.admitted_at >= first)
                 & (stays.admitted_at < last)]
    stay_days = (rows.discharged_at.fillna(ANCHOR) - rows.admitted_at).dt.total_seconds() / 86400
    arrivals_per_day = len(rows) / days
    at = pd.date_range(first, last, freq="15min", inclusive="left").to_numpy()
    mean_present = _present(stays, unit, at).mean()
    assert mean_present == pytest.approx(arrivals_per_day * stay_days.mean(), rel=0.03)
