"""Plots of an `Analysis`. They only draw: every number comes from the analysis tables.

Colours are the Okabe–Ito palette (colour-blind safe); markers also differ, so the plots read
in greyscale. Every figure carries a subtitle naming the sweep, data, seeds and budget, and is
sized for a model card (6.4 in wide; text no smaller than 7.5 pt at that width).
"""

from __future__ import annotations

import math
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib import patheffects  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402
from matplotlib.patches import Patch, Rectangle  # noqa: E402
from matplotlib.ticker import (  # noqa: E402
    FuncFormatter,
    LogLocator,
    MaxNLocator,
    NullFormatter,
    PercentFormatter,
)

from kablate.analysis.classes import confusion  # noqa: E402
from kablate.analysis.erf import ErfMap  # noqa: E402
from kablate.analysis.summary import Analysis  # noqa: E402
from kablate.costs.export import human  # noqa: E402
from kablate.spec.costs import cost_of_column  # noqa: E402

OKABE_ITO = ["#0072B2", "#E69F00", "#009E73", "#D55E00", "#CC79A7", "#56B4E9", "#F0E442", "#000000"]
MARKERS = ["o", "s", "^", "D", "v", "P", "X", "<", ">", "h"]
WIDTH_IN, HEIGHT_IN, DPI = 6.4, 4.4, 150
# No dates, versions or random ids in the files, so the same analysis gives the same bytes.
METADATA = {"png": {"Software": None}, "svg": {"Date": None, "Creator": None}}
STYLE = {
    "svg.hashsalt": "kablate",
    "svg.fonttype": "path",
    "font.size": 8.5,
    "axes.titlesize": 8,
    "axes.labelsize": 8.5,
    "xtick.labelsize": 8,
    "ytick.labelsize": 8,
    "legend.fontsize": 7.5,
}


def style(i: int) -> tuple[str, str]:
    """Colour and marker of the i-th variant (the same in every plot)."""
    return OKABE_ITO[i % len(OKABE_ITO)], MARKERS[i % len(MARKERS)]


def _figure(title: str, subtitle: str, ncols: int = 1) -> tuple[plt.Figure, list[plt.Axes]]:
    fig, axes = plt.subplots(
        1, ncols, figsize=(WIDTH_IN, HEIGHT_IN), dpi=DPI, layout="constrained", squeeze=False
    )
    fig.suptitle(f"{title}\n", fontsize=11, fontweight="bold")
    fig.text(0.5, 0.935, subtitle, ha="center", va="top", fontsize=8, color="#444444")
    for ax in axes[0]:
        ax.grid(True, color="#dddddd", linewidth=0.6)
        ax.set_axisbelow(True)
    return fig, list(axes[0])


def _save(fig: plt.Figure, out: Path, stem: str) -> list[Path]:
    paths = []
    for ext in ("png", "svg"):
        path = out / f"{stem}.{ext}"
        fig.savefig(path, metadata=METADATA[ext])
        paths.append(path)
    plt.close(fig)
    return paths


def _legend_below(fig: plt.Figure, ax: plt.Axes, n_items: int) -> None:
    """One legend under the plot, so it never hides a point."""
    handles, labels = ax.get_legend_handles_labels()
    longest = max((len(label) for label in labels), default=0)
    per_row = 2 if longest > 32 else 3 if longest > 22 else 4  # keep the rows inside 6.4 in
    fig.legend(
        handles,
        labels,
        loc="outside lower center",
        ncol=min(per_row, max(1, n_items)),
        frameon=False,
        markerscale=0.8,
        handletextpad=0.4,
        columnspacing=1.2,
    )


def _percent_axis(ax: plt.Axes, label: str) -> None:
    ax.yaxis.set_major_formatter(PercentFormatter(xmax=1.0, decimals=1))
    ax.set_ylabel(label)


def _log_cost_axis(ax: plt.Axes, label: str) -> None:
    """A log axis with few, short tick labels (10k, 20k, 50k, …); no crowded minor labels."""
    ax.set_xscale("log")
    ax.xaxis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
    ax.xaxis.set_major_formatter(FuncFormatter(lambda x, _: human(x).replace(".0", "")))
    ax.xaxis.set_minor_formatter(NullFormatter())
    ax.set_xlabel(f"{label} (log scale)")


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


def _points(ax: plt.Axes, v: pd.DataFrame, x: str) -> None:
    for row in v.itertuples():
        colour, marker = style(row.order)
        filled = _told_apart(row)
        ax.errorbar(
            getattr(row, x),
            row.val_acc_mean,
            yerr=_ci_error(row),
            fmt=marker,
            color=colour,
            markerfacecolor=colour if filled else "white",
            markersize=6,
            capsize=3,
            elinewidth=1.1,
            label=f"{row.variant} (n={row.n_seeds})",
            zorder=3,
        )


def _margin_band(ax: plt.Axes, v: pd.DataFrame, analysis: Analysis) -> None:
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


