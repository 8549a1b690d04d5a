"""The card's account of successive halving inside trials: the rule, its known bias, the trials
it stopped, and how well the early score ranked the trials that ran to the end.

The numbers come from `kablate.analysis.halving.HalvingAccount`; this module only words them.
"""

from __future__ import annotations

import math

from kablate.analysis.summary import Analysis
from kablate.report.race import p_text
from kablate.report.verdict import pct


def halving_section(a: Analysis) -> list[str]:
    """Markdown lines: nothing when the sweep did not halve."""
    h = a.halving
    if h is None:
        return []
    rule = h.rule
    rungs = ", ".join(str(e) for e in rule["rungs"]) or "none"
    out = [
        "#### Successive halving inside trials",
        "",
        "Trials were stopped early by successive halving (Jamieson & Talwalkar 2016; "
        "asynchronous, as in Li et al. 2020 and Optuna's SuccessiveHalvingPruner). After "
        f"epoch(s) {rungs} (first rung {rule['first_epoch']}, factor {rule['factor']}), each "
        "trial's validation accuracy was compared with the accuracies that the trials of the "
        f"same seed had recorded at that epoch before it; a trial not among the best "
        f"1/{rule['factor']} of them stopped there. A variant with a stopped trial is left out "
        "of the comparisons and of the recommendation above (its score is an early one), and "
        "gets no more seeds; it is listed below with its last validation accuracy. The "
        "baseline is never stopped.",
        "",
        f"{len(h.stopped)} trial(s) stopped early; {h.n_done} ran to the end.",
        "",
    ]
    if len(h.stopped):
        out += ["| variant | seed | stopped after epoch | last val acc |", "|---|---:|---:|---:|"]
        for r in h.stopped.sort_values(["variant", "seed"]).itertuples():
            out.append(f"| {r.variant} | {int(r.seed)} | {int(r.score_epoch)} | {pct(r.val_acc)} |")
        out.append("")
    if len(h.not_run):
        out += [
            f"{len(h.not_run)} trial(s) not run: their variant was stopped on another seed.",
            "",
            "| variant | seed not run | variant stopped after seed |",
            "|---|---:|---:|",
        ]
        for r in h.not_run.sort_values(["variant", "seed"]).itertuples():
            out.append(f"| {r.variant} | {int(r.seed)} | {int(r.retired_after)} |")
        out.append("")
    out += [
        "How well the early score ranked the trials that ran to the end: Spearman's ρ and "
        "Kendall's τ-b between each such trial's validation accuracy at the rung and its final "
        "one (scipy.stats.spearmanr, kendalltau; two-sided p-values for no association). They "
        "are measured on the survivors only, whose early scores were all good enough to go on, "
        "so they say little about how the stopped trials would have ended.",
        "",
        "| after epoch | trials | Spearman ρ | p | Kendall τ | p |",
        "|---:|---:|---:|---:|---:|---:|",
    ]
    for g in h.agreement:
        out.append(
            f"| {g.epoch} | {g.n_trials} | {num(g.spearman)} | {p_text(g.spearman_p)} | "
            f"{num(g.kendall)} | {p_text(g.kendall_p)} |"
        )
    out += [
        "",
        "Known bias: the score after a few epochs is a proxy of the final one, and it ranks "
        "variants imperfectly: a variant that learns slowly at first (a larger kernel, a deeper "
        "stack) can be stopped although it would have ended ahead. Which trials reached a rung "
        "first depends on the workers' timing, so a rerun with several workers can stop "
        "others. Turn it off (`[halving] enabled = false`, the default) for a sweep whose "
        "decision must rest on fully trained variants only.",
        "",
    ]
    return out


def num(value: float) -> str:
    """A correlation with 2 decimals, n/a when it could not be computed."""
    return f"{value:.2f}" if value is not None and math.isfinite(value) else "n/a"
