"""Which rule picks the emergency demand terms better: the best held-out score, or the
simplest candidate within one standard error of it? A measurement, run by hand:

    .venv/bin/python -m tests.stress.demand_rule [SERIES_PER_GROUP]   (300: about 7 minutes)

Simulated daily counts of an invented unit only, made by mechanisms chosen apart from the
model: stationary Poisson; NB2-overdispersed days; a change of level 3-30 weeks before the end;
a wandering AR(1) log-level; a winter season; and mixtures of these (300 series each at the
default). For each series the history (365-730 days) is fitted as training does (the plain
fit's dispersion, the candidates replayed on the last 13 weeks by
``app.stats.arrivals.replay_candidates``), each rule picks its terms, and the next 8 weeks are
forecast from weekly origins with the local level computed on all counts before each origin
(as ``app.forecast.arrivals._emergency_demand``), scored by the Poisson and NB2 log score per
day and the error of weekly totals. The table goes to standard output.
"""

from __future__ import annotations

import math
import sys
import time
from datetime import date, timedelta

import numpy as np
from scipy import stats

from app.forecast.arrivals import LEVEL_LOOKBACK_HALF_LIVES
from app.stats.arrivals import (
    chosen_by_one_se,
    fit_daily_rate,
    fit_terms,
    level_multiplier,
    replay_candidates,
)

FUTURE_WEEKS = 8
GROUPS = ("poisson", "nb2", "step", "ar1", "season", "mixed")
SEED = 20240611


def simulate(group: str, rng: np.random.Generator):
    n = int(rng.integers(365, 731))
    total = n + 7 * FUTURE_WEEKS
    start = date(2019, 1, 1) + timedelta(days=int(rng.integers(0, 365)))
    days = [start + timedelta(days=i) for i in range(total)]
    wd = np.array([d.weekday() for d in days])
    doy = np.array([d.timetuple().tm_yday for d in days], dtype=float)
    # weekday pattern: weekend dip plus small weekday noise (log scale)
    wd_eff = rng.normal(0, 0.05, 7)
    wd_eff[5:] -= rng.uniform(0.0, 0.35)
    log_mu = math.log(rng.uniform(1.0, 8.0)) + wd_eff[wd]
    if group == "mixed":
        parts = {p for p in ("nb2", "step", "ar1", "season") if rng.random() < 0.5}
        if not parts:
            parts = {str(rng.choice(["nb2", "step", "ar1", "season"]))}
    else:
        parts = {group} - {"poisson"}
    desc = []
    if "season" in parts:
        amp = rng.uniform(0.10, 0.35)
        peak = rng.uniform(-20, 40)  # mid-December .. early February
        log_mu = log_mu + amp * np.cos(2 * np.pi * (doy - peak) / 365.25)
        desc.append(f"season{amp:.2f}")
    if "step" in parts:
        size = rng.uniform(0.15, 0.40) * rng.choice([-1, 1])
        at = n - int(rng.integers(21, 211))  # 3..30 weeks before the end of the history
        log_mu = log_mu + np.where(np.arange(total) >= at, math.log(1 + size), 0.0)
        desc.append(f"step{size:+.2f}@{n - at}")
    if "ar1" in parts:
        phi = rng.uniform(0.80, 0.97)
        sd = rng.uniform(0.10, 0.30)
        e = rng.normal(0, sd * math.sqrt(1 - phi**2), total)
        x = np.empty(total)
        x[0] = rng.normal(0, sd)
        for i in range(1, total):
            x[i] = phi * x[i - 1] + e[i]
        log_mu = log_mu + x
        desc.append(f"ar{phi:.2f}/{sd:.2f}")
    mu = np.exp(log_mu)
    if "nb2" in parts:
        alpha = rng.uniform(0.05, 0.30)
        mu = mu * rng.gamma(1 / alpha, alpha, total)
        desc.append(f"nb{alpha:.2f}")
    y = rng.poisson(mu)
    return days, y, n, ",".join(desc) or "poisson"


def forecast(rate, days, y, n):
    """Means for the 8 future weeks, each from its own weekly origin."""
    out = np.empty(7 * FUTURE_WEEKS)
    h = rate.level_half_life
    for j in range(FUTURE_WEEKS):
        o = n + 7 * j
        week = days[o:o + 7]
        mult = 1.0
        if h is not None:
            first = max(0, o - int(LEVEL_LOOKBACK_HALF_LIVES * h))
            mult = level_multiplier(y[first:o], rate.mean(days[first:o]), h)
        out[7 * j:7 * j + 7] = rate.mean(week) * mult
    return out


