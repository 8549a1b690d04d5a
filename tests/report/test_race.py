"""The card's racing section (report/race.py) on a hand-made analysis (invented figures): why
each variant was retired, the futility rule when the race used it, and the caution for a
report that picks by another rule than the race's."""

from __future__ import annotations

import pandas as pd

from kablate.analysis.race import DOMINATED, FUTILE, INFERIOR, put_retired
from kablate.analysis.summary import Analysis
from kablate.report.race import race_section
from kablate.results.columns import RETIRED_COLUMNS
from kablate.spec.schema import PickSpec

ROUNDS = {0: {"seeds": [0], "compared": ["a", "b", "c", "d"], "retired": {}}}


def analysis(rule: str, futility: bool, entries: dict[str, dict]) -> Analysis:
    """Variants a (baseline), b, c, d; ``entries``: the retired ones' race records."""
    variants = pd.DataFrame(
        {
            "variant_id": ["a", "b", "c", "d"],
            "variant": ["all-3", "body-5", "blind", "stem-7"],
            "n_seeds": [3, 1, 1, 3],
            "val_acc_ci_low": [0.9, 0.88, 0.05, 0.9],
            "val_acc_ci_high": [0.95, 0.94, 0.15, 0.96],
        }
    )
    trials = pd.DataFrame(
        [{"variant_id": vid, "retired": {"seed": 0, **e}} for vid, e in entries.items()]
    )
    put_retired(variants, trials)
    race = {"rule": {"margin_pp": 1.0, "cost": "macs", "futility": futility}, "rounds": ROUNDS}
    return Analysis(
        trials=trials,
        variants=variants,
        curves=pd.DataFrame(),
        baseline="all-3",
        pick=PickSpec(rule=rule),
        decision=None,
        race=race,
    )


FIGURES = {"diff": 0.002, "upper": 0.008, "p_holm": 0.01}
ENTRIES = {
    "b": {"why": FUTILE, "by_name": "all-3", **FIGURES},
    "c": {"why": DOMINATED, "by_name": "all-3", "diff": -0.8, "upper": -0.7, "p_holm": 0.0},
}


def rows(lines: list[str]) -> dict[str, list[str]]:
    return {
        cells[0]: cells
        for line in lines
        if line.startswith("| ") and not line.startswith("| variant")
        for cells in [[c.strip() for c in line.strip("|").split("|")]]
    }


def test_each_retired_row_says_why_and_with_whom():
    table = rows(race_section(analysis("margin", True, ENTRIES)))
    assert set(table) == {"body-5", "blind"}
    assert table["body-5"][4:6] == ["gains < 1 pp, costs more", "all-3"]
    assert table["blind"][4:6] == ["loses > 1 pp", "all-3"]
    assert table["body-5"][6:] == ["+0.20 pp", "+0.80 pp", "0.010"]


def test_a_race_recorded_before_futility_reads_as_dominated():
    old = {"c": {k: v for k, v in ENTRIES["c"].items() if k != "why"}}
    a = analysis("margin", False, old)
    assert list(a.variants["retired_why"].fillna("")) == ["", "", DOMINATED, ""]
    assert rows(race_section(a))["blind"][4] == "loses > 1 pp"
    # The table keeps every retired_* column, empty (not "nan") for variants in the race.
    assert a.variants.loc[0, list(RETIRED_COLUMNS)].isna().all()


def test_the_futility_rule_is_stated_only_when_the_race_used_it():
    text = "\n".join(race_section(analysis("margin", True, ENTRIES)))
    assert "(futility)" in text and "Jennison & Turnbull 2000" in text
    assert "(inferior)" in text and "Caution" not in text
    plain = "\n".join(race_section(analysis("margin", False, {})))
    assert "futility" not in plain and "inferior" not in plain
    assert "Every variant was tested on whether it **loses > 1 pp**" in plain


def test_a_variant_retired_as_inferior_names_the_baseline():
    entry = {"why": INFERIOR, "by_name": "all-3", "diff": -0.03, "upper": -0.015, "p_holm": 0.02}
    table = rows(race_section(analysis("margin", True, {"c": entry})))
    assert table["blind"][4:6] == ["loses > 1 pp to the baseline", "all-3"]
    assert table["blind"][6:] == ["-3.00 pp", "-1.50 pp", "0.020"]


def test_a_one_se_report_on_a_race_that_retired_for_futility_is_cautioned():
    cautioned = "\n".join(race_section(analysis("one-se", True, ENTRIES)))
    assert "**Caution:**" in cautioned and 'racing = "off"' in cautioned
    # No futility retirement, no caution, even under the other rule.
    only_dominated = {"c": ENTRIES["c"]}
    assert "Caution" not in "\n".join(race_section(analysis("one-se", True, only_dominated)))
