"""Routing learnt from a unit's discharges (app/forecast/routing.py): plain counts, the
Dirichlet shrinkage of small groups, and the "as of" rule."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from app.forecast.routing import PRIOR_STRENGTH, Routing, destination_of, fit_routing
from tests.forecast.unit_state import unit_state

UNITS = ["TR-CRIT", "TR-WARD", "TR-HDU"]
CUT = pd.Timestamp("2026-03-01T08:00", tz="UTC")


class _AgeGroups:
    """Admission groups by age alone: node 1 under 60, node 2 from 60 (a stand-in for the
    log-rank tree, whose leaves ``fit_routing`` only asks for by ``group_of``)."""

    groups = (type("G", (), {"node": 1})(), type("G", (), {"node": 2})())

    @staticmethod
    def group_of(x: Any) -> np.ndarray:
        return np.where(np.asarray(x, dtype=float)[:, 0] >= 60, 2, 1)


class _AgeDesign:
    @staticmethod
    def covariate_matrix(frame: pd.DataFrame) -> np.ndarray:
        return frame[["age"]].to_numpy(dtype=float)


def _stays(seed: int = 2) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(90):
        admitted = CUT - pd.Timedelta(days=60) + pd.Timedelta(hours=int(rng.integers(0, 1300)))
        discharged = admitted + pd.Timedelta(hours=float(rng.uniform(10, 200)))
        age = int(rng.integers(20, 95))
        where = rng.choice(["TR-WARD", "TR-HDU", "home", "died", "KV-OTHER", "none"])
        outcome = {"TR-WARD": "ward", "TR-HDU": "transfer", "home": "home", "died": "died",
                   "KV-OTHER": "ward", "none": None}[str(where)]
        to_unit = str(where) if str(where).startswith(("TR-", "KV-")) else None
        rows.append({"stay_id": f"TR-{i:03d}", "admitted_at": admitted,
                     "discharged_at": discharged, "admission_type": "emergency",
                     "outcome": outcome, "age": age, "to_unit": to_unit,
                     "from_unit": "TR-HDU" if i % 7 == 0 else None})
    return pd.DataFrame(rows)


def _state(stays: pd.DataFrame, as_of: pd.Timestamp = CUT) -> Any:
    return unit_state("TR-CRIT", stays, as_of, beds=8).known_at(as_of)


def test_destinations_follow_the_contract_words() -> None:
    units = {"TR-WARD"}
    assert destination_of("died", "TR-WARD", units) == "died"
    assert destination_of("ward", "TR-WARD", units) == "TR-WARD"
    assert destination_of("ward", "KV-OTHER", units) == "elsewhere"  # not a unit of ours
    assert destination_of("home", None, units) == "home"
    assert destination_of(None, None, units) == "elsewhere"


def test_shares_are_plain_counts_shrunk_by_a_dirichlet_prior() -> None:
    stays = _stays()
    state = _state(stays)
    payload = fit_routing(state, UNITS, _AgeGroups, _AgeDesign)
    routing = Routing.from_payload({"routing": payload})
    assert routing is not None
    ended = stays.loc[stays["discharged_at"] <= CUT].copy()
    ended["dest"] = [destination_of(o, t, {"TR-WARD", "TR-HDU"})
                     for o, t in zip(ended["outcome"], ended["to_unit"], strict=True)]
    ended["group"] = np.where(ended["age"] >= 60, 2, 1)
    dests = list(routing.destinations)
    assert dests == ["TR-HDU", "TR-WARD", "home", "died", "elsewhere"]
    # Plain count (pandas), the unit overall:
    overall = ended["dest"].value_counts(normalize=True)
    for d in dests:
        assert routing.overall[d] == float(overall.get(d, 0.0))
    # Each group: the posterior mean of a Dirichlet(a * overall) prior after the group's
    # counts (scipy's Dirichlet mean, the conjugate update of a multinomial).
    for g in (1, 2):
        counts = ended.loc[ended["group"] == g, "dest"].value_counts()
        alpha = np.array([counts.get(d, 0) + PRIOR_STRENGTH * routing.overall[d]
                          for d in dests])
        alpha = np.maximum(alpha, 1e-12)  # scipy needs every concentration > 0
        expected = stats.dirichlet(alpha).mean()
        got = np.array([routing.shares_for(g)[d] for d in dests])
        np.testing.assert_allclose(got, expected, atol=1e-9)
        assert abs(got.sum() - 1.0) < 1e-12
    # An unknown group and None fall back on the overall shares.
    assert routing.shares_for(None) == dict(routing.overall)
    assert routing.shares_for(99) == dict(routing.overall)
    assert routing.to_unit("TR-WARD", 2) == routing.shares_for(2)["TR-WARD"]
    assert routing.receiving_units() == ("TR-HDU", "TR-WARD")
    # Where the unit's own stays came from: one in seven from TR-HDU, by group.
    came = stays.loc[stays["from_unit"] == "TR-HDU"]
    assert routing.senders() == ("TR-HDU",)
    by_group = routing.received_groups("TR-HDU")
    assert abs(by_group.get(2, 0.0) - float(np.mean(came["age"] >= 60))) < 1e-12


def test_a_discharge_after_the_cut_off_is_not_counted() -> None:
    stays = _stays()
    early = CUT - pd.Timedelta(days=10)
    at_cut = fit_routing(_state(stays), UNITS, _AgeGroups, _AgeDesign)
    before = fit_routing(_state(stays, CUT).known_at(early), UNITS, _AgeGroups, _AgeDesign)
    n_before = int((stays["discharged_at"] <= early).sum())
    n_at_cut = int((stays["discharged_at"] <= CUT).sum())
    assert n_before < n_at_cut
    assert sum(before["counts"]["overall"].values()) == n_before
    assert sum(at_cut["counts"]["overall"].values()) == n_at_cut
    # A state whose frame still held a later discharge (as a caller might pass) counts it not.
    raw = unit_state("TR-CRIT", stays, early, beds=8)
    assert sum(fit_routing(raw, UNITS, _AgeGroups, _AgeDesign)["counts"]["overall"].values()
               ) == n_before


def test_a_model_without_routing_reads_as_none() -> None:
    assert Routing.from_payload({"los": {}, "arrivals": {}}) is None
