"""The hospital total counts a patient passed on from one unit to another once
(app/forecast/hospital_total.py): checked against a Monte Carlo of the joint process."""

from __future__ import annotations

from zoneinfo import ZoneInfo

import numpy as np
from scipy import stats

from app.forecast.hospital_total import total_by_night
from app.stats.poisson_binomial import convolve_pmfs, poisson_binomial_pmf

TZ = ZoneInfo("UTC")
CENSUS = "2026-11-03T00:00:00+00:00"
# Invented current patients of TX-CRIT: chance still there, chance in TX-WARD by the census.
P_CRIT = np.array([0.9, 0.7, 0.55, 0.4, 0.2, 0.1])
Q_WARD = np.array([0.05, 0.2, 0.3, 0.45, 0.5, 0.3])
REST_CRIT, REST_WARD = 1.5, 9.0  # other patients of each unit: Poisson means


def _forecasts() -> dict[str, dict]:
    crit = convolve_pmfs(poisson_binomial_pmf(P_CRIT),
                         stats.poisson(REST_CRIT).pmf(np.arange(40)))
    ward = convolve_pmfs(poisson_binomial_pmf(Q_WARD),
                         stats.poisson(REST_WARD).pmf(np.arange(60)))
    ids = [f"TX-S{i}" for i in range(P_CRIT.size)]
    return {
        "TX-CRIT": {"days": [{"census_at": CENSUS, "pmf": list(crit), "beds": 8}],
                    "stays": [{"stay_id": s, "p_present": [float(p)]}
                              for s, p in zip(ids, P_CRIT, strict=True)]},
        "TX-WARD": {"days": [{"census_at": CENSUS, "pmf": list(ward), "beds": 20,
                              "moved_in": {"TX-CRIT": {s: float(q) for s, q in
                                                       zip(ids, Q_WARD, strict=True)}}}],
                    "stays": []},
    }


def _moments(pmf: np.ndarray) -> tuple[float, float]:
    k = np.arange(pmf.size)
    mean = float((k * pmf).sum())
    return mean, float((k**2 * pmf).sum() - mean**2)


def test_the_total_counts_a_moving_patient_once() -> None:
    [night] = total_by_night(_forecasts(), TZ)
    # Outside check: a Monte Carlo of the joint process, numpy sampling each patient's place
    # (still in TX-CRIT, moved on to TX-WARD, gone) and the other patients of both units.
    rng = np.random.default_rng(8)
    n = 400_000
    u = rng.random((n, P_CRIT.size))
    in_hospital = (u < P_CRIT + Q_WARD).sum(axis=1)
    total = in_hospital + rng.poisson(REST_CRIT, n) + rng.poisson(REST_WARD, n)
    mc_mean, mc_var = float(total.mean()), float(total.var())
    exact_mean = float(P_CRIT.sum() + Q_WARD.sum() + REST_CRIT + REST_WARD)
    exact_var = float(((P_CRIT + Q_WARD) * (1 - P_CRIT - Q_WARD)).sum() + REST_CRIT
                      + REST_WARD)
    # The Monte Carlo agrees with the closed form (variance of a sum of independent parts)...
    assert abs(mc_mean - exact_mean) < 4 * np.sqrt(exact_var / n)
    assert abs(mc_var - exact_var) / exact_var < 0.02
    # ... and so does the total's distribution, mean, variance and median.
    assert abs(night.mean - exact_mean) < 1e-6
    assert abs(night.variance - exact_var) < 1e-6
    assert abs(float(np.median(total)) - night.median) <= 1
    lo, hi = np.quantile(total, [0.1, 0.9])
    assert abs(night.band80[0] - lo) <= 1 and abs(night.band80[1] - hi) <= 1
    # Treating the two units as independent would overstate the variance by 2 sum p q.
    naive = convolve_pmfs(*(np.asarray(f["days"][0]["pmf"]) for f in _forecasts().values()))
    _, naive_var = _moments(naive)
    assert abs(naive_var - exact_var - 2 * float((P_CRIT * Q_WARD).sum())) < 1e-6


def test_squeezing_keeps_the_mean_and_gives_the_variance() -> None:
    from app.forecast.hospital_total import with_variance

    base = stats.poisson(12.0).pmf(np.arange(60))
    base = base / base.sum()
    out = with_variance(base, 9.0)
    mean, var = _moments(out)
    assert abs(mean - 12.0) < 1e-9 and abs(var - 9.0) < 1e-8
    assert np.all(out >= 0) and abs(out.sum() - 1) < 1e-12
