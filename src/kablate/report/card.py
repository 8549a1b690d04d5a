"""The model-card section: Markdown to paste into an existing model card.

Section headings follow Mitchell et al. 2019, "Model Cards for Model Reporting" (those that
apply to a kernel-size ablation). The same analysis always gives the same text, except for the
one line that starts with ``Generated``.
"""

from __future__ import annotations

import math
from datetime import UTC, datetime

from kablate.analysis.summary import Analysis
from kablate.costs.export import human

CAUTION = (
    "These results come from short CPU training runs, often on subsets of the data, with a "
    "few seeds. They are evidence for choosing between kernel plans under identical "
    "conditions, not a measurement of how the chosen network will perform once deployed. "
    "Confidence intervals over a handful of seeds are wide and rest on the t-distribution's "
    "assumptions. Do not use this section as a deployment sign-off, and do not use it for a "
    "safety-related application without a full evaluation of the final model under the "
    "rules that apply to that use."
)


def pct(x: float) -> str:
    return "n/a" if x is None or not math.isfinite(x) else f"{100 * x:.2f}%"


def pp(x: float) -> str:
    return "n/a" if x is None or not math.isfinite(x) else f"{100 * x:+.2f} pp"


def _front_table(a: Analysis) -> list[str]:
    v = a.variants.sort_values(["macs", "variant"])
    lines = [
        "| variant | plan | val acc (95% CI) | test acc | MACs | params | rf | seeds | front |",
        "|---|---|---|---|---:|---:|---:|---:|---|",
    ]
    for row in v.itertuples():
        fronts = [
            name for name, flag in (("MACs", row.front_macs), ("params", row.front_params)) if flag
        ]
        marks = []
        if row.recommended:
            marks.append("**recommended**")
        if row.variant == a.baseline:
            marks.append("baseline")
        name = f"{row.variant}" + (f" ({', '.join(marks)})" if marks else "")
        ci = (
            f"{pct(row.val_acc_mean)} [{pct(row.val_acc_ci_low)}, {pct(row.val_acc_ci_high)}]"
            if row.n_seeds
            else "not trained yet"
        )
        lines.append(
            f"| {name} | `{row.plan}` | {ci} | {pct(row.test_acc_mean)} | {human(row.macs)} | "
            f"{human(row.params)} | {row.rf} | {row.n_seeds} | {', '.join(fronts) or '-'} |"
        )
    return lines


def _comparison_table(a: Analysis) -> list[str]:
    lines = [
        f"Paired by seed against the baseline **{a.baseline}** (validation accuracy, variant "
        "minus baseline; p from a paired t-test, `scipy.stats.ttest_rel`).",
        "",
        "| variant | n pairs | mean difference | 95% CI | p | reading |",
        "|---|---:|---:|---|---:|---|",
    ]
    for name, c in a.comparisons.items():
        p = "n/a" if not math.isfinite(c.p_value) else f"{c.p_value:.3g}"
        lines.append(
            f"| {name} | {c.n} | {pp(c.mean_diff)} | [{pp(c.ci_low)}, {pp(c.ci_high)}]"
            f" | {p} | {c.verdict} |"
        )
    return lines


