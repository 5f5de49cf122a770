"""The backtest's calibration picture: PIT histograms and interval coverage by horizon (PNG).

matplotlib renders it headless to a file; the page shows the same numbers with Plotly.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

# Okabe-Ito palette: distinguishable with colour-blindness and in grey print.
COLOURS = ("#000000", "#E69F00", "#56B4E9", "#009E73", "#0072B2", "#D55E00", "#CC79A7")


def save_calibration_plot(result: dict[str, Any], path: Path) -> Path:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    methods = list(result["methods"])
    fig, axes = plt.subplots(1, 3, figsize=(15, 4.6), constrained_layout=True)
    bins = np.linspace(0, 1, 11)
    pit = np.asarray(result["pit"]["morrow"])
    axes[0].hist(pit, bins=bins, color="#0072B2", edgecolor="white", density=True)
    axes[0].axhline(1.0, color="black", linestyle="--", linewidth=1)
    axes[0].set(title="Morrow: randomised PIT (flat = calibrated)", xlabel="PIT", ylabel="density")
    horizons = np.arange(1, result["days"] + 1)
    for i, method in enumerate(methods):
        rows = result["methods"][method]["by_horizon"]
        style = {"color": COLOURS[i % len(COLOURS)], "marker": "os^vDP*"[i % 7],
                 "linewidth": 2.5 if method == "morrow" else 1.2}
        axes[1].plot(horizons, [r["pit_80"] for r in rows], label=method, **style)
        axes[2].plot(horizons, [r["crps"] for r in rows], label=method, **style)
    axes[1].axhspan(0.75, 0.85, color="#cccccc", alpha=0.5, label="0.75-0.85")
    axes[1].axhline(0.80, color="black", linestyle="--", linewidth=1)
    axes[1].set(title="Share of PIT in [0.1, 0.9] (target 0.80)", xlabel="days ahead",
                ylim=(0.4, 1.0))
    axes[2].set(title="CRPS by horizon (lower is better)", xlabel="days ahead", ylabel="beds")
    axes[2].legend(fontsize=8)
    fig.suptitle(f"Backtest {result['unit']} {result['from']} to {result['to']}")
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path
