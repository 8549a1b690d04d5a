"""The card's account of a race over seeds: the rule, the rounds, who was retired and why.

The numbers come from the study's race records (`ResultsFolder.race`) and the variants
table's ``retired_*`` columns (`kablate.analysis.race`); this module only words them.
"""

from __future__ import annotations

import math

from kablate.analysis.race import FUTILE, INFERIOR
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
        "round, the paired two-level bootstrap of the seeds and images so far tested the "
        "variants still in the race; the round's one-sided p-values were Holm-adjusted "
        "together, and a variant was retired, and got no more seeds, when one of its adjusted "
        "p-values lay below 0.05. The baseline is never retired.",
        "",
        *rule_words(a, margin, cost),
        "Rounds decided: "
        + "; ".join(
            f"after seed {seed}, {len(r['compared'])} variant(s) compared, "
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
            "| variant | retired after seed | seeds | val acc (95% CI) | why | compared with | "
            "difference | upper 95% bound | Holm p |",
            "|---|---:|---:|---|---|---|---:|---:|---:|",
        ]
        for r in retired.itertuples():
            why = {
                FUTILE: f"gains < {margin:g} pp, costs more",
                INFERIOR: f"loses > {margin:g} pp to the baseline",
            }.get(r.retired_why, f"loses > {margin:g} pp")
            out.append(
                f"| {r.variant} | {int(r.retired_after)} | {int(r.n_seeds)} | "
                f"{ci(r.val_acc_ci_low, r.val_acc_ci_high)} | {why} | {r.retired_by} | "
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


def rule_words(a: Analysis, margin: float, cost: str) -> list[str]:
    """What the race tested, by the rule it ran under, and the caution for a report that picks
    by the one-standard-error rule after a race under the margin rule."""
    loses = (
        f"**loses > {margin:g} pp** to a variant that costs no more {cost}: the one-sided "
        f'p-value of "it loses at most {margin:g} pp" (without the adjustment: the upper '
        f"one-sided 95% bound of the difference below −{margin:g} pp)"
    )
    if not a.race["rule"].get("futility"):
        return [
            f"Every variant was tested on whether it {loses}. "
            "No rule recommends a variant over one that costs no more and is better by more "
            "than the margin, so retired variants are left out of the recommendation above.",
            "",
        ]
    out = [
        "Under the margin rule the round tested only what can bear on that rule's pick (each "
        "extra test in a Holm family costs the others power):",
        "",
        f"- a variant that costs more than the baseline: whether it **gains < {margin:g} pp** "
        f'over the baseline (futility): the one-sided p-value of "it gains at least '
        f'{margin:g} pp". The margin rule never recommends a plan that costs more than the '
        "baseline, so this cannot change its pick; it stops spending seeds on a gain smaller "
        "than the one you said matters (stopping for futility, as group-sequential trials do: "
        "Jennison & Turnbull 2000).",
        f"- a variant that costs no more than the baseline: whether it {loses}, or loses more "
        f"than {margin:g} pp to the baseline itself (inferior): it would then fail the "
        "non-inferiority test the margin rule applies.",
        "",
    ]
    v = a.variants
    futile = "retired_why" in v and bool((v["retired_why"] == FUTILE).any())
    if futile and a.pick.rule != "margin":
        out += [
            "**Caution:** this report picks by the one-standard-error rule, whose reference is "
            "the best variant, but the race retired costlier variants for futility under the "
            "margin rule. The one-SE pick may differ from a full sweep's; run again with "
            '`racing = "off"` to train their remaining seeds.',
            "",
        ]
    return out


def p_text(p: float) -> str:
    """A p-value for the table; a bootstrap share of 0 is below 1 in the resamples."""
    if p is None or not math.isfinite(p):
        return "n/a"
    return "< 0.001" if p < 0.001 else f"{p:.3f}"