def render_card(
    a: Analysis,
    meta: dict,
    data: dict,
    plots: list[str],
    version: str,
    env: dict,
    now: datetime | None = None,
) -> str:
    """The Markdown text of the model-card section."""
    recipe = meta["resolved"].get("recipe", {})
    sel = a.selection
    rec = a.variants[a.variants["recommended"]]
    stamp = (now or datetime.now(UTC)).strftime("%Y-%m-%d %H:%M UTC")
    sizes = data["sizes"]
    out = [
        f"## Kernel-size ablation: {meta['name']}",
        "",
        f"Generated {stamp} by kablate {version}.",
        "",
        "### Model details",
        "",
        f"- Sweep `{meta['name']}` from `{meta['source']}` (fingerprint `{meta['fingerprint']}`).",
        f"- {len(a.variants)} kernel plans of one base network, each trained with seeds "
        f"{', '.join(map(str, meta['seeds']))} under one recipe: {recipe.get('epochs')} epochs, "
        f"batch {recipe.get('batch_size')}, {recipe.get('optimizer')} at lr {recipe.get('lr')}, "
        f"{recipe.get('schedule')} schedule.",
    ]
    if meta.get("story"):
        out.append(f"- Purpose of the sweep: {meta['story']}")
    out += [
        "",
        "### Intended use",
        "",
        "Choosing the kernel sizes of this network for this data. The numbers compare kernel "
        "plans with each other under identical, short training; they are not estimates of "
        "the final model's accuracy.",
        "",
        "### Metrics",
        "",
        "- Selection metric: mean validation accuracy over seeds. Test accuracy is reported "
        "but never used to choose.",
        "- Costs: parameters, MACs (multiply-accumulates of conv and linear layers; "
        "FLOPs = 2 × MACs), theoretical receptive field at the head (Araujo et al. 2019).",
        "- Intervals: 95% Student-t intervals over seeds. Comparisons: per-seed paired "
        "differences against the baseline.",
        "",
        "### Training data",
        "",
        f"- Source `{data['source']}`, {sizes['train']} training images "
        f"({data['in_shape'][0]}×{data['in_shape'][1]}×{data['in_shape'][2]}, "
        f"{data['n_classes']} classes); normalisation from the training subset only.",
        f"- Split indices: train `{data['indices_sha1']['train']}` (SHA-1 prefix; the full "
        "lists are in `data.json`).",
        "",
        "### Evaluation data",
        "",
        f"- Validation: {sizes['val']} images from the training pool, class-balanced "
        f"(`{data['indices_sha1']['val']}`); used for model selection.",
        f"- Test: {sizes['test']} images, {data['test_pool']} (`{data['indices_sha1']['test']}`).",
        "",
        "### Quantitative analyses",
        "",
    ]
    if sel is not None and len(rec):
        r = rec.iloc[0]
        out += [
            f"**Recommended plan: {sel.recommended}** (`{r['plan']}`): "
            f"{human(r['macs'])} MACs, {human(r['params'])} params, receptive field {r['rf']}; "
            f"validation {pct(r['val_acc_mean'])}, test {pct(r['test_acc_mean'])} "
            "(test reported separately, not used to choose).",
            "",
            f"Why: by the one-standard-error rule (Breiman et al. 1984; Hastie, Tibshirani & "
            f"Friedman, *The Elements of Statistical Learning*, §7.10), {sel.reason}.",
            "",
        ]
    else:
        out += ["No trial has finished yet, so no plan is recommended.", ""]
    missing = a.n_missing
    if missing:
        out += [
            f"Partial sweep: {missing} of {len(a.trials)} trials have not finished; "
            "statistics use the seeds that did.",
            "",
        ]
    out += _front_table(a) + [""] + _comparison_table(a) + [""]
    for plot in plots:
        title = plot.rsplit(".", 1)[0].replace("_", " ")
        out += [f"![{title}]({plot})", ""]
    out += [
        "### Caveats and recommendations",
        "",
        CAUTION,
        "",
        "### Reproducing",
        "",
        f"- Command: `{meta.get('command') or 'kablate run ' + meta['source']}`",
        f"- Workers × threads: {meta.get('workers')} × {meta.get('threads')}; storage: "
        f"{meta.get('storage')}.",
        f"- Environment: {env_line(env)}.",
        "",
    ]
    return "\n".join(out)


def env_line(env: dict) -> str:
    packages = ", ".join(f"{k} {v}" for k, v in env.get("packages", {}).items())
    return (
        f"{env.get('cpu', 'unknown CPU')}, {env.get('cores', '?')} cores; "
        f"Python {env.get('python', '?')}; {packages}"
    )
