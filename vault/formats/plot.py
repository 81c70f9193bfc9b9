"""PNG plot of a privacy-utility report (aggregate RMSE figures only).

matplotlib is imported inside `plot_utility`, so importing this module is cheap.
The figure is drawn on its own Agg canvas (`matplotlib.figure.Figure`, never
pyplot): no global backend switch, no figure registry, no rcParams changes.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from vault.errors import UsageError

WIDTH_PX = 800
HEIGHT_PX = 500
DPI = 100


def plot_utility(report: Any, path: Path) -> Path:
    """Write RMSE vs epsilon (log x) with the no-noise and random baselines as a PNG.

    `report` is a vault.privacy.recommend.UtilityReport, read by attribute (this module
    imports nothing from the library but its errors)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    path = Path(path)
    if path.suffix.lower() != ".png":
        raise UsageError("the utility plot is written as PNG: give a path ending in .png")
    fig = Figure(figsize=(WIDTH_PX / DPI, HEIGHT_PX / DPI), dpi=DPI)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(1, 1, 1)
    ax.errorbar(
        report.epsilons, report.noisy_rmse, yerr=report.noisy_rmse_std,
        marker="o", capsize=3, color="tab:blue",
        label="trained on noised data (mean +/- sd over draws)",
    )
    ax.axhline(report.no_noise_rmse, color="tab:green", linestyle="--",
               label=f"no noise ({report.no_noise_rmse:.3f})")
    ax.axhline(report.random_rmse, color="tab:red", linestyle=":",
               label=f"random baseline, normal MLE fit ({report.random_rmse:.3f})")
    ax.set_xscale("log")
    ax.set_xlabel("privacy budget epsilon (log scale; smaller = more noise)")
    ax.set_ylabel("held-out RMSE (lower is better)")
    ax.set_title(f"Recommender error vs privacy budget (rank {report.rank}, "
                 f"{report.repeats} noise draw(s) per epsilon)")
    ax.grid(True, which="both", alpha=0.3)
    top = max(*report.noisy_rmse, report.no_noise_rmse, report.random_rmse)
    ax.set_ylim(0.0, 1.12 * top)  # from zero, so the gap between lines reads honestly
    ax.legend(loc="lower left")
    fig.tight_layout()
    fig.savefig(path, format="png", dpi=DPI)
    return path
