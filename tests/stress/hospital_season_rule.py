"""Does offering the hospital's yearly pattern to a unit's demand model help? A measurement,
run by hand:

    .venv/bin/python -m tests.stress.hospital_season_rule [HOSPITALS]   (300: about 6 minutes)

Invented hospitals only, made by mechanisms chosen apart from the model: a hospital season
(none in a third of hospitals; otherwise amplitude 0.05-0.35 on the log scale, peak between
mid-December and early February) that each unit shares only loosely (its own amplitude 0-1.5
times the hospital's, its peak up to 20 days off); three sibling units with two years of
history; a target unit with 1-2 years whose counts may also be overdispersed, change level
3-40 weeks before the end, or wander (AR(1) log-level), as in ``tests.stress.demand_rule``.
The target's terms are chosen on its held-out weeks with and without the hospital's pair
(:func:`app.stats.hospital_season.pooled_season` of all four units), and the 8 weeks after
its history are forecast as ``tests.stress.demand_rule`` does. The table gives the Poisson log
score per day with the hospital's pattern offered minus without, by kind of target.
"""

from __future__ import annotations

import math
import sys
import time
from datetime import date, timedelta

import numpy as np

from app.stats.arrivals import HOSPITAL, choose_demand_terms, fit_daily_rate, fit_terms
from app.stats.hospital_season import pooled_season
from tests.stress.demand_rule import FUTURE_WEEKS, forecast, mean_se, scores

SEED = 20261205


def _series(days: list[date], amp: float, peak: float, parts: set[str], base: float,
            rng: np.random.Generator, n_hist: int) -> np.ndarray:
    total = len(days)
    doy = np.array([d.timetuple().tm_yday for d in days], dtype=float)
    wd = np.array([d.weekday() for d in days])
    effect = rng.normal(0, 0.05, 7)
    effect[5:] -= rng.uniform(0.0, 0.35)
    log_mu = math.log(base) + effect[wd] + amp * np.cos(2 * np.pi * (doy - peak) / 365.25)
    if "step" in parts:
        at = n_hist - int(rng.integers(21, 281))
        size = rng.uniform(0.15, 0.40) * rng.choice([-1, 1])
        log_mu = log_mu + np.where(np.arange(total) >= at, math.log(1 + size), 0.0)
    if "ar1" in parts:
        phi, sd = rng.uniform(0.80, 0.97), rng.uniform(0.10, 0.30)
        x = np.empty(total)
        x[0] = rng.normal(0, sd)
        e = rng.normal(0, sd * math.sqrt(1 - phi**2), total)
        for i in range(1, total):
            x[i] = phi * x[i - 1] + e[i]
        log_mu = log_mu + x
    mu = np.exp(log_mu)
    if "nb2" in parts:
        alpha = rng.uniform(0.05, 0.30)
        mu = mu * rng.gamma(1 / alpha, alpha, total)
    return rng.poisson(mu)


def run_one(seed: int) -> dict[str, object]:
    rng = np.random.default_rng(seed)
    amp_h = 0.0 if rng.random() < 1 / 3 else rng.uniform(0.05, 0.35)
    peak_h = rng.uniform(-20, 40)
    n = int(rng.integers(365, 731))
    end = date(2025, 1, 1) + timedelta(days=int(rng.integers(0, 365)))
    days = [end - timedelta(days=n - 1 - i) for i in range(n + 7 * FUTURE_WEEKS)]
    parts = {p for p in ("nb2", "step", "ar1") if rng.random() < 0.4}
    amp_t = amp_h * rng.uniform(0.0, 1.5)
    y = _series(days, amp_t, peak_h + rng.uniform(-20, 20), parts, rng.uniform(1.0, 8.0),
                rng, n)
    siblings = []
    for _ in range(3):
        sib_days = [end - timedelta(days=729 - i) for i in range(730)]
        sib_parts = {p for p in ("nb2", "step", "ar1") if rng.random() < 0.4}
        siblings.append((sib_days, _series(sib_days, amp_h * rng.uniform(0.7, 1.3),
                                           peak_h + rng.uniform(-10, 10), sib_parts,
                                           rng.uniform(1.0, 8.0), rng, 730)))
    hd, hy = days[:n], y[:n]
    pair = pooled_season([*siblings, (hd, hy)])
    plain = fit_daily_rate(hd, hy, seasonal=False)
    result: dict[str, object] = {"short": n < 456, "seasonal": amp_t >= 0.1}
    score = {}
    for name, offered in (("without", None), ("with", pair)):
        choice = choose_demand_terms(hd, hy, alpha=plain.alpha, hospital_season=offered)
        fit = fit_terms(hd, hy, None, choice.seasonal, choice.level_half_life, plain=plain,
                        hospital_season=offered)
        score[name] = scores(forecast(fit, days, y, n), y[n:], plain.alpha)[0]
        result[f"{name}_choice"] = choice.seasonal
    result["gain"] = score["with"] - score["without"]
    return result


def main() -> None:
    count = int(sys.argv[1]) if len(sys.argv) > 1 else 100
    seeds = np.random.SeedSequence(SEED).generate_state(count)
    began = time.process_time()
    rows = [run_one(int(s)) for s in seeds]
    print(f"# The hospital's yearly pattern offered: {count} invented hospitals, seed {SEED}, "
          f"CPU {time.process_time() - began:.0f} s\n")
    print("Δ Poisson log score per day over the 8 weeks after the history, offered minus not "
          "(higher is better), mean ± standard error; `taken`: targets whose choice was the "
          "hospital's pattern.\n")
    print("| targets | n | taken | Δ log score/day ± SE | t |")
    print("|---|---|---|---|---|")
    kinds = {
        "all": lambda r: True,
        "history under 456 days (no own season tried)": lambda r: r["short"],
        "history 456 days or more": lambda r: not r["short"],
        "own season amplitude 0.1 or more": lambda r: r["seasonal"],
        "own season under 0.1": lambda r: not r["seasonal"],
    }
    for label, keep in kinds.items():
        r = [x for x in rows if keep(x)]
        if not r:
            continue
        m, se = mean_se([float(x["gain"]) for x in r])  # type: ignore[arg-type]
        taken = sum(x["with_choice"] == HOSPITAL for x in r)
        print(f"| {label} | {len(r)} | {taken} | {m:+.5f} ± {se:.5f} | "
              f"{m / se if se > 0 else 0:+.2f} |")


if __name__ == "__main__":
    main()
