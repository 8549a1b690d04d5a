"""The card's account of a race over seeds: the rule, the rounds, who was retired and why.

The numbers come from the study's race records (`ResultsFolder.race`) and the variants
table's ``retired_*`` columns (`kablate.analysis.race`); this module only words them.
"""

from __future__ import annotations

import math

from kablate.analysis.summary import Analysis
from kablate.report.tables import ci
from kablate.report.verdict import pp
from kablate.spec.costs import COSTS


def race_section(a: Analysis) -> list[str]:
    """Markdown lines: nothing when the sweep did not race."""
    if not a.race:
        return []
    rule, rounds = a.race["rule"], a.race["rounds"]
    margin, cost = rule["margin_pp"], COSTS[rule["cost"]].label
    out = [
        "#### Racing over seeds",
        "",
        "This sweep raced its variants over seeds (sequential elimination: Maron & Moore 1994, "
        '"Hoeffding races"; Birattari et al. 2002, the F-race). After each complete seed '
        "round, a variant was retired, and got no more seeds, when the paired two-level "
        f"bootstrap showed it to lose more than the margin of {margin:g} pp against a variant "
        f'that costs no more {cost}: the one-sided p-value of "it loses at most {margin:g} pp", '
        "Holm-adjusted over every pair compared in the round, lay below 0.05 (without the "
        f"adjustment: the upper one-sided 95% bound of the difference below −{margin:g} pp). "
        "The baseline is never retired. Retired variants are left out of the recommendation "
        "above: a variant that costs no more and is better by more than the margin would be "
        "picked before them by the rule.",
        "",
        "Rounds decided: "
        + "; ".join(
            f"after seed {seed}, {len(r['compared'])} variants compared, "
            f"{len(r['retired'])} retired"
            for seed, r in sorted(rounds.items(), key=lambda item: len(item[1]["seeds"]))
        )
        + "."
        if rounds
        else "No seed round has been decided yet.",
        "",
    ]
    v = a.variants
    retired = v[v["retired_after"].notna()] if "retired_after" in v else v.iloc[0:0]
    if len(retired):
        out += [
            "| variant | retired after seed | seeds | val acc (95% CI) | dominated by | "
            "difference | upper 95% bound | Holm p |",
            "|---|---:|---:|---|---|---:|---:|---:|",
        ]
        for r in retired.itertuples():
            out.append(
                f"| {r.variant} | {int(r.retired_after)} | {int(r.n_seeds)} | "
                f"{ci(r.val_acc_ci_low, r.val_acc_ci_high)} | {r.retired_by} | "
                f"{pp(r.retired_diff)} | {pp(r.retired_bound)} | {p_text(r.retired_p_holm)} |"
            )
        out.append("")
    out += [
        "Known bias: a retired variant has fewer seeds than the others, so its interval is "
        "wider (its row uses its own seeds). After one seed the bootstrap has no seed level to "
        "resample, so the bound counts the validation images' chance only: a variant whose "
        "first seed was unlucky by more than the margin can be retired.",
        "",
    ]
    return out


def p_text(p: float) -> str:
    """A p-value for the table; a bootstrap share of 0 is below 1 in the resamples."""
    if p is None or not math.isfinite(p):
        return "n/a"
    return "< 0.001" if p < 0.001 else f"{p:.3f}"
