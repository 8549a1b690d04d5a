"""The hypervolume of a search's trained plans over the plans trained: how fast the front
found grew. The figures are `kablate.analysis.search.summarize_record`'s, the same that the
card's search table words; this module only draws them."""

from __future__ import annotations

from pathlib import Path

import matplotlib.pyplot as plt
from matplotlib.ticker import MaxNLocator

from kablate.analysis.search import summarize_record
from kablate.report.plot_style import new_figure, save_figure
from kablate.spec.costs import COSTS

HYPERVOLUME_PLOT = "search_hypervolume"
HYPERVOLUME_LINE = "hypervolume"  # the drawn line's label, by which tests find it


def draw_hypervolume(record: dict, subtitle: str) -> plt.Figure:
    """The hypervolume after each trained plan (a step line), as a share of the box that an
    ideal plan would cover, with the reference point named on the axis."""
    summary = summarize_record(record)
    cost = COSTS[record["cost"]].label
    ref = summary.reference
    fig, (ax,) = new_figure("Hypervolume of the search's front over the plans trained", subtitle)
    n = list(range(1, len(summary.history) + 1))
    ax.step(n, summary.history, where="post", color="#1f5f8b", label=HYPERVOLUME_LINE)
    ax.plot(n, summary.history, "o", color="#1f5f8b", markersize=3)
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_xlabel(
        f"plans trained by the search (seed {record['training_seed']}; budget {record['budget']} "
        f"of {record['n_space']:,} plans)"
    )
    ax.set_ylabel(
        f"hypervolume (accuracy × {cost})\nreference: accuracy {ref.accuracy:g}, "
        f"{cost} {ref.cost:,.0f}"
    )
    ax.set_ylim(bottom=0)
    return fig


def plot_hypervolume(record: dict, out: Path, subtitle: str) -> list[Path]:
    """``search_hypervolume``.png and .svg in ``out``; nothing before a plan is trained."""
    if not any(c["accuracy"] is not None for c in record["candidates"]):
        return []
    return save_figure(draw_hypervolume(record, subtitle), out, HYPERVOLUME_PLOT)
