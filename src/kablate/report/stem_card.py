"""The card's section on what the stem learned: the filter-atlas table and its method, read
from a `StemAtlas` (numbers with their 95% interval over seeds, or "one seed")."""

from __future__ import annotations

import math

from kablate.analysis.stem import BAND_EDGES, DEAD_RATIO, DUPLICATE_R, StemAtlas
from kablate.report.tables import ci
from kablate.report.verdict import pct

STEM_TABLE = "stem.csv"  # per variant: mean and 95% interval over seeds
STEM_SEEDS_TABLE = "stem_seeds.csv"  # per variant and seed
STEM_FILTERS = "stem_filters.npz"  # every described seed's weights, key "<variant>/s<seed>"


def share(row, metric: str) -> str:
    """'12.50% [8.00%, 17.00%]', or the mean alone from one seed."""
    low, high = row[f"{metric}_ci_low"], row[f"{metric}_ci_high"]
    mean = pct(row[f"{metric}_mean"])
    return f"{mean} {ci(low, high)}" if math.isfinite(low) else mean


def method_lines(atlas: StemAtlas) -> list[str]:
    a, b = BAND_EDGES
    return [
        "The stem's trained filters (the first conv on the input), seed by seed. Frequency "
        f"coverage: each filter zero-padded to {atlas.size}×{atlas.size}, its power spectrum "
        "(squared DFT magnitude, summed over input channels) radially averaged (van der Schaaf "
        "& van Hateren 1996), and its energy split at "
        f"{a:g} and {b:g} cycles per pixel into low (with the mean), middle and high bands; "
        "mean over the live filters of a seed. Dead: norm under "
        f"{DEAD_RATIO:g} × the layer's median norm. Near-duplicate: Pearson correlation above "
        f"{DUPLICATE_R:g} with another live filter; opposite: below −{DUPLICATE_R:g} (a filter "
        "and its negative pass opposite halves of the signal through a ReLU, so they are not "
        "counted as duplicates). Mean over seeds with its 95% Student-t interval. The method "
        'and why these thresholds: sweeps/README.md, section "What the report says about the '
        'stem".',
        "",
    ]


def stem_section(atlas: StemAtlas | None, note: str) -> list[str]:
    """The section's Markdown lines."""
    out = ["#### What the stem learned", ""]
    if atlas is None:
        return out + [f"Not computed: {note or 'no stem was read'}.", ""]
    out += method_lines(atlas)
    out += [
        "| variant | stem | seeds × filters | low band | middle band | high band | dead "
        "| near-duplicate | opposite |",
        "|---|---|---:|---:|---:|---:|---:|---:|---:|",
    ]
    metrics = ("share_low", "share_middle", "share_high", "dead_share", "duplicate_share")
    for _, row in atlas.summary.iterrows():
        role = f" ({row['role']})" if row["role"] else ""
        cells = [share(row, m) for m in (*metrics, "opposite_share")]
        out.append(
            f"| {row['variant']}{role} | {row['stem']} | {row['n_seeds']} × {row['n_filters']} "
            f"| {' | '.join(cells)} |"
        )
    out += ["", *compare_lines(atlas)]
    if atlas.skipped:
        out.append(
            "Not described: " + "; ".join(f"{name} ({why})" for name, why in atlas.skipped) + "."
        )
        out.append("")
    return out + [
        f"Numbers per variant in `{STEM_TABLE}`, per seed in `{STEM_SEEDS_TABLE}`; the weights "
        f"of every seed in `{STEM_FILTERS}` (the atlas shows the first seed).",
        "",
    ]


def compare_lines(atlas: StemAtlas) -> list[str]:
    """One sentence per variant against the baseline: dead filters and high-band energy."""
    s = atlas.summary
    base = s[s["role"].str.contains("baseline")]
    if base.empty:
        return []
    b = base.iloc[0]
    out = []
    for _, row in s[~s["role"].str.contains("baseline")].iterrows():
        seeds = f"over {row['n_seeds']} seeds" if row["n_seeds"] > 1 else "one seed"
        out.append(
            f"- The {row['stem']} stem of {row['variant']} leaves {share(row, 'dead_share')} of "
            f"its filters dead ({seeds}), against {share(b, 'dead_share')} for the baseline's "
            f"{b['stem']}; its filters put {share(row, 'share_high')} of their energy in the "
            f"high band, against {share(b, 'share_high')}."
        )
    return out + ([""] if out else [])
