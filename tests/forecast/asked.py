"""Counting which units' patients are asked of their length-of-stay models
(``app.forecast.stay_grid.predict_stays``), for the tests that a hospital's forecasts ask each
unit once."""

from __future__ import annotations

import pytest

from app.forecast import stay_grid
from app.state import UnitState


def count_asked(monkeypatch: pytest.MonkeyPatch) -> list[str]:
    """The list that gains a unit's code each time its patients are asked, from now on."""
    asked: list[str] = []
    real = stay_grid.predict_stays

    def counted(model: object, state: UnitState, instants: object) -> object:
        asked.append(state.unit)
        return real(model, state, instants)  # type: ignore[arg-type]

    monkeypatch.setattr(stay_grid, "predict_stays", counted)
    return asked
