"""Should the demand terms be chosen on origins spread over the last year rather than on the
last 13 weeks? A measurement, run by hand:

    .venv/bin/python -m tests.stress.season_origins [SERIES_PER_GROUP]   (150: about 4 minutes)

Over 13 weeks an annual season looks like a trend, which a local level follows as well, so
the season can lose there and be missed for the rest of the year. Three ways of choosing,
each by the one-standard-error rule (``app.stats.arrivals.chosen_by_one_se``):

- ``recent``: the last 13 weekly origins (what training does);
- ``spread``: 13 origins up to 28 days apart (``app.stats.arrivals.replay_candidates``'s
  ``step``), as far back as the season still has a year of history before each;
- ``two_stage``: the season by the spread origins (each side at its best half-life), then
  the half-life by the recent ones.

On the simulated histories of ``tests.stress.demand_rule`` (invented counts made apart from
the model), each is scored on the next 8 weeks; the table gives ``spread`` and
``two_stage`` minus ``recent``.
"""

from __future__ import annotations

import sys
import time

import numpy as np

from app.stats.arrivals import (
    Candidate,
    Replayed,
    chosen_by_one_se,
    fit_daily_rate,
    fit_terms,
    replay_candidates,
)
from tests.stress.demand_rule import GROUPS, SEED, forecast, mean_se, scores, simulate

ORIGINS, HORIZON, MAX_STEP, SEASON_DAYS = 13, 7, 28, 365


def _one_se(replayed: Replayed, candidates: list[Candidate]) -> Candidate:
    table = replayed.log_scores
    best = max(candidates, key=lambda c: table[c].mean())
    return chosen_by_one_se(candidates, table, best)


def _spread_step(n: int) -> int:
    return int(max(HORIZON, min(MAX_STEP, (n - SEASON_DAYS) // ORIGINS)))


def choices(days, y, alpha) -> dict[str, Candidate]:
    recent = replay_candidates(days, y, alpha=alpha)
    spread = replay_candidates(days, y, alpha=alpha, step=_spread_step(len(days)))
    assert recent is not None and spread is not None
    out = {"recent": _one_se(recent, list(recent.candidates)),
           "spread": _one_se(spread, list(spread.candidates))}
    season = False
    if any(s for s, _ in spread.candidates):
        table = spread.log_scores
        best_of = [max([c for c in spread.candidates if c[0] == s], key=lambda c: table[c].mean())
                   for s in (False, True)]
        season = _one_se(spread, best_of)[0]
    out["two_stage"] = _one_se(recent, [c for c in recent.candidates if c[0] == season])
    return out


def run_one(group: str, seed: int) -> dict[str, object]:
    rng = np.random.default_rng(seed)
    days, y, n, desc = simulate(group, rng)
    hd, hy = days[:n], y[:n]
    plain = fit_daily_rate(hd, hy, seasonal=False)
    picked = choices(hd, hy, plain.alpha)
    result: dict[str, object] = {"group": group, "desc": desc, "n": n}
    score = {}
    for rule, (seasonal, half_life) in picked.items():
        fit = fit_terms(hd, hy, None, seasonal, half_life, plain=plain)
        score[rule] = scores(forecast(fit, days, y, n), y[n:], plain.alpha)[0]
    for rule in ("spread", "two_stage"):
        result[rule] = score[rule] - score["recent"]
        result[f"{rule}_differs"] = picked[rule] != picked["recent"]
    return result


def main() -> None:
    per_group = int(sys.argv[1]) if len(sys.argv) > 1 else 60
    seeds = np.random.SeedSequence(SEED).generate_state(len(GROUPS) * per_group)
    began = time.process_time()
    rows = [run_one(g, int(seeds[gi * per_group + k]))
            for gi, g in enumerate(GROUPS) for k in range(per_group)]
    print(f"# Origins for the demand terms: {len(rows)} simulated series, seed {SEED}, "
          f"CPU {time.process_time() - began:.0f} s\n")
    print("Δ Poisson log score per day over the next 8 weeks, rule minus `recent` (higher is "
          "better), mean ± standard error over series; in brackets, series where the rule's "
          "choice differs.\n")
    print("| group | series | spread | t | two_stage | t |")
    print("|---|---|---|---|---|---|")
    for g in (*GROUPS, "all"):
        r = [x for x in rows if g == "all" or x["group"] == g]
        cells = []
        for rule in ("spread", "two_stage"):
            m, se = mean_se([float(x[rule]) for x in r])  # type: ignore[arg-type]
            differ = sum(bool(x[f"{rule}_differs"]) for x in r)
            cells.append(f"{m:+.5f} ± {se:.5f} ({differ}) | {m / se if se > 0 else 0:+.2f}")
        print(f"| {g} | {len(r)} | {' | '.join(cells)} |")


if __name__ == "__main__":
    main()
