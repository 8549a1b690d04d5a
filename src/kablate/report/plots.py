"""Plots of an `Analysis`. They only draw: every number comes from the analysis tables.

Each variant keeps its look (`plot_style.style`) in every plot, and the baseline and the
recommended plan are marked in every plot and on the grid heatmap. Every figure carries a
subtitle naming the sweep, data, seeds and budget.
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np
import pandas as pd
from matplotlib import patheffects
from matplotlib.axes import Axes
from matplotlib.patches import Rectangle
from matplotlib.ticker import (
    FuncFormatter,
    LogLocator,
    MaxNLocator,
    NullFormatter,
    PercentFormatter,
)

from kablate.analysis.classes import confusion
from kablate.analysis.summary import Analysis
from kablate.costs.plan_output import human
from kablate.report.plot_style import (
    dodge,
    legend_below,
    new_figure,
    numbered,
    save_figure,
    style,
    variant_label,
)
from kablate.spec.costs import cost_of_column

# Equal values are drawn side by side, not on top of each other: rf in steps of a quarter
# pixel, a cost in steps of this share of the log axis's span (about a marker's width).
RF_DODGE, COST_DODGE = 0.25, 0.025
DODGED = "equal values side by side"
MARKED_LINE = 2.6  # line width of the baseline's and the recommended plan's learning curves


def _percent_axis(ax: Axes, label: str) -> None:
    ax.yaxis.set_major_formatter(PercentFormatter(xmax=1.0, decimals=1))
    ax.set_ylabel(label)


def cost_tick(x: float) -> str:
    """A cost axis's tick label, short and exact at the 1-2-5 ticks: 0.05, 0.5, 1, 50, 1k,
    2.5M (`human` without a trailing '.0')."""
    return re.sub(r"\.0(?=[kMG]?$)", "", human(x))


def _log_cost_axis(ax: Axes, label: str) -> None:
    """A log axis with few, short tick labels (0.5, 1, 10k, 20k, 50k, …); no crowded minor
    labels."""
    ax.set_xscale("log")
    ax.xaxis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
    ax.xaxis.set_major_formatter(FuncFormatter(lambda x, _: cost_tick(x)))
    ax.xaxis.set_minor_formatter(NullFormatter())
    ax.set_xlabel(f"{label} (log scale; {DODGED})")


def _trained(analysis: Analysis) -> pd.DataFrame:
    v = analysis.variants.reset_index(drop=True)
    v["order"] = range(len(v))  # colour index: fixed by plan order, the same in every plot
    return v[v["n_seeds"] > 0]


def _ci_error(row) -> np.ndarray:
    """Error-bar lengths of the 95% CI, clipped to accuracy's own range [0, 1]."""
    low = max(row.val_acc_ci_low, 0.0) if math.isfinite(row.val_acc_ci_low) else row.val_acc_mean
    high = min(row.val_acc_ci_high, 1.0) if math.isfinite(row.val_acc_ci_high) else row.val_acc_mean
    return np.array([[row.val_acc_mean - low], [high - row.val_acc_mean]])


def _told_apart(row) -> bool:
    """Filled marker: the baseline itself, or a plan shown different from it (Holm p < 0.05)."""
    p = getattr(row, "p_holm", math.nan)
    return bool(p < 0.05) if p is not None and math.isfinite(p) else True


def _points(ax: Axes, v: pd.DataFrame, x: str, n_variants: int) -> None:
    """One marker with its 95% interval per variant, at (``x``, mean validation accuracy);
    numbered beside the marker when the variants outnumber the distinct looks."""
    for row in v.itertuples():
        colour, marker = style(row.order)
        filled = _told_apart(row)
        at = (getattr(row, x), row.val_acc_mean)
        ax.errorbar(
            *at,
            yerr=_ci_error(row),
            fmt=marker,
            color=colour,
            markerfacecolor=colour if filled else "white",
            markersize=6,
            capsize=3,
            elinewidth=1.1,
            label=variant_label(row.variant, row.order, n_variants, row.n_seeds),
            zorder=3,
        )
        if numbered(n_variants):
            _number(ax, at, row.order)


