"""The card's words for the decision: the headline, the rule as applied, its stability and what
the sweep could resolve. Only words: every number comes from `analysis.decide.Decision`."""

from __future__ import annotations

import math

from kablate.analysis.decide import STABLE_SHARE, Contrast, Decision
from kablate.analysis.summary import Analysis
from kablate.costs.plan_output import human


def pct(x: float | None) -> str:
    return "n/a" if x is None or not math.isfinite(x) else f"{100 * x:.2f}%"


def pp(x: float | None) -> str:
    return "n/a" if x is None or not math.isfinite(x) else f"{100 * x:+.2f} pp"


def diff_prose(c: Contrast) -> str:
    """'−0.11 pp [−0.78, +0.56] (one-sided lower bound −0.67 pp)'."""
    return (
        f"{pp(c.diff)} [{pp(c.low)}, {pp(c.high)}] (one-sided 95% lower bound {pp(c.lower_bound)})"
    )


def rule_sentence(d: Decision, cost_label: str) -> str:
    """The rule as applied, in one sentence."""
    if d.rule == "one-se":
        return (
            f"the one-standard-error rule: the cheapest plan by {cost_label} whose validation "
            f"accuracy is within {d.within_se:g} standard error(s) of the best plan's, a "
            f"tolerance of {100 * d.tolerance:.2f} pp (the best plan's standard error, read from "
            "its 95% interval: the paired two-level bootstrap over seeds and validation images, "
            "never narrower than the exact binomial interval of one seed's images)"
        )
    return (
        f"non-inferiority with a {100 * d.margin:.2f} pp margin: the cheapest plan by "
        f"{cost_label}, among those cheaper than the baseline {d.baseline}, whose one-sided 95% "
        f"lower bound of (plan − {d.baseline}) validation accuracy lies above "
        f"−{100 * d.margin:.2f} pp; if none does, keep the baseline"
    )


def rule_words(d: Decision) -> str:
    """The rule and its margin or tolerance, short enough for the verdict's own sentence."""
    if d.rule == "one-se":
        return (
            f"by the one-standard-error rule ({d.within_se:g} SE, a {100 * d.tolerance:.2f} pp "
            "tolerance)"
        )
    return f"by non-inferiority with a {100 * d.margin:.2f} pp margin"


def headline(a: Analysis, cost_label: str) -> list[str]:
    """The first paragraph of the card: the verdict, the rule and margin, the evidence, the
    stability and any flag of the recommended plan."""
    d = a.decision
    if d is None:
        return [f"**No recommendation yet:** {why_no_decision(a)}", ""]
    v = a.variants.set_index("variant")
    rec, cost = d.recommended, d.cost
    ratio = float(v.loc[rec, cost]) / float(v.loc[d.baseline, cost])
    where = f"{d.n_seeds} seed(s) × {d.n_images} validation images"
    if d.keeps_baseline:
        first = f"**Keep the baseline {d.baseline}** (`{v.loc[rec, 'plan']}`) {rule_words(d)}."
        closest = closest_cheaper(a)
        if d.rule == "margin" and closest is None:
            first += (
                f" Every other plan costs more {cost_label} than the baseline, so none can be "
                "recommended for being as good"
            )
            first += (
                f"; shown better than it, and worth weighing: {', '.join(d.worth_cost)}"
                if d.worth_cost
                else f", and none is shown better than it ({where})"
            )
            first += "."
        elif d.rule == "margin":
            first += (
                f" No plan cheaper by {cost_label} is shown to lose less than "
                f"{100 * d.margin:.2f} pp of validation accuracy ({where})."
                f" The closest, {closest.name}: {diff_prose(closest)}."
            )
    else:
        c = d.contrasts[rec]
        first = (
            f"**Recommended kernel plan: {rec}** (`{v.loc[rec, 'plan']}`) {rule_words(d)}, "
            f"{ratio:.2f}× the "
            f"{cost_label} of the baseline {d.baseline}; against it on validation accuracy "
            f"{diff_prose(c)}, over {where}."
        )
    out = [first + f" Rule: {rule_sentence(d, cost_label)}."]
    out += raced_sentence(a)
    out.append(stability_sentence(d))
    flags = a.flags.get(rec) or []
    if flags:
        out.append(f"**Warning on {rec}:** {'; '.join(flags)}.")
    if a.resolution is not None:
        out.append(resolution_sentence(a))
    return [" ".join(out), ""]


def raced_sentence(a: Analysis) -> list[str]:
    """How many plans racing retired before their last seed, left out of the comparison
    above; nothing without a retirement."""
    v = a.variants
    if "retired_after" not in v:
        return []
    n = int(v["retired_after"].notna().sum())
    if not n:
        return []
    return [
        f"Racing retired {n} of the {len(v)} plans after fewer seeds (see Racing over seeds): "
        "they are left out of this comparison."
    ]


def closest_cheaper(a: Analysis) -> Contrast | None:
    d = a.decision
    v = a.variants.set_index("variant")
    base_cost = float(v.loc[d.baseline, d.cost])
    cheaper = [c for n, c in d.contrasts.items() if float(v.loc[n, d.cost]) < base_cost]
    return max(cheaper, key=lambda c: (c.lower_bound, c.name)) if cheaper else None


def stability_sentence(d: Decision) -> str:
    loo = ""
    if d.leave_one_out:
        picks = ", ".join(f"without seed {s}: {p}" for s, p in d.leave_one_out.items())
        loo = f" Leaving one seed out picks: {picks}."
    if d.rule == "one-se":
        if not math.isfinite(d.stability):
            return "Stability: one seed only, so no seed can be left out." + loo
        word = "unstable" if d.unstable else "stable"
        return (
            f"Stability ({word}): {100 * d.stability:.0f}% of leave-one-seed-out picks agree." + loo
        )
    share = f"{100 * d.stability:.0f}%"
    if d.unstable:
        return (
            f"**The data cannot decide firmly:** in the bootstrap resamples this verdict is the "
            f"rule's pick only {share} of the time (below {100 * STABLE_SHARE:.0f}%); more "
            "validation images or seeds would settle it." + loo
        )
    return f"Stability: the rule picks it in {share} of the bootstrap resamples." + loo


def resolution_sentence(a: Analysis) -> str:
    r, d = a.resolution, a.decision
    text = (
        f"What this sweep could resolve: differences of about {100 * r.smallest:.2f} pp (80% "
        f"power, one-sided 5%), with {r.n_images} validation images on which two plans "
        f"disagreed on {100 * r.disagreement:.1f}% of images"
    )
    if d.rule == "margin":
        need = r.images_for(d.margin)
        text += (
            f"; a {100 * d.margin:.2f} pp margin needs about {need:,} validation images at the "
            "same disagreement"
            + (", so this sweep can resolve it" if need <= r.n_images else "")
            + ". More seeds shrink only the part of the error that changes from seed to seed; "
            "the images' own sampling error stays, because every seed scores the same images"
        )
    return text + "."


def why_no_decision(a: Analysis) -> str:
    if a.evidence is None:
        return "no trial has finished yet."
    return (
        f"the baseline {a.baseline} has not finished the seeds the other variants are compared "
        "on; rerun the sweep's command to finish it."
    )


def cost_ratio(a: Analysis, name: str) -> str:
    d = a.decision
    v = a.variants.set_index("variant")
    return f"{human(float(v.loc[name, d.cost]))} ({float(v.loc[name, 'cost_ratio']):.2f}×)"
