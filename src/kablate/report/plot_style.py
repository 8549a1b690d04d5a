"""How the report's plots look: the figure, each variant's colour and marker, the legend.

The contract: a variant's look is fixed by its position in the plan (``analysis.variants``),
the same in every plot. Colours are the Okabe–Ito palette (Okabe & Ito 2008, colour-blind
safe) without its yellow, which is hard to see on white; markers also differ, so the plots read
in greyscale. The 7 colours and 10 markers cycle with co-prime periods, so the first 70
variants each get their own (colour, marker) pair; a sweep with more variants gets a number
beside each point and in its legend label, so that no two variants look alike.

Figures are 6.4 in wide (a model card's width; text no smaller than 7.5 pt there). A legend
goes under the axes, with as many columns as its labels allow, and the figure grows by the
legend's height, so the axes keep their size however many variants there are.
"""

from __future__ import annotations

import math
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.font_manager import FontProperties  # noqa: E402
from matplotlib.transforms import ScaledTranslation  # noqa: E402

PALETTE = ("#0072B2", "#E69F00", "#009E73", "#D55E00", "#CC79A7", "#56B4E9", "#000000")
MARKERS = ("o", "s", "^", "D", "v", "P", "X", "<", ">", "h")
N_DISTINCT = math.lcm(len(PALETTE), len(MARKERS))  # variants with a (colour, marker) of their own
WIDTH_IN, HEIGHT_IN, DPI = 6.4, 4.4, 150
SUBTITLE_DROP_IN = 0.065 * HEIGHT_IN  # from the figure's top edge to the subtitle's
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
# The legend's spacing, in units of its font size (matplotlib's own meaning of these keys).
LEGEND_SPACING = {"handlelength": 2.0, "handletextpad": 0.4, "columnspacing": 1.2}


def rendering():
    """The rc settings every plot is drawn and saved under (fonts, deterministic SVG ids)."""
    return plt.rc_context(STYLE)


def style(i: int) -> tuple[str, str]:
    """Colour and marker of the i-th variant (the same in every plot)."""
    return PALETTE[i % len(PALETTE)], MARKERS[i % len(MARKERS)]


def numbered(n_variants: int) -> bool:
    """Whether the variants need numbers to be told apart (more than ``N_DISTINCT``)."""
    return n_variants > N_DISTINCT


def variant_label(name: str, i: int, n_variants: int, n_seeds: int) -> str:
    """A variant's legend label, starting with its number (i + 1) when `numbered`."""
    number = f"[{i + 1}] " if numbered(n_variants) else ""
    return f"{number}{name} (n={n_seeds})"


def dodge(values: pd.Series, step: float, log: bool = False) -> pd.Series:
    """Equal values spread side by side, symmetric about the true value: the k-th of m equal
    values (k = 0 … m−1) moves by (k − (m−1)/2)·step, added, or on a log axis as a factor
    10^((k − (m−1)/2)·step), so the group's mean (geometric on a log axis) stays the value."""
    groups = values.groupby(values, dropna=False, sort=False)
    offset = step * (groups.cumcount() - (groups.transform("size") - 1) / 2)
    return values * 10**offset if log else values + offset


def new_figure(title: str, subtitle: str, ncols: int = 1) -> tuple[plt.Figure, list[plt.Axes]]:
    """A titled figure of ``ncols`` panels side by side, with a light grid."""
    fig, axes = plt.subplots(
        1, ncols, figsize=(WIDTH_IN, HEIGHT_IN), dpi=DPI, layout="constrained", squeeze=False
    )
    fig.suptitle(f"{title}\n", fontsize=11, fontweight="bold")
    # The subtitle keeps its distance from the top when a legend makes the figure taller.
    below_top = ScaledTranslation(0, -SUBTITLE_DROP_IN, fig.dpi_scale_trans)
    fig.text(
        0.5,
        1.0,
        subtitle,
        ha="center",
        va="top",
        fontsize=8,
        color="#444444",
        transform=fig.transFigure + below_top,
    )
    for ax in axes[0]:
        ax.grid(True, color="#dddddd", linewidth=0.6)
        ax.set_axisbelow(True)
    return fig, list(axes[0])


def save_figure(fig: plt.Figure, out: Path, stem: str) -> list[Path]:
    """Write ``stem``.png and ``stem``.svg into ``out`` and close the figure."""
    paths = []
    for ext in ("png", "svg"):
        path = out / f"{stem}.{ext}"
        fig.savefig(path, metadata=METADATA[ext])
        paths.append(path)
    plt.close(fig)
    return paths


def legend_columns(fig: plt.Figure, labels: list[str], fontsize: float) -> int:
    """The most columns whose widest labels fit in the figure's width, measured as drawn.
    matplotlib fills a legend column by column (``np.array_split``), and each column is as
    wide as its widest label, so the test is made on those same columns."""
    renderer = fig.canvas.get_renderer()
    prop = FontProperties(size=fontsize)
    points = fig.dpi / 72

    def width(label: str) -> float:  # in points; a label may span lines
        lines = label.split("\n")
        return max(renderer.get_text_width_height_descent(x, prop, False)[0] for x in lines)

    widths = np.array([width(label) for label in labels]) / points
    handle = (LEGEND_SPACING["handlelength"] + LEGEND_SPACING["handletextpad"]) * fontsize
    room = 0.95 * WIDTH_IN * 72  # a little to spare for the figure's padding
    for ncol in range(len(labels), 1, -1):
        columns = np.array_split(widths, ncol)
        total = sum(c.max() + handle for c in columns)
        if total + (ncol - 1) * LEGEND_SPACING["columnspacing"] * fontsize <= room:
            return ncol
    return 1


def legend_below(fig: plt.Figure, ax: plt.Axes) -> None:
    """One legend under the plot, so it never hides a point: as many columns as fit, and the
    figure made taller by the legend's height, so the axes keep their size."""
    handles, labels = ax.get_legend_handles_labels()
    if not labels:
        return
    fontsize = plt.rcParams["legend.fontsize"]
    fontsize = FontProperties(size=fontsize).get_size_in_points()
    legend = fig.legend(
        handles,
        labels,
        loc="outside lower center",
        ncol=legend_columns(fig, labels, fontsize),
        frameon=False,
        markerscale=0.8,
        **LEGEND_SPACING,
    )
    height = legend.get_window_extent(fig.canvas.get_renderer()).height / fig.dpi
    fig.set_size_inches(WIDTH_IN, HEIGHT_IN + height)