def scores(mu, obs, alpha):
    mu = np.maximum(mu, 1e-9)
    pois = float(stats.poisson.logpmf(obs, mu).mean())
    if alpha is None:
        nb = pois
    else:
        size = 1 / alpha
        nb = float(stats.nbinom.logpmf(obs, size, size / (size + mu)).mean())
    mae = float(np.mean(np.abs(mu.reshape(FUTURE_WEEKS, 7).sum(1)
                               - obs.reshape(FUTURE_WEEKS, 7).sum(1))))
    return pois, nb, mae


def run_one(group, seed):
    rng = np.random.default_rng(seed)
    days, y, n, desc = simulate(group, rng)
    hd, hy = days[:n], y[:n]
    plain = fit_daily_rate(hd, hy, seasonal=False)
    replayed = replay_candidates(hd, hy, alpha=plain.alpha)
    assert replayed is not None
    table = replayed.log_scores
    best = max(replayed.candidates, key=lambda c: table[c].mean())
    one_se = chosen_by_one_se(replayed.candidates, table, best)
    fits = {}
    for s, h in {one_se, best}:
        fits[(s, h)] = fit_terms(hd, hy, None, s, h, plain=plain)
    obs = y[n:]
    res = {}
    for name, key in (("one_se", one_se), ("best", best)):
        res[name] = scores(forecast(fits[key], days, y, n), obs, plain.alpha)
    return dict(group=group, seed=seed, n=n, desc=desc, one_se=one_se, best=best,
                differ=one_se != best, season_differs=one_se[0] != best[0],
                d_pois=res["best"][0] - res["one_se"][0],
                d_nb=res["best"][1] - res["one_se"][1],
                d_mae=res["best"][2] - res["one_se"][2],
                mae_one_se=res["one_se"][2])


def mean_se(x):
    x = np.asarray(x, dtype=float)
    return x.mean(), (x.std(ddof=1) / math.sqrt(x.size) if x.size > 1 else float("nan"))


def table(rows):
    lines = ["| group | series | rules differ | season differs | Δ Poisson log score/day "
             "(best − 1SE) ± SE | t | Δ NB2 log score/day ± SE | Δ weekly-total MAE ± SE "
             "(neg = best better) | 1SE weekly MAE | Δ Poisson among differing ± SE |",
             "|---|---|---|---|---|---|---|---|---|---|"]
    for g in (*GROUPS, "all"):
        r = [x for x in rows if g == "all" or x["group"] == g]
        if not r:
            continue
        dp, sp = mean_se([x["d_pois"] for x in r])
        dn, sn = mean_se([x["d_nb"] for x in r])
        dm, sm = mean_se([x["d_mae"] for x in r])
        diff = [x for x in r if x["differ"]]
        dd, sd = mean_se([x["d_pois"] for x in diff]) if diff else (float("nan"),) * 2
        t = dp / sp if sp > 0 else float("nan")
        lines.append(
            f"| {g} | {len(r)} | {len(diff)} ({100 * len(diff) / len(r):.0f}%) | "
            f"{sum(x['season_differs'] for x in r)} | {dp:+.5f} ± {sp:.5f} | {t:+.2f} | "
            f"{dn:+.5f} ± {sn:.5f} | {dm:+.3f} ± {sm:.3f} | "
            f"{np.mean([x['mae_one_se'] for x in r]):.2f} | {dd:+.5f} ± {sd:.5f} |")
    return "\n".join(lines)


def main() -> None:
    per_group = int(sys.argv[1]) if len(sys.argv) > 1 else 60
    seeds = np.random.SeedSequence(SEED).generate_state(len(GROUPS) * per_group)
    rows = []
    t0 = time.process_time()
    for gi, g in enumerate(GROUPS):
        for k in range(per_group):
            rows.append(run_one(g, int(seeds[gi * per_group + k])))
        print(f"{g}: done, cpu {time.process_time() - t0:.0f}s", flush=True)
    tab = table(rows)
    # which candidates each rule picked
    from collections import Counter
    picks = {r: Counter(str(x[r]) for x in rows) for r in ("one_se", "best")}
    cpu = time.process_time() - t0
    text = (f"# Best-score vs one-SE rule: 8-week-ahead forecasts on simulated series\n\n"
            f"{len(rows)} series ({per_group} per group), seed {SEED}, CPU {cpu:.0f}s.\n"
            "Δ = best rule minus 1-SE rule, mean over series of the per-series mean over the "
            "56 future days (log score: higher is better, so Δ>0 favours best; weekly MAE: "
            "lower is better, so Δ<0 favours best). SE across series. NB2 score uses the "
            "plain fit's alpha (same for both rules; Poisson where none).\n\n"
            f"{tab}\n\nPicks (seasonal, half-life): 1SE {dict(picks['one_se'])}; "
            f"best {dict(picks['best'])}\n")
    print(text)


if __name__ == "__main__":
    main()