def _hollow_key(ax: plt.Axes) -> None:
    """A legend entry that says what a hollow marker means."""
    ax.plot(
        [],
        [],
        marker="o",
        color="#555555",
        markerfacecolor="white",
        linestyle="none",
        label="hollow: not told apart from the baseline (Holm p ≥ 0.05)",
    )


def _mark(ax: plt.Axes, v: pd.DataFrame, x: str, analysis: Analysis) -> None:
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
    baseline, the margin band and the recommended plan marked. No Pareto staircase: a line
    through point estimates would suggest an order that the intervals often do not support
    (the fronts are in the card's table)."""
    v = _trained(analysis)
    fig, (ax,) = _figure(f"Validation accuracy vs {label}", subtitle)
    _margin_band(ax, v, analysis)
    _points(ax, v, cost)
    _mark(ax, v, cost, analysis)
    _log_cost_axis(ax, label)
    lo, hi = v[cost].min(), v[cost].max()
    ax.set_xlim(lo / 1.6, hi * 1.6)  # room for markers at both ends of a log axis
    _percent_axis(ax, "validation accuracy (95% bootstrap CI)")
    _legend_below(fig, ax, len(v) + 4)
    return _save(fig, out, f"accuracy_vs_{cost_of_column(cost).name}")


def plot_rf_vs_accuracy(analysis: Analysis, out: Path, subtitle: str) -> list[Path]:
    v = _trained(analysis).copy()
    # Variants with the same rf are drawn side by side (a small dodge), not on top of each other.
    rank = v.groupby("rf").cumcount()
    size = v.groupby("rf")["rf"].transform("size")
    v["rf_drawn"] = v["rf"] + 0.25 * (rank - (size - 1) / 2)
    fig, (ax,) = _figure("Validation accuracy vs receptive field", subtitle)
    _hollow_key(ax)
    _points(ax, v, "rf_drawn")
    _mark(ax, v, "rf_drawn", analysis)
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_xlabel("theoretical receptive field at the head (input pixels; equal values dodged)")
    _percent_axis(ax, "validation accuracy (95% bootstrap CI)")
    _legend_below(fig, ax, len(v) + 3)
    return _save(fig, out, "rf_vs_accuracy")


def plot_learning_curves(analysis: Analysis, out: Path, subtitle: str) -> list[Path]:
    """Mean validation accuracy per epoch, one line per variant (band: min–max over seeds);
    the right panel zooms into the second half of training, where the plans separate."""
    fig, (full, zoom) = _figure("Learning curves", subtitle, ncols=2)
    curves = analysis.curves
    last = int(curves["epoch"].max()) if len(curves) else 1  # epochs count from 1 (shown_epoch)
    start = max(1, last // 2)
    lows = []
    for i, name in enumerate(analysis.variants["variant"]):
        mine = curves[curves["variant"] == name]
        if not len(mine):
            continue
        colour, marker = style(i)
        g = mine.groupby("epoch")["val_acc"]
        epochs = g.mean().index.to_numpy()
        mean, low, high = g.mean().to_numpy(), g.min().to_numpy(), g.max().to_numpy()
        n = int(mine["seed"].nunique())
        for ax in (full, zoom):
            ax.plot(
                epochs,
                mean,
                marker=marker,
                markersize=3,
                color=colour,
                linewidth=1.2,
                label=f"{name} (n={n})" if ax is full else None,
            )
            ax.fill_between(epochs, low, high, color=colour, alpha=0.12, linewidth=0)
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
    _legend_below(fig, full, len(analysis.variants))
    return _save(fig, out, "learning_curves")


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
    table = analysis.grid
    assert table is not None
    fig, (ax,) = _figure("Validation accuracy over the grid", subtitle)
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
    return _save(fig, out, "grid_heatmap")


# The squares drawn on an effective-receptive-field map: (what, colour, line style).
ERF_SQUARES = (
    ("theoretical receptive field", "#E69F00", "--"),
    ("square holding 95% of the gradient mass", "#FFFFFF", "-"),
    ("square holding 50% of the gradient mass", "#D55E00", "-"),
)
# A dark outline under every square, so that the white one shows on a light map and in the legend.
OUTLINE = [patheffects.withStroke(linewidth=2.8, foreground="#000000")]


def erf_sides(erf: ErfMap) -> tuple[int, int, int]:
    """The sides of the squares of ``ERF_SQUARES``, in the same order."""
    return erf.geometry.rf[0], erf.extent95, erf.extent50


def erf_view(maps: list[ErfMap]) -> tuple[float, float, float, float]:
    """(left, right, top, bottom) shared by every panel: the input and the mass squares (which
    may reach past the input when the centre is off the middle), plus half a pixel. The
    theoretical square is not widened into view: it can be many times the input."""
    left = top = -0.5
    right = bottom = -0.5
    for erf in maps:
        h, w = erf.grad.shape
        cy, cx = erf.geometry.centre
        half = max(erf.extent95, erf.extent50) / 2
        left, right = min(left, cx - half), max(right, w - 0.5, cx + half)
        top, bottom = min(top, cy - half), max(bottom, h - 0.5, cy + half)
    return left - 0.5, right + 0.5, top - 0.5, bottom + 0.5


def square_shown(erf: ErfMap, side: float, view: tuple[float, float, float, float]) -> bool:
    """Whether any edge of the centred square of ``side`` lies inside the view (the square
    always overlaps the view, since its centre is on the input)."""
    cy, cx = erf.geometry.centre
    left, right, top, bottom = view
    half = side / 2
    return any(left < x < right for x in (cx - half, cx + half)) or any(
        top < y < bottom for y in (cy - half, cy + half)
    )


def erf_legend(maps: list[ErfMap]) -> list[tuple[str, str, str]]:
    """(label, colour, line style) per square, saying which squares fall outside the view."""
    view = erf_view(maps)
    out = []
    for i, (what, colour, dash) in enumerate(ERF_SQUARES):
        hidden = [m.variant for m in maps if not square_shown(m, erf_sides(m)[i], view)]
        if hidden and len(hidden) == len(maps):
            what += " (larger than the view: not drawn)"
        elif hidden:
            what += f" (larger than the view for {', '.join(hidden)})"
        out.append((what, colour, dash))
    return out


def plot_effective_rf(maps: list[ErfMap], roles: list[str], out: Path, subtitle: str) -> list[Path]:
    """One panel per map: the mean input-gradient magnitude of the centre output (Luo et al.
    2016), with the theoretical receptive field drawn as a dashed square and the squares
    holding 95% and 50% of the gradient mass as solid ones. The legend is built from the
    same table as the squares, so it says what is drawn."""
    fig, axes = _figure("Effective vs theoretical receptive field", subtitle, ncols=len(maps))
    view = erf_view(maps)
    image = None
    outside = False
    for ax, erf, role in zip(axes, maps, roles, strict=True):
        ax.grid(False)
        ax.set_facecolor("#D9D9D9")  # outside the input
        h, w = erf.grad.shape
        image = ax.imshow(erf.grad, cmap="cividis", vmin=0, vmax=1, interpolation="nearest")
        cy, cx = erf.geometry.centre
        for side, (_, colour, dash) in zip(erf_sides(erf), ERF_SQUARES, strict=True):
            half = side / 2
            ax.add_patch(
                Rectangle(
                    (cx - half, cy - half),
                    side,
                    side,
                    fill=False,
                    edgecolor=colour,
                    linestyle=dash,
                    linewidth=1.4,
                    path_effects=OUTLINE,
                    clip_on=True,
                )
            )
        ax.plot([cx], [cy], marker="+", color="#D55E00", markersize=8, linestyle="none")
        ax.set_xlim(view[0], view[1])
        ax.set_ylim(view[3], view[2])
        outside = outside or view[0] < -0.5 or view[1] > w - 0.5 or view[3] > h - 0.5
        beyond = " (beyond the input)" if erf.geometry.rf[0] > max(h, w) else ""
        ax.set_title(
            f"{role}: {erf.variant}\ntheoretical rf {erf.geometry.rf[0]} px{beyond}\n"
            f"50% of the mass in {erf.extent50} px · 95% in {erf.extent95} px",
            fontsize=7.5,
        )
        ax.set_xlabel("input column (px)")
        ax.set_ylabel("input row (px)")
    if image is not None:
        fig.colorbar(
            image, ax=axes, shrink=0.8, label="mean |input gradient| of the centre output (max = 1)"
        )
    handles = [
        Line2D([], [], color=colour, linestyle=dash, linewidth=1.4, path_effects=OUTLINE, label=t)
        for t, colour, dash in erf_legend(maps)
    ]
    handles.append(
        Line2D(
            [],
            [],
            color="#D55E00",
            marker="+",
            linestyle="none",
            label="centre of the output's receptive field",
        )
    )
    if outside:
        handles.append(Patch(facecolor="#D9D9D9", label="outside the input"))
    fig.legend(handles=handles, loc="outside lower center", ncol=2, frameon=False, fontsize=7)
    return _save(fig, out, "effective_rf")


def plot_confusion(analysis: Analysis, out: Path, subtitle: str) -> list[Path]:
    """Row-normalised confusion matrices (true class down, predicted across) of the
    recommended plan and the baseline, each cell annotated with its count."""
    d, ev = analysis.decision, analysis.evidence
    names = list(dict.fromkeys([d.recommended, d.baseline]))
    fig, axes = _figure("Confusion on the validation images", subtitle, ncols=len(names))
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
    return _save(fig, out, "confusion")


def rendering():
    """The rc settings every plot is drawn and saved under (fonts, deterministic SVG ids)."""
    return plt.rc_context(STYLE)
