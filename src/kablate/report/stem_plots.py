"""Plots of a `StemAtlas`: the stem's filters as tiles, and their frequency coverage. They only
draw: tiles, masks, profiles and shares all come from `kablate.analysis.stem`."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
from matplotlib.lines import Line2D
from matplotlib.patches import Rectangle

from kablate.analysis.stem import BAND_EDGES, BANDS, DEAD_RATIO, DUPLICATE_R, StemAtlas
from kablate.report.plot_style import DPI, WIDTH_IN, new_figure, plt, save_figure, style

MAX_COLUMNS = 16  # tiles per row
FRAMES = {  # mask → (colour, line style, legend text)
    "dead": ("#D55E00", "-", f"dead (norm < {DEAD_RATIO:g} × the layer's median)"),
    "duplicate": ("#E69F00", "--", f"near-duplicate (r > {DUPLICATE_R:g} with another filter)"),
}


def tile_origin(j: int, n_columns: int, cell: int, kernel: tuple[int, int]) -> tuple[float, float]:
    """(x, y) of the top-left corner of tile j: row-major cells of ``cell`` units, the kernel
    centred in its cell, one unit per kernel pixel (so every variant is at the same scale)."""
    row, col = divmod(j, n_columns)
    return col * (cell + 1) + (cell - kernel[1]) / 2, row * (cell + 1) + (cell - kernel[0]) / 2


def atlas_geometry(atlas: StemAtlas) -> tuple[int, int]:
    """(tile cell in kernel pixels, tiles per row), shared by every variant's panel."""
    cell = max(tiles.shape[1] for _, tiles, _ in atlas.shown.values())
    n_columns = min(MAX_COLUMNS, max(len(tiles) for _, tiles, _ in atlas.shown.values()))
    return cell, n_columns


def plot_stem_atlas(atlas: StemAtlas, out: Path, subtitle: str) -> list[Path]:
    """One panel per variant: its first seed's stem filters, each scaled to its own largest
    weight (mid-grey is zero), at one scale in kernel pixels across panels; dead and
    near-duplicate filters framed."""
    cell, n_columns = atlas_geometry(atlas)
    rows = {v: math.ceil(len(t) / n_columns) for v, (_, t, _) in atlas.shown.items()}
    heights = [r * (cell + 1) / (n_columns * (cell + 1)) * WIDTH_IN + 0.5 for r in rows.values()]
    fig, axes = plt.subplots(
        len(rows),
        1,
        figsize=(WIDTH_IN, sum(heights) + 1.1),
        dpi=DPI,
        layout="constrained",
        squeeze=False,
        gridspec_kw={"height_ratios": heights},
    )
    fig.suptitle("What the stem learned: its filters\n", fontsize=11, fontweight="bold")
    fig.text(0.5, 1 - 0.45 / (sum(heights) + 1.1), subtitle, ha="center", fontsize=8)
    summary = atlas.summary.set_index("variant")
    for ax, (variant, (seed, tiles, stats)) in zip(axes[:, 0], atlas.shown.items(), strict=True):
        kernel = tiles.shape[1:3]
        for j, tile in enumerate(tiles):
            x, y = tile_origin(j, n_columns, cell, kernel)
            ax.imshow(
                tile,
                cmap="gray" if tile.ndim == 2 else None,
                vmin=0,
                vmax=1,
                extent=(x, x + kernel[1], y + kernel[0], y),
                interpolation="nearest",
            )
            for mask, (colour, dash, _) in FRAMES.items():
                if getattr(stats, mask)[j]:
                    frame = Rectangle((x - 0.3, y - 0.3), kernel[1] + 0.6, kernel[0] + 0.6)
                    frame.set(fill=False, edgecolor=colour, linestyle=dash, linewidth=1.2)
                    ax.add_patch(frame)
        row = summary.loc[variant]
        role = f"{row['role']}: " if row["role"] else ""
        ax.set_title(
            f"{role}{variant} · stem {row['stem']} · seed {seed} · "
            f"{int(stats.dead.sum())} dead, {int(stats.duplicate.sum())} near-duplicate "
            f"of {len(tiles)}",
            fontsize=7.5,
        )
        ax.set_xlim(-0.5, n_columns * (cell + 1) - 0.5)
        ax.set_ylim(rows[variant] * (cell + 1) - 0.5, -0.5)
        ax.set_aspect("equal")
        ax.set_axis_off()
    handles = [Line2D([], [], color=c, linestyle=d, label=t) for c, d, t in FRAMES.values()]
    fig.legend(handles=handles, loc="outside lower center", ncols=2, frameon=False)
    return save_figure(fig, out, "stem_atlas")


def plot_stem_spectrum(atlas: StemAtlas, out: Path, subtitle: str) -> list[Path]:
    """Left: each variant's radially averaged power spectrum (share of energy per ring, mean
    over live filters and seeds). Right: energy share per band, mean and 95% interval over
    seeds. Band edges dashed on the left, named on the right."""
    fig, (left, right) = new_figure("Frequency coverage of the stem's filters", subtitle, ncols=2)
    s = atlas.summary
    width = 0.8 / len(s)
    for i, row in enumerate(s.itertuples()):
        colour, marker = style(i)
        freqs, profile = atlas.profiles[row.variant]
        left.plot(freqs, profile, color=colour, marker=marker, markersize=3, markevery=8)
        means = np.array([getattr(row, f"share_{b}_mean") for b in BANDS])
        low = np.array([getattr(row, f"share_{b}_ci_low") for b in BANDS])
        high = np.array([getattr(row, f"share_{b}_ci_high") for b in BANDS])
        x = np.arange(len(BANDS)) + (i - (len(s) - 1) / 2) * width
        right.bar(x, means, width, color=colour, label=f"{row.variant} ({row.stem})")
        if np.isfinite(low).all():  # one seed: no interval to draw
            right.errorbar(
                x, means, yerr=[means - low, high - means], fmt="none", ecolor="#222222", capsize=2
            )
    for edge in BAND_EDGES:
        left.axvline(edge, color="#777777", linestyle="--", linewidth=0.8)
    left.set_yscale("log")
    left.set_xlabel("radial frequency (cycles per pixel)")
    left.set_ylabel(f"mean power per ring / filter energy ({atlas.size}-point DFT)")
    a, b = BAND_EDGES
    right.set_xticks(range(len(BANDS)), [f"low\n< {a:g}", f"middle\n{a:g}–{b:g}", f"high\n≥ {b:g}"])
    right.set_ylabel("share of filter energy (95% interval over seeds)")
    right.set_ylim(0, 1)
    right.legend(fontsize=6.5, loc="upper right")
    return save_figure(fig, out, "stem_spectrum")