def _number(ax: Axes, at: tuple[float, float], i: int) -> None:
    """The variant's number (i + 1, as in its legend label) just above right of a point."""
    ax.annotate(
        str(i + 1), at, xytext=(4, 3), textcoords="offset points", fontsize=6, color="#333333"
    )


def _margin_band(ax: Axes, v: pd.DataFrame, analysis: Analysis) -> None:
    """The baseline's accuracy as a dashed line and, under the margin rule, the band down to
    baseline − margin: a plan is recommended only if its whole lower bound of the difference
    clears that band's bottom edge (the card gives the bound)."""
    base = v[v["variant"] == analysis.baseline]
    if not len(base):
        return
    level = float(base["val_acc_mean"].iloc[0])
    ax.axhline(level, color="#555555", linestyle="--", linewidth=0.9, zorder=1)
    d = analysis.decision
    if d is not None and d.rule == "margin" and d.margin > 0:
        ax.axhspan(
            level - d.margin,
            level,
            color="#56B4E9",
            alpha=0.15,
            linewidth=0,
            zorder=0,
            label=f"baseline − margin ({100 * d.margin:.2g} pp)",
        )
    _hollow_key(ax)


def _hollow_key(ax: Axes) -> None:
    """A legend entry that says what a hollow marker means."""
    ax.plot(
        [],
        [],
        marker="o",
        color="#555555",
        markerfacecolor="white",
        linestyle="none",
        label="hollow: not told apart from\nthe baseline (Holm p ≥ 0.05)",
    )


def _mark(ax: Axes, v: pd.DataFrame, x: str, analysis: Analysis) -> None:
    rec = v[v["recommended"]]
    if len(rec):
        ax.scatter(
            rec[x],
            rec["val_acc_mean"],
            s=220,
            facecolors="none",
            edgecolors="#000000",
            linewidths=1.5,
            zorder=4,
            label="recommended",
        )
    base = v[v["variant"] == analysis.baseline]
    if len(base):
        ax.scatter(
            base[x],
            base["val_acc_mean"],
            s=120,
            marker="s",
            facecolors="none",
            edgecolors="#555555",
            linewidths=1.1,
            linestyle="--",
            zorder=4,
            label="baseline",
        )


def plot_accuracy_vs_cost(
    analysis: Analysis, cost: str, label: str, out: Path, subtitle: str
) -> list[Path]:
    """Validation accuracy (95% bootstrap interval) against a cost on a log axis, with the
    baseline, the margin band and the recommended plan marked. Variants of equal cost are drawn
    side by side (`plot_style.dodge`). No Pareto staircase: a line through point estimates
    would suggest an order that the intervals often do not support (the fronts are in the
    card's table)."""
    v = _trained(analysis).copy()
    lo, hi = v[cost].min() / 1.6, v[cost].max() * 1.6  # room for markers at both ends
    v["cost_drawn"] = dodge(v[cost], COST_DODGE * math.log10(hi / lo), log=True)
    fig, (ax,) = new_figure(f"Validation accuracy vs {label}", subtitle)
    _margin_band(ax, v, analysis)
    _points(ax, v, "cost_drawn", len(analysis.variants))
    _mark(ax, v, "cost_drawn", analysis)
    _log_cost_axis(ax, label)
    ax.set_xlim(min(lo, v["cost_drawn"].min() / 1.2), max(hi, v["cost_drawn"].max() * 1.2))
    _percent_axis(ax, "validation accuracy (95% bootstrap CI)")
    legend_below(fig, ax)
    return save_figure(fig, out, cost_of_column(cost).plot)


def plot_rf_vs_accuracy(analysis: Analysis, out: Path, subtitle: str) -> list[Path]:
    v = _trained(analysis).copy()
    v["rf_drawn"] = dodge(v["rf"], RF_DODGE)
    fig, (ax,) = new_figure("Validation accuracy vs receptive field", subtitle)
    _hollow_key(ax)
    _points(ax, v, "rf_drawn", len(analysis.variants))
    _mark(ax, v, "rf_drawn", analysis)
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_xlabel(f"theoretical receptive field at the head (input pixels; {DODGED})")
    _percent_axis(ax, "validation accuracy (95% bootstrap CI)")
    legend_below(fig, ax)
    return save_figure(fig, out, "rf_vs_accuracy")


