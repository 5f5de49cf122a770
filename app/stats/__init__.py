"""Pure numerics for Morrow: stay distributions, occupancy pmfs, capacity and forecast scores.

Numpy, pandas and scipy in; numpy arrays, pandas frames and frozen dataclasses out. Nothing here
knows about the database, the web layer or the plots.
"""
