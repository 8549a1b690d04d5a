"""The card's stem section: each cell is the mean over seeds of the per-seed figure with its
95% Student-t interval (computed here by scipy.stats.t), or the mean alone from one seed; the
comparison sentence quotes the baseline's figures."""

from __future__ import annotations

import numpy as np
from scipy import stats

from kablate.analysis.stem import summarize_stems
from kablate.report.stem_card import stem_section
from tests.analysis.synthetic import planted_bank
from tests.report.markdown import md_table

COLUMNS = ("share_low", "share_middle", "share_high", "dead_share", "duplicate_share")


def atlas():
    rng = np.random.default_rng(5)
    bank = planted_bank()  # 15 filters: 3 dead (two zero, one tiny), one noisy copy, one negative
    weights = {
        "all-3": {0: bank, 1: bank + 0.3 * rng.normal(size=bank.shape), 2: bank[::-1].copy()},
        "stem-5": {0: rng.normal(size=(8, 3, 5, 5))},
    }
    return summarize_stems(weights, {"all-3": ("baseline", "3×3"), "stem-5": ("", "5×5")})


def scipy_cell(values: np.ndarray) -> str:
    """'m% [lo%, hi%]' from per-seed values: the mean and scipy's t interval (df = n − 1)."""
    mean, sem = values.mean(), stats.sem(values)
    low, high = (mean, mean) if sem == 0 else stats.t.interval(0.95, len(values) - 1, mean, sem)
    return f"{100 * mean:.2f}% [{100 * max(low, 0):.2f}%, {100 * min(high, 1):.2f}%]"


def test_each_cell_is_the_seed_mean_with_its_student_t_interval():
    a = atlas()
    rows = {r[0]: r for r in md_table(stem_section(a, ""), "| variant | stem |")}
    base = rows["all-3 (baseline)"]
    assert base[1:3] == ["3×3", "3 × 15"]
    seeds = a.per_seed[a.per_seed["variant"] == "all-3"]
    for cell, metric in zip(base[3:8], COLUMNS, strict=True):
        assert cell == scipy_cell(seeds[metric].to_numpy()), metric
    one = rows["stem-5"]
    assert one[2] == "1 × 8" and "[" not in "".join(one[3:])  # one seed: no interval


def test_the_comparison_quotes_the_variants_and_the_baselines_dead_share():
    a = atlas()
    text = "\n".join(stem_section(a, ""))
    seeds = a.per_seed[a.per_seed["variant"] == "all-3"]["dead_share"].to_numpy()
    assert f"against {scipy_cell(seeds)} for the baseline's 3×3" in text
    assert "- The 5×5 stem of stem-5 leaves" in text and "(one seed)" in text


def test_without_an_atlas_the_section_says_why():
    assert stem_section(None, "no checkpoints") == [
        "#### What the stem learned",
        "",
        "Not computed: no checkpoints.",
        "",
    ]
