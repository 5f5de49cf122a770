"""Two speed-ups that must not change a number: the ceiling paths' bucket-table search
(app.stats.loss._search_left) against NumPy's own ``searchsorted``, and the shared grid's
reading of the current patients' curves in time (app.forecast.stay_grid.on_instants)
against NumPy's ``interp``, row by row."""

from __future__ import annotations

import numpy as np
import pytest

from app.forecast.stay_grid import on_instants
from app.stats.loss import _search_left


@pytest.mark.parametrize("seed", range(40))
def test_bucket_search_gives_numpys_indices(seed: int) -> None:
    rng = np.random.default_rng(seed)
    n = int(rng.integers(2, 400))
    # Ties (values rounded to 1-3 decimals), a flat stretch, queries outside the range, on
    # the values themselves, a hair below them, and infinite.
    values = np.sort(np.round(rng.uniform(-1, 1, n), int(rng.integers(1, 4))))
    if seed % 3 == 0:
        values = np.maximum.accumulate(np.r_[values[: n // 2], np.full(n - n // 2,
                                                                        values[n // 2])])
    queries = np.r_[rng.uniform(-1.5, 1.5, 8000), values[rng.integers(0, n, 2000)],
                    np.nextafter(values[rng.integers(0, n, 500)], -2.0), [np.inf, -np.inf]]
    np.testing.assert_array_equal(_search_left(values, queries),
                                  np.searchsorted(values, queries, side="left"))


def test_curves_on_the_grid_are_read_linearly_in_time() -> None:
    rng = np.random.default_rng(2)
    u = np.r_[0.0, np.sort(rng.uniform(0.01, 7.5, 60))]
    p = np.minimum.accumulate(rng.uniform(0.2, 1.0, (5, u.size - 1)), axis=1)
    t = np.r_[0.0, rng.uniform(0.0, u[-1], 300), u[1:]]
    got = on_instants(u, p, t)
    for row, curve in zip(got, np.hstack([np.ones((5, 1)), p]), strict=True):
        np.testing.assert_allclose(row, np.interp(t, u, curve), rtol=0, atol=1e-12)
