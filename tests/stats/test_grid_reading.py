"""A speed-up that must not change a number: the shared grid's reading of the current
patients' curves in time (app.forecast.stay_grid.on_instants) against NumPy's ``interp``,
row by row. (The loss paths' compiled searches: tests/stats/test_loss_kernels.py.)"""

from __future__ import annotations

import numpy as np

from app.forecast.stay_grid import on_instants


def test_curves_on_the_grid_are_read_linearly_in_time() -> None:
    rng = np.random.default_rng(2)
    u = np.r_[0.0, np.sort(rng.uniform(0.01, 7.5, 60))]
    p = np.minimum.accumulate(rng.uniform(0.2, 1.0, (5, u.size - 1)), axis=1)
    t = np.r_[0.0, rng.uniform(0.0, u[-1], 300), u[1:]]
    got = on_instants(u, p, t)
    for row, curve in zip(got, np.hstack([np.ones((5, 1)), p]), strict=True):
        np.testing.assert_allclose(row, np.interp(t, u, curve), rtol=0, atol=1e-12)
