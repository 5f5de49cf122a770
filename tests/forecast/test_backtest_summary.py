"""The backtest summary's calibration shares and their standard errors, by hand."""

from __future__ import annotations

from datetime import date

import numpy as np
import pytest

from app.forecast.backtest import BATCH_MORNINGS, Scored, summarise


def _scored(inside: list[bool], days: int = 7) -> Scored:
    """One forecast per (morning, night): uniform over 0..9 beds. An outcome of 5 puts the
    randomised PIT in [0.5, 0.6], inside both bands (share 1); an outcome of 20, beyond the
    support, puts it at 1, outside both (share 0) (Czado, Gneiting & Held 2009)."""
    s = Scored()
    for morning, hit in enumerate(inside):
        for night in range(1, days + 1):
            s.horizon.append(night)
            s.morning.append(morning)
            s.pmf.append(np.full(10, 0.1))
            s.outcome.append(5 if hit else 20)
    return s


def test_shares_and_their_standard_errors_are_batched_by_fortnights_of_mornings() -> None:
    # Four fortnights of mornings alternately all inside and all outside the bands: batch
    # means 1, 0, 1, 0, standard deviation sqrt(1/3), over sqrt(4) batches.
    inside = [(m // BATCH_MORNINGS) % 2 == 0 for m in range(4 * BATCH_MORNINGS)]
    summary = summarise("X", date(2026, 1, 1), date(2026, 2, 25), 7, {"morrow": _scored(inside)})
    for scores in (summary["methods"]["morrow"]["all"],
                   *summary["methods"]["morrow"]["by_horizon"]):
        assert scores["pit_80"] == pytest.approx(0.5)
        assert scores["pit_95"] == pytest.approx(0.5)
        assert scores["pit_80_se"] == pytest.approx(np.sqrt(1 / 3) / 2)
        assert scores["pit_95_se"] == pytest.approx(np.sqrt(1 / 3) / 2)
    # Alternating mornings: every fortnight's mean is 1/2, so the error between them is 0
    # (batched by rows, 7 per morning, the means would differ).
    alternate = [m % 2 == 0 for m in range(4 * BATCH_MORNINGS)]
    summary = summarise("X", date(2026, 1, 1), date(2026, 2, 25), 7,
                        {"morrow": _scored(alternate)})
    assert summary["methods"]["morrow"]["all"]["pit_80_se"] == pytest.approx(0.0, abs=1e-12)


def test_too_few_mornings_for_a_standard_error_give_none() -> None:
    summary = summarise("X", date(2026, 1, 1), date(2026, 1, 20), 7,
                        {"morrow": _scored([True] * 20)})
    assert summary["methods"]["morrow"]["all"]["pit_80_se"] is None
    assert summary["methods"]["morrow"]["all"]["pit_80"] == pytest.approx(1.0)
