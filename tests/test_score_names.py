"""Score names, their published ranges and the observation-time bound of score entry.

Ranges: SOFA 0-24 (Vincent et al., Intensive Care Med 1996: six organ systems, 0-4 points
each), NEWS2 0-20 (Royal College of Physicians, 2017), APACHE II 0-71 (Knaus et al., Crit Care
Med 1985), as DATA_CONTRACT.md states them. Each is checked at both edges and one step past.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from zoneinfo import ZoneInfo

import pytest

from app import bounds, score_names


@pytest.mark.parametrize(("name", "low", "high", "label"), [
    ("sofa", 0, 24, "SOFA"), ("news2", 0, 20, "NEWS2"), ("apache_ii", 0, 71, "APACHE II")])
def test_published_ranges_at_their_edges(name: str, low: int, high: int, label: str) -> None:
    assert score_names.problem(name, float(low)) is None
    assert score_names.problem(name, float(high)) is None
    rule = f"{label} must be a whole number from {low} to {high}"
    for wrong in (low - 1.0, high + 1.0, low + 0.5, None, float("nan")):
        assert score_names.problem(name, wrong) == rule, wrong
    assert score_names.label_with_range(name) == f"{label} ({low}\u2013{high})"


def test_a_flag_is_one_or_zero_and_a_site_score_keeps_its_name() -> None:
    assert score_names.problem("fit_for_discharge", 1.0) is None
    assert score_names.problem("fit_for_discharge", 0.0) is None
    assert "flag" in (score_names.problem("fit_for_discharge", 2.0) or "")
    # A site-defined score: any number, shown by the name it was given.
    assert score_names.problem("delirium_cam", 37.5) is None
    assert score_names.label_with_range("delirium_cam") == "delirium_cam"
    assert score_names.problem("delirium_cam", None) == "delirium_cam must be a number"


def test_an_observation_time_lies_between_the_lookback_and_now() -> None:
    now = datetime(2026, 3, 29, 1, 30, tzinfo=UTC)  # the night UK clocks go forward
    zone = ZoneInfo("Europe/London")
    assert bounds.check_observed_at(now, now, zone) == now
    earliest = now - bounds.SCORE_LOOKBACK
    assert bounds.check_observed_at(earliest, now, zone) == earliest
    with pytest.raises(bounds.OutOfBounds, match="is in the future"):
        bounds.check_observed_at(now + timedelta(minutes=1), now, zone)
    with pytest.raises(bounds.OutOfBounds, match="more than 7 days ago"):
        bounds.check_observed_at(earliest - timedelta(minutes=1), now, zone)
    # The message shows the site's clock: 01:30 UTC is 02:30 BST that morning.
    with pytest.raises(bounds.OutOfBounds, match=r"up to now \(Sun 29 Mar 2026 02:30\)"):
        bounds.check_observed_at(now + timedelta(hours=1), now, zone)
