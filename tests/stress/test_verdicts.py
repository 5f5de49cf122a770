"""The stress table's verdict lines and the chance that a calibrated forecast passes them."""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

from tests.stress.run import BASELINES, PIT_BANDS, chance_calibrated_inside, verdicts


def _result(morrow: list[float], baseline: list[float], pit: tuple[float, float],
            se: tuple[float | None, float | None]) -> dict[str, Any]:
    def scores(crps: float, own: bool) -> dict[str, Any]:
        extra = {"pit_80": pit[0], "pit_95": pit[1], "pit_80_se": se[0],
                 "pit_95_se": se[1]} if own else {}
        return {"crps": crps, **extra}

    methods = {"morrow": {"by_horizon": [scores(c, True) for c in morrow],
                          "all": scores(float(np.mean(morrow)), True)}}
    for name in BASELINES:
        methods[name] = {"by_horizon": [scores(c, False) for c in baseline],
                         "all": scores(float(np.mean(baseline)), False)}
    return {"days": len(morrow), "methods": methods}


def test_verdict_names_each_miss_and_how_far_a_share_is_in_standard_errors() -> None:
    lines = verdicts({
        "GOOD": _result([1.0, 1.0], [1.2, 1.2], (0.80, 0.95), (0.03, 0.01)),
        "BAD": _result([1.0, 1.3], [1.2, 1.25], (0.70, 0.95), (0.02, None)),
    })
    assert lines[0].split() == ["GOOD", "meets"]
    # h2 is 1.3 / 1.25 = 1.04 of the best baseline; PIT80 0.05 under 0.75 is 2.5 SE.
    assert "h2 at 1.040" in lines[1] and "pit80 0.7000 outside 0.75-0.85, 2.5 SE" in lines[1]
    assert "CRPS" not in lines[1]  # 1.15 over all horizons is below the baselines' 1.225
    # Without every standard error there is no chance to state.
    assert not any("calibrated" in line for line in lines)


def test_chance_that_a_calibrated_forecast_passes_matches_a_simulation() -> None:
    # Monte Carlo outside the formula: draw each unit's two shares around their long-run
    # values (0.80, 0.95) with the given standard errors; count draws inside every band.
    errors = [(0.022, 0.008), (0.060, 0.038), (0.036, 0.020)]
    results = {f"U{i}": _result([1.0], [1.2], (0.8, 0.95), se) for i, se in enumerate(errors)}
    chance = chance_calibrated_inside(results)
    rng = np.random.default_rng(3)
    n = 200_000
    inside = np.ones(n, dtype=bool)
    for se80, se95 in errors:
        for (low, high), target, se in zip(PIT_BANDS.values(), (0.80, 0.95), (se80, se95),
                                           strict=True):
            share = rng.normal(target, se, n)
            inside &= (share >= low) & (share <= high)
    assert chance == pytest.approx(inside.mean(), abs=4 * np.sqrt(0.25 / n))
    # With these errors a calibrated forecast fails more often than it passes.
    assert chance is not None and chance < 0.5
