"""The card's account of a ``[search]`` sweep's search: the method, the front it found, the
hypervolume over the plans it trained, and the share of the space evaluated.

The figures come from ``search.json`` (`kablate.trials.search_run`) through
`kablate.analysis.search.summarize_record`; this module only words them.
"""

from __future__ import annotations

from kablate.analysis.search import SearchSummary, summarize_record
from kablate.spec.costs import COSTS


def search_section(record: dict | None) -> list[str]:
    """Markdown lines: nothing for a sweep that did not search."""
    if not record:
        return []
    summary = summarize_record(record)
    cost = COSTS[record["cost"]].label
    done = [c for c in record["candidates"] if c["accuracy"] is not None]
    n_other = summary.n_proposed - summary.n_trained
    out = [
        "#### Search over the plan space",
        "",
        "This sweep searched its per-layer choice space rather than training every plan: "
        "NSGA-II (Deb, Pratap, Agarwal & Meyarivan 2002, through Optuna's `NSGAIISampler`, "
        f"sampler seed {record['sampler_seed']}) trained {summary.n_trained} of the "
        f"{summary.n_space:,} plans of the space ({100 * summary.share_evaluated:.1f}%, exact "
        f"counts) with seed {record['training_seed']}, maximising validation accuracy and "
        f"minimising {cost}; {n_other} more proposals were ruled out by a filter or built a "
        "network already trained, and cost no budget. The plans on the front it found, with "
        "the baseline, are the finalists: they were trained with every seed like any sweep's "
        "plans, and the recommendation above is made among them. The search's accuracies are "
        "one seed's (no interval); the front is the trained plans' only, and a plan the search "
        "never trained may lie beyond it.",
        "",
        f"| plan on the front found | {cost} | val acc, seed {record['training_seed']} |",
        "|---|---:|---:|",
    ]
    for c, on in zip(done, summary.on_front, strict=True):
        if on:
            out.append(f"| {c['name']} | {c['cost']:,.0f} | {100 * c['accuracy']:.2f}% |")
    out += ["", *hypervolume_lines(summary, cost)]
    return out


def hypervolume_lines(summary: SearchSummary, cost: str) -> list[str]:
    """The hypervolume after each plan trained that moved the front, and its reference point."""
    ref = summary.reference
    if not summary.history:
        return ["No plan has been trained by the search yet.", ""]
    out = [
        f"Hypervolume of the trained plans (Zitzler & Thiele 1998): "
        f"{summary.history[-1]:.6g} (accuracy × {cost}) with the reference point accuracy "
        f"{ref.accuracy:g} and {cost} {ref.cost:,.0f} (the largest {cost} trained), that is "
        f"{100 * summary.share_of_box:.1f}% of the box an ideal plan (accuracy 1 at no cost) "
        "would cover. It grew as follows (the plans that moved the front):",
        "",
        "| plans trained | hypervolume | share of the box |",
        "|---:|---:|---:|",
    ]
    box = ref.box()
    last = None
    for n, value in enumerate(summary.history, start=1):
        if value != last or n == len(summary.history):
            share = f"{100 * value / box:.1f}%" if box else "none"
            out.append(f"| {n} | {value:.6g} | {share} |")
        last = value
    return [*out, ""]
