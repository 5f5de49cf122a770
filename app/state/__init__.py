"""What was known about a unit at an instant ("as of"): how models and forecasts read data."""

from app.state.frames import UnitState, latest_observations
from app.state.load import load_state, with_current_observations

__all__ = ["UnitState", "latest_observations", "load_state", "with_current_observations"]
