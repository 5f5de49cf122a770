"""Failures the stress units found, kept as checks: training that stopped on a unit whose
validation stays all ended before the last scored day, and a time-series baseline whose fit
reported negative predictive variances (tests/stress/generator.py, units ST-NEURO and
ST-MEDW)."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from app.config import PROJECT_ROOT
from app.forecast import backtest
from tests.stress.generator import generate


def _morrow(db: str, *args: str) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "MORROW_TIMEZONE": "UTC", "OPENBLAS_NUM_THREADS": "1",
           "OMP_NUM_THREADS": "1", "PYTHONPATH": str(PROJECT_ROOT)}
    return subprocess.run([sys.executable, "-m", "app.cli.main", "--db", db, *args],
                          capture_output=True, text=True, env=env, timeout=600, check=False)


@pytest.mark.slow
def test_a_unit_whose_validation_stays_end_early_still_trains(tmp_path: Path) -> None:
    data = generate(tmp_path / "data", ["ST-NEURO"])
    db = f"sqlite:///{tmp_path / 'stress.db'}"
    for kind in ("units", "stays", "observations", "bookings"):
        done = _morrow(db, "import", kind, str(data / f"{kind}.csv"))
        assert done.returncode == 0, done.stderr
    # The morning whose training stopped with "all times must be within follow-up time".
    done = _morrow(db, "train", "--unit", "ST-NEURO", "--until", "2026-08-22T08:00")
    assert done.returncode == 0, done.stderr


def test_a_time_series_fit_with_negative_variances_falls_back(
        monkeypatch: pytest.MonkeyPatch) -> None:
    """statsmodels' SARIMAX on ST-MEDW's census of 2026-09-06 ran onto its boundary and gave
    variances near -9e7; the baseline then has to stay a distribution."""
    import statsmodels.tsa.statespace.sarimax as sarimax

    class BoundaryFit:
        def get_forecast(self, steps: int) -> object:
            return type("Forecast", (), {"predicted_mean": np.full(steps, 20.0),
                                         "var_pred_mean": np.full(steps, -9e7)})()

    class BoundaryModel:
        def __init__(self, *args: object, **kwargs: object) -> None:
            pass

        def fit(self, **kwargs: object) -> BoundaryFit:
            return BoundaryFit()

    monkeypatch.setattr(sarimax, "SARIMAX", BoundaryModel)
    series = np.r_[np.full(100, 18.0), np.full(100, 22.0)]
    pmfs = backtest._sarimax(series, 7, 60)
    assert len(pmfs) == 7
    for pmf in pmfs:
        assert np.all(np.isfinite(pmf)) and np.all(pmf >= 0)
        assert pmf.sum() == pytest.approx(1.0)
        assert int(np.argmax(pmf)) == 22  # the last census, with the series' own spread
