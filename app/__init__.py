"""Morrow: forecasts a hospital unit's bed occupancy for tonight and the next seven days."""

__version__ = "0.1.0"
