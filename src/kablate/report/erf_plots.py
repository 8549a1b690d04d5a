"""The effective-receptive-field plot: each map beside its theoretical receptive field.

It only draws: the maps come from `kablate.analysis.erf` (filled in by the report).
"""

from __future__ import annotations

from pathlib import Path

from matplotlib import patheffects
from matplotlib.lines import Line2D
from matplotlib.patches import Patch, Rectangle

from kablate.analysis.erf import ErfMap
from kablate.report.plot_style import new_figure, save_figure

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
    fig, axes = new_figure("Effective vs theoretical receptive field", subtitle, ncols=len(maps))
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
    return save_figure(fig, out, "effective_rf")