def role(analysis: Analysis, name: str) -> str:
    """ "baseline", "recommended", "baseline, recommended" or "" for the variant ``name``."""
    marked = (("baseline", analysis.baseline), ("recommended", analysis.recommended))
    return ", ".join(r for r, n in marked if n == name)


def plot_learning_curves(analysis: Analysis, out: Path, subtitle: str) -> list[Path]:
    """Mean validation accuracy per epoch, one line per variant (band: min–max over seeds),
    the baseline's and the recommended plan's drawn thicker and named so in the legend; the
    right panel zooms into the second half of training, where the plans separate."""
    fig, (full, zoom) = new_figure("Learning curves", subtitle, ncols=2)
    curves = analysis.curves
    last = int(curves["epoch"].max()) if len(curves) else 1  # epochs count from 1 (shown_epoch)
    start = max(1, last // 2)
    lows = []
    n_variants = len(analysis.variants)
    for i, name in enumerate(analysis.variants["variant"]):
        mine = curves[curves["variant"] == name]
        if not len(mine):
            continue
        colour, marker = style(i)
        g = mine.groupby("epoch")["val_acc"]
        epochs = g.mean().index.to_numpy()
        mean, low, high = g.mean().to_numpy(), g.min().to_numpy(), g.max().to_numpy()
        label = variant_label(name, i, n_variants, int(mine["seed"].nunique()))
        marked = role(analysis, name)
        for ax in (full, zoom):
            ax.plot(
                epochs,
                mean,
                marker=marker,
                markersize=3,
                color=colour,
                linewidth=MARKED_LINE if marked else 1.2,
                zorder=3 if marked else 2,
                label=(f"{label} ({marked})" if marked else label) if ax is full else None,
            )
            ax.fill_between(epochs, low, high, color=colour, alpha=0.12, linewidth=0)
        if numbered(n_variants):
            _number(full, (epochs[-1], mean[-1]), i)
        lows.append(low[epochs >= start].min() if (epochs >= start).any() else 1.0)
    zoom.set_xlim(start - 0.3, last + 0.3)
    if lows:
        zoom.set_ylim(max(0.0, min(lows) - 0.005), 1.0005)
    for ax in (full, zoom):
        ax.set_xlabel("epoch")
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))
        ax.yaxis.set_major_formatter(PercentFormatter(xmax=1.0, decimals=0 if ax is full else 1))
    full.set_ylabel("validation accuracy (mean; band: min–max over seeds)")
    full.set_title("all epochs")
    zoom.set_title(f"epochs {start}–{last}")
    legend_below(fig, full)
    return save_figure(fig, out, "learning_curves")


def heatmap_limits(means: np.ndarray, halves: np.ndarray) -> tuple[float, float]:
    """Colour limits for the grid: the range of the means, widened (about its middle, within
    [0, 1]) to at least one typical 95% interval (the median of the cells' full widths), so
    that cells which differ by less than the noise (seeds and images) do not look far apart."""
    finite = means[np.isfinite(means)]
    if not finite.size:
        return 0.0, 1.0
    low, high = float(finite.min()), float(finite.max())
    widths = 2 * halves[np.isfinite(halves)]
    span = min(1.0, max(high - low, float(np.median(widths)) if widths.size else 0.0, 1e-6))
    middle = (low + high) / 2
    # Keep the scale inside [0, 1] (accuracies), shifting it rather than shrinking it.
    vmin = min(max(0.0, middle - span / 2), 1.0 - span)
    return vmin, vmin + span


