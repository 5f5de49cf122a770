"""Exit block learnt from two units' stays: a known transfer rate is found again.

The two units are simulated here with a rule of the test's own (not the demo's): a ready
patient moves at a constant rate while the receiving unit has a free staffed bed and cannot
move while it is full, and may leave for home meanwhile (a wait that ends elsewhere is not
the receiving unit's to explain and is left out). The estimator must find the rate with room
inside its exact interval (Garwood 1936) and no transfer while full; the rate's arithmetic itself is checked against statsmodels in
tests/stats/test_exit_block.py.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd

from app.forecast.exit_block import learn_exit_block, ready_since
from app.state.frames import OBSERVATION_COLUMNS
from tests.forecast.unit_state import unit_state

START = pd.Timestamp("2026-01-01", tz="UTC")
MOVE_RATE, HOME_RATE = 3.0, 0.5  # per day while ready: to the receiving unit, home


def _two_units(days: int = 240, beds: int = 4, seed: int = 3, home_rate: float = HOME_RATE):
    rng = np.random.default_rng(seed)
    dt = 0.01
    receiving: list[dict] = []
    in_receiving: list[tuple[float, int]] = []  # (leaves at, row)
    sending: list[dict] = []
    waiting: list[int] = []
    flags: list[dict] = []
    for step in range(int(days / dt)):
        t = step * dt
        in_receiving = [(end, row) for end, row in in_receiving if end > t]
        if rng.random() < 3.0 * dt and len(in_receiving) < beds:  # its own emergencies
            end = t + rng.exponential(1.2)
            receiving.append({"admitted_at": t, "discharged_at": end, "from_unit": None})
            in_receiving.append((end, len(receiving) - 1))
        if rng.random() < 2.0 * dt:  # a sending-unit patient becomes ready
            sending.append({"admitted_at": t - rng.uniform(1, 4), "discharged_at": None,
                            "to_unit": None, "ready": t})
            waiting.append(len(sending) - 1)
        for row in list(waiting):
            if rng.random() < home_rate * dt:
                sending[row].update(discharged_at=t, to_unit=None, outcome="home")
                waiting.remove(row)
            elif len(in_receiving) < beds and rng.random() < MOVE_RATE * dt:
                sending[row].update(discharged_at=t, to_unit="R", outcome="ward")
                waiting.remove(row)
                end = t + rng.exponential(1.2)
                receiving.append({"admitted_at": t, "discharged_at": end, "from_unit": "S"})
                in_receiving.append((end, len(receiving) - 1))
    as_of = START + pd.Timedelta(days=days)

    def frame(rows: list[dict], prefix: str) -> pd.DataFrame:
        out = pd.DataFrame(rows)
        for column in ("admitted_at", "discharged_at"):
            out[column] = START + pd.to_timedelta(out[column].astype(float), unit="D")
        out.loc[out["discharged_at"] > as_of, "discharged_at"] = pd.NaT
        out["stay_id"] = [f"{prefix}{i}" for i in range(len(out))]
        out["admission_type"] = "emergency"
        return out

    receiver = unit_state("R", frame(receiving, "R-"), as_of, beds=beds)
    sent = frame(sending, "S-")
    for stay_id, ready in zip(sent["stay_id"], sent["ready"], strict=True):
        at = START + pd.Timedelta(days=float(ready))
        flags.append({"stay_id": stay_id, "observed_at": at, "name": "fit_for_discharge",
                      "value": 1.0, "recorded_at": at})
    sender = unit_state("S", sent.drop(columns="ready"), as_of, beds=10)
    observations = pd.DataFrame(flags, columns=OBSERVATION_COLUMNS)
    sender = dataclasses.replace(sender, observations=observations)
    return sender, receiver


def test_rate_with_room_is_found_and_nobody_moves_while_full():
    sender, receiver = _two_units(home_rate=0.0)
    found = learn_exit_block(sender, receiver)
    assert found is not None
    low, high = found.with_room.interval
    assert low <= MOVE_RATE <= high
    assert found.with_room.events > 200
    assert found.when_full.events == 0
    # The receiving unit is full for a real part of the waits: the block is measurable.
    assert found.when_full.exposure_days > 0.1 * found.with_room.exposure_days


def test_a_flag_set_back_to_zero_ends_the_wait_and_a_later_one_starts_it_again():
    sender, _ = _two_units(days=20)
    stay_id = sender.stays["stay_id"].iloc[0]
    first = sender.observations.loc[sender.observations["stay_id"] == stay_id].iloc[0]
    later = first["observed_at"] + pd.Timedelta(hours=2)
    extra = pd.DataFrame([
        {**first.to_dict(), "observed_at": first["observed_at"] + pd.Timedelta(hours=1),
         "value": 0.0, "recorded_at": later},
        {**first.to_dict(), "observed_at": later, "value": 1.0, "recorded_at": later}])
    stays = sender.stays.copy()
    stays.loc[stays["stay_id"] == stay_id, "discharged_at"] = later + pd.Timedelta(hours=5)
    changed = dataclasses.replace(sender, stays=stays,
                                  observations=pd.concat([sender.observations, extra]))
    assert ready_since(changed)[stay_id] == later
    # Set back to 0 for good: not waiting at all.
    final_zero = extra.iloc[[0]].assign(observed_at=later + pd.Timedelta(hours=1))
    cleared = dataclasses.replace(
        changed, observations=pd.concat([changed.observations, final_zero]))
    assert stay_id not in ready_since(cleared).index


def test_fewer_receiving_beds_mean_more_of_the_wait_blocked():
    def share_full(beds: int) -> float:
        found = learn_exit_block(*_two_units(days=120, beds=beds, seed=5))
        return found.when_full.exposure_days / (found.when_full.exposure_days
                                                + found.with_room.exposure_days)

    shares = [share_full(beds) for beds in (2, 5, 12)]
    assert shares[0] > shares[1] > shares[2]


def test_waits_that_end_elsewhere_are_left_out():
    sender, receiver = _two_units(days=120)
    found = learn_exit_block(sender, receiver)
    # Counted from the receiving unit's first recorded discharge on (before it, "full" is
    # unknown), as the module says.
    # A move at the very instant of the flag is no wait at all.
    known_from = receiver.stays["discharged_at"].min()
    ended = sender.stays["discharged_at"]
    flagged = sender.observations.set_index("stay_id")["observed_at"]
    after = ended.isna() | ((ended > known_from)
                            & (ended > sender.stays["stay_id"].map(flagged)))
    went = (sender.stays["to_unit"] == "R") & after
    still_in = ended.isna()
    assert found.waits == int((went | still_in).sum())
    assert found.with_room.events + found.when_full.events == int(went.sum())
