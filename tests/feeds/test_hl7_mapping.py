"""The feed mapping file: its defaults (HL7 v2.5.1 tables 0007 and 0001) and the example."""

from __future__ import annotations

from pathlib import Path

import pytest

from app.config import PROJECT_ROOT
from app.feeds.mapping import FeedMapping, MappingError, load_mapping, sex_of

EXAMPLE = PROJECT_ROOT / "demo_data" / "feeds.example.toml"


def test_defaults_without_a_file() -> None:
    mapping = FeedMapping()
    # HL7 v2.5.1 table 0007: E emergency, U urgent, C elective, R routine.
    assert [mapping.admission_type_for(c) for c in "EUCR"] == [
        "emergency", "emergency", "elective", "elective"]
    assert mapping.admission_type_for("N") is None  # newborn: not mapped by default
    # A point of care equal to a unit code is that unit; others are not mapped.
    assert mapping.unit_for("KV-CRIT", {"KV-CRIT"}) == "KV-CRIT"
    assert mapping.unit_for("ICU-EAST", {"KV-CRIT"}) is None
    # An observation code equal to a known score name is that score (any case).
    assert mapping.score_for("NEWS2", None) == "news2"
    assert mapping.score_for("GLU", None) is None
    assert mapping.score_for("frailty", None, {"frailty"}) == "frailty"


def test_sex_codes_of_table_0001() -> None:
    # HL7 v2.5.1 table 0001: F female, M male, O other, U unknown, A ambiguous, N n/a.
    assert [sex_of(c) for c in ("F", "M", "O", "U", "A", "N", "", None)] == [
        "f", "m", "x", None, "x", "x", None, None]


def test_the_example_file() -> None:
    mapping = load_mapping(EXAMPLE)
    assert mapping.unit_for("KVH-ICU", set()) == "KV-CRIT"
    assert mapping.is_ignored("KVH-ED")
    assert mapping.score_for("KV-NEWS", "L") == "news2"
    assert mapping.score_for("KV-NEWS", "LN") is None  # the system matters when given
    assert mapping.admission_type_for("A") == "emergency"
    assert mapping.admission_type_for("E") == "emergency"  # built-in kept
    assert mapping.source_for("TH") == "theatre" and mapping.source_for("ZZ") == "zz"
    assert mapping.outcome_for("20") == "died"
    assert (mapping.keep_days, mapping.host, mapping.port) == (30, "127.0.0.1", 2575)


@pytest.mark.parametrize(("text", "says"), [
    ("[units]\n\"X\" = \"bad code/\"\n", "[units]"),
    ("[admission_types]\n\"Z\" = \"urgent\"\n", "emergency, elective"),
    ("[outcomes]\n\"9\" = \"left\"\n", "home, ward, transfer, died"),
    ("[scores]\n\"X\" = \"NEWS 2\"\n", "lower case"),
    ("[unitz]\n", "unknown table"),
    ("[listen]\nport = 70000\n", "port"),
    ("[dead_letters]\nkeep_days = 0\n", "keep_days"),
    ("not toml = = \n", "not a TOML file"),
])
def test_mistakes_in_the_file_are_named(tmp_path: Path, text: str, says: str) -> None:
    path = tmp_path / "feeds.toml"
    path.write_text(text)
    with pytest.raises(MappingError) as caught:
        load_mapping(path)
    assert says in str(caught.value) and str(path) in str(caught.value)
