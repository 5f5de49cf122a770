"""What was known about a unit at an instant ("as of"): the only way models and forecasts read data."""

from app.state.frames import UnitState, latest_observations
from app.state.load import load_state

__all__ = ["UnitState", "latest_observations", "load_state"]
