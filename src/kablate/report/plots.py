"""Plots of an `Analysis`. They only draw: every number comes from the analysis tables.

Colours are the Okabe–Ito palette (colour-blind safe); markers also differ, so the plots read
in greyscale. Every figure carries a subtitle naming the sweep, data, seeds and budget.
"""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

from kablate.analysis.pareto import staircase  # noqa: E402
from kablate.analysis.summary import Analysis  # noqa: E402

OKABE_ITO = ["#0072B2", "#E69F00", "#009E73", "#D55E00", "#CC79A7", "#56B4E9", "#F0E442", "#000000"]
MARKERS = ["o", "s", "^", "D", "v", "P", "X", "<", ">", "h"]
WIDTH_IN, HEIGHT_IN, DPI = 6.4, 4.2, 150
# No dates or versions in the files, so the same analysis gives the same bytes.
METADATA = {"png": {"Software": None}, "svg": {"Date": None, "Creator": None}}


def _figure(title: str, subtitle: str) -> tuple[plt.Figure, plt.Axes]:
    fig, ax = plt.subplots(figsize=(WIDTH_IN, HEIGHT_IN), dpi=DPI, layout="constrained")
    fig.suptitle(title, fontsize=12, fontweight="bold")
    ax.set_title(subtitle, fontsize=8.5, color="#444444")
    ax.grid(True, color="#dddddd", linewidth=0.6)
    ax.set_axisbelow(True)
    return fig, ax


def _save(fig: plt.Figure, out: Path, stem: str) -> list[Path]:
    paths = []
    for ext in ("png", "svg"):
        path = out / f"{stem}.{ext}"
        fig.savefig(path, metadata=METADATA[ext])
        paths.append(path)
    plt.close(fig)
    return paths


def plot_accuracy_vs_cost(
    analysis: Analysis, cost: str, label: str, out: Path, subtitle: str
) -> list[Path]:
    """Mean validation accuracy (95% CI) against a cost on a log axis, with the front's
    staircase, the baseline and the recommended plan marked."""
    v = analysis.variants[analysis.variants["n_seeds"] > 0]
    fig, ax = _figure(f"Validation accuracy vs {label}", subtitle)
    front_col = f"front_{'params' if cost == 'params' else 'macs'}"
    steps = staircase(v["val_acc_mean"].tolist(), v[cost].tolist(), v[front_col].tolist())
    if steps:
        xs, ys = zip(*steps, strict=True)
        ax.step(
            xs, ys, where="post", color="#999999", linewidth=1.2, zorder=1, label="Pareto front"
        )
    for i, row in enumerate(v.itertuples()):
        err = np.array(
            [[row.val_acc_mean - row.val_acc_ci_low], [row.val_acc_ci_high - row.val_acc_mean]]
        )
        err = np.nan_to_num(err, nan=0.0)
        ax.errorbar(
            getattr(row, cost),
            row.val_acc_mean,
            yerr=err,
            fmt=MARKERS[i % 10],
            color=OKABE_ITO[i % 8],
            markersize=6,
            capsize=3,
            label=row.variant,
            zorder=3,
        )
    _mark(ax, v, cost, analysis)
    ax.set_xscale("log")
    ax.set_xlabel(f"{label} (log scale)")
    ax.set_ylabel("validation accuracy (mean, 95% CI)")
    ax.legend(fontsize=7, loc="lower right", ncol=2, framealpha=0.9)
    return _save(fig, out, f"accuracy_vs_{cost}")


def _mark(ax: plt.Axes, v: pd.DataFrame, x: str, analysis: Analysis) -> None:
    rec = v[v["recommended"]]
    if len(rec):
        ax.scatter(
            rec[x],
            rec["val_acc_mean"],
            s=260,
            facecolors="none",
            edgecolors="#000000",
            linewidths=1.6,
            zorder=4,
            label="recommended",
        )
    base = v[v["variant"] == analysis.baseline]
    if len(base):
        ax.scatter(
            base[x],
            base["val_acc_mean"],
            s=140,
            marker="s",
            facecolors="none",
            edgecolors="#555555",
            linewidths=1.2,
            linestyle="--",
            zorder=4,
            label="baseline",
        )


def plot_rf_vs_accuracy(analysis: Analysis, out: Path, subtitle: str) -> list[Path]:
    v = analysis.variants[analysis.variants["n_seeds"] > 0]
    fig, ax = _figure("Validation accuracy vs receptive field", subtitle)
    for i, row in enumerate(v.itertuples()):
        err = np.nan_to_num(
            [[row.val_acc_mean - row.val_acc_ci_low], [row.val_acc_ci_high - row.val_acc_mean]],
            nan=0.0,
        )
        ax.errorbar(
            row.rf,
            row.val_acc_mean,
            yerr=err,
            fmt=MARKERS[i % 10],
            color=OKABE_ITO[i % 8],
            capsize=3,
            label=row.variant,
        )
    _mark(ax, v, "rf", analysis)
    ax.set_xlabel("theoretical receptive field at the head (input pixels)")
    ax.set_ylabel("validation accuracy (mean, 95% CI)")
    ax.legend(fontsize=7, loc="lower right", ncol=2, framealpha=0.9)
    return _save(fig, out, "rf_vs_accuracy")


def plot_learning_curves(analysis: Analysis, out: Path, subtitle: str) -> list[Path]:
    """Mean validation accuracy per epoch, one line per variant (band: min–max over seeds)."""
    fig, ax = _figure("Learning curves", subtitle)
    curves = analysis.curves
    for i, name in enumerate(analysis.variants["variant"]):
        mine = curves[curves["variant"] == name] if len(curves) else curves
        if not len(mine):
            continue
        g = mine.groupby("epoch")["val_acc"]
        epochs = g.mean().index.to_numpy() + 1
        ax.plot(
            epochs,
            g.mean().to_numpy(),
            marker=MARKERS[i % 10],
            markersize=3,
            color=OKABE_ITO[i % 8],
            label=name,
            linewidth=1.3,
        )
        ax.fill_between(
            epochs,
            g.min().to_numpy(),
            g.max().to_numpy(),
            color=OKABE_ITO[i % 8],
            alpha=0.12,
            linewidth=0,
        )
    ax.set_xlabel("epoch")
    ax.set_ylabel("validation accuracy (mean over seeds)")
    ax.legend(fontsize=7, loc="lower right", ncol=2, framealpha=0.9)
    return _save(fig, out, "learning_curves")


def plot_grid_heatmap(analysis: Analysis, out: Path, subtitle: str) -> list[Path]:
    table = analysis.grid
    assert table is not None
    fig, ax = _figure("Mean validation accuracy over the grid", subtitle)
    ax.grid(False)
    data = table.to_numpy(dtype=float)
    image = ax.imshow(data, cmap="cividis", aspect="auto")
    ax.set_xticks(range(len(table.columns)), [str(c) for c in table.columns])
    ax.set_yticks(range(len(table.index)), [str(r) for r in table.index])
    ax.set_xlabel(f"{table.columns.name} kernel spec")
    ax.set_ylabel(f"{table.index.name} kernel spec")
    finite = data[np.isfinite(data)]
    middle = (finite.min() + finite.max()) / 2 if finite.size else 0
    for (r, c), value in np.ndenumerate(data):
        text = "n/a" if not np.isfinite(value) else f"{value:.3f}"
        colour = "white" if np.isfinite(value) and value < middle else "black"
        ax.text(c, r, text, ha="center", va="center", fontsize=8, color=colour)
    fig.colorbar(image, ax=ax, label="validation accuracy")
    return _save(fig, out, "grid_heatmap")