def plot_grid_heatmap(analysis: Analysis, out: Path, subtitle: str) -> list[Path]:
    """Mean validation accuracy per grid cell with its interval's half-width, the baseline's
    and the recommended plan's cells outlined."""
    table = analysis.grid
    assert table is not None
    fig, (ax,) = new_figure("Validation accuracy over the grid", subtitle)
    ax.grid(False)
    data = table.to_numpy(dtype=float)
    halves = (
        analysis.grid_ci_half.to_numpy(dtype=float)
        if analysis.grid_ci_half is not None
        else np.full_like(data, np.nan)
    )
    vmin, vmax = heatmap_limits(data, halves)
    image = ax.imshow(data, cmap="cividis", aspect="auto", vmin=vmin, vmax=vmax)
    ax.set_xticks(range(len(table.columns)), [str(c) for c in table.columns])
    ax.set_yticks(range(len(table.index)), [str(r) for r in table.index])
    ax.set_xlabel(f"{table.columns.name} kernel spec")
    ax.set_ylabel(f"{table.index.name} kernel spec")
    middle = (vmin + vmax) / 2
    for (r, c), value in np.ndenumerate(data):
        if not np.isfinite(value):
            ax.text(c, r, "not trained", ha="center", va="center", fontsize=8, color="black")
            continue
        text = f"{100 * value:.2f}%"
        if np.isfinite(halves[r, c]):
            text += f"\n±{100 * halves[r, c]:.2f} pp"
        colour = "white" if value < middle else "black"
        ax.text(c, r, text, ha="center", va="center", fontsize=8, color=colour)
    label = "validation accuracy\n(cell: seeds × images ± half-width of its 95% bootstrap CI)"
    bar = fig.colorbar(image, ax=ax, label=label)
    bar.formatter = PercentFormatter(xmax=1.0, decimals=1)
    bar.update_ticks()
    _outline_cells(ax, analysis.grid_marks)
    legend_below(fig, ax)
    return save_figure(fig, out, "grid_heatmap")


# How a marked cell is outlined: (inset from the cell's edge, line style). The recommended
# plan's outline sits inside the baseline's, so both show when they are the same cell.
CELL_OUTLINES = {"baseline": (0.04, "--"), "recommended": (0.12, "-")}
# A white line under the black one, so the outline shows on dark and light cells alike.
HALO = [patheffects.withStroke(linewidth=3.6, foreground="#FFFFFF")]


def _outline_cells(ax: Axes, marks: dict[str, list[tuple[int, int]]]) -> None:
    """Outline each marked cell (``Analysis.grid_marks``), labelled with its role."""
    for role, cells in marks.items():
        inset, dash = CELL_OUTLINES[role]
        for k, (r, c) in enumerate(cells):
            ax.add_patch(
                Rectangle(
                    (c - 0.5 + inset, r - 0.5 + inset),
                    1 - 2 * inset,
                    1 - 2 * inset,
                    fill=False,
                    edgecolor="#000000",
                    linestyle=dash,
                    linewidth=1.8,
                    path_effects=HALO,
                    label=f"{role} (outlined)" if k == 0 else None,
                )
            )


def plot_confusion(analysis: Analysis, out: Path, subtitle: str) -> list[Path]:
    """Row-normalised confusion matrices (true class down, predicted across) of the
    recommended plan and the baseline, each cell annotated with its count."""
    d, ev = analysis.decision, analysis.evidence
    names = list(dict.fromkeys([d.recommended, d.baseline]))
    fig, axes = new_figure("Confusion on the validation images", subtitle, ncols=len(names))
    image = None
    for ax, name in zip(axes, names, strict=True):
        ax.grid(False)
        counts = confusion(ev, name)
        with np.errstate(invalid="ignore", divide="ignore"):
            share = counts / counts.sum(axis=1, keepdims=True)
        image = ax.imshow(share, cmap="cividis", vmin=0, vmax=1)
        n = len(counts)
        if n <= 12:  # counts stay legible up to about a dozen classes
            for (r, c), k in np.ndenumerate(counts):
                if k:
                    colour = "black" if share[r, c] > 0.5 else "white"
                    ax.text(c, r, str(k), ha="center", va="center", fontsize=6.5, color=colour)
        labels = list(analysis.classes)[:n] if len(analysis.classes) >= n else list(range(n))
        ax.set_xticks(range(n), labels, rotation=90 if n > 10 else 0, fontsize=7)
        ax.set_yticks(range(n), labels, fontsize=7)
        role = (
            "recommended and baseline"
            if len(names) == 1
            else ("recommended" if name == d.recommended else "baseline")
        )
        ax.set_title(f"{role}: {name}", fontsize=8)
        ax.set_xlabel("predicted class")
        ax.set_ylabel("true class")
    fig.colorbar(
        image, ax=axes, shrink=0.8, label="share of the true class (counts: seeds × images)"
    )
    return save_figure(fig, out, "confusion")
