"""The model-card section: Markdown to paste into an existing model card.

Section headings follow Mitchell et al. 2019, "Model Cards for Model Reporting" (those that
apply to a kernel-size ablation). The section starts at heading level 2 so that it nests
under a card's title. The same analysis always gives the same text, except for the one line
that starts with ``Generated``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import UTC, datetime

from kablate.analysis.summary import Analysis
from kablate.costs.export import human

STAMP_PREFIX = "Generated "
CAUTION = (
    "These results come from short CPU training runs, often on subsets of the data, with a "
    "few seeds. They are evidence for choosing between kernel plans under identical "
    "conditions, not a measurement of how the chosen network will perform once deployed. "
    "Confidence intervals over a handful of seeds are wide and rest on the t-distribution's "
    "assumptions (roughly normal seed-to-seed variation); with n = 2 or 3 seeds only large "
    "differences can be told apart. Do not use this section as a deployment sign-off, and do "
    "not use it for a safety-related application without a full evaluation of the final model "
    "under the rules that apply to that use."
)
PLOT_CAPTIONS = {
    "accuracy_vs_params": "Validation accuracy against parameters, with the Pareto staircase",
    "accuracy_vs_macs": "Validation accuracy against MACs, with the Pareto staircase",
    "accuracy_vs_latency": "Validation accuracy against CPU latency, with the Pareto staircase",
    "rf_vs_accuracy": "Validation accuracy against the theoretical receptive field",
    "learning_curves": "Validation accuracy per epoch (mean over seeds; band: min–max)",
    "grid_heatmap": "Mean validation accuracy over the two-axis grid, ± the half-width of each "
    "cell's 95% CI; the colour scale spans at least one typical CI, so cells that differ by "
    "less than the seed-to-seed noise look alike",
    "effective_rf": "Effective receptive field of the recommended plan and the baseline",
}


@dataclass(frozen=True)
class CardContext:
    """What the card says about where the numbers came from (all from the results folder)."""

    meta: dict  # sweep.json
    data: dict  # data.json
    version: str  # kablate's version writing the card
    plots: tuple[str, ...]  # PNG file names, relative to the card
    cost_label: str  # "MACs", "params" or "latency"


def pct(x: float | None) -> str:
    return "n/a" if x is None or not math.isfinite(x) else f"{100 * x:.2f}%"


def pp(x: float | None) -> str:
    return "n/a" if x is None or not math.isfinite(x) else f"{100 * x:+.2f} pp"


def flag(value) -> bool:
    """A front flag: True, False, or None/NaN where that front was not computed."""
    return (
        value is not None and not (isinstance(value, float) and math.isnan(value)) and bool(value)
    )


def paired_ci(c) -> str:
    """The 95% CI of a paired difference, or why there is none."""
    if c.too_few:
        return "n/a"
    if not (math.isfinite(c.ci_low) and math.isfinite(c.ci_high)):
        return "none (no spread)"
    return f"[{pp(c.ci_low)}, {pp(c.ci_high)}]"


def n_seeds(n: int) -> str:
    return f"{n} seed" if n == 1 else f"{n} seeds"


def ci_prose(row, metric: str = "val_acc") -> str:
    """A variant's 95% CI for running text: the interval, or why there is none."""
    if not math.isfinite(row[f"{metric}_ci_low"]):  # fewer than two seeds
        return "(one seed: no interval)"
    return ci(row[f"{metric}_ci_low"], row[f"{metric}_ci_high"])


def ci(low: float, high: float) -> str:
    """A 95% CI of an accuracy, clipped to [0%, 100%] for display (the CSV keeps raw limits)."""
    if not (math.isfinite(low) and math.isfinite(high)):
        return "n/a"
    return f"[{pct(max(low, 0.0))}, {pct(min(high, 1.0))}]"


def render_card(a: Analysis, ctx: CardContext, now: datetime | None = None) -> str:
    """The Markdown text of the model-card section."""
    meta = ctx.meta
    stamp = (now or datetime.now(UTC)).strftime("%Y-%m-%d %H:%M UTC")
    out = [
        f"## Kernel-size ablation: {meta['name']}",
        "",
        f"{STAMP_PREFIX}{stamp} by kablate {ctx.version}.",
        "",
        *_summary(a, ctx),
        *_details(a, ctx),
        *_data_sections(ctx.data),
        "### Quantitative analyses",
        "",
        *_recommendation(a, ctx),
        *_front_table(a),
        *_test_table(a),
        *_comparison_table(a),
        *_erf_section(a),
        *_partial(a),
        *_plots(ctx.plots),
        "### Caveats and recommendations",
        "",
        CAUTION,
        "",
        *_caveats(a, int(ctx.data["sizes"]["val"])),
        *_reproducing(meta),
    ]
    return "\n".join(out)


def _summary(a: Analysis, ctx: CardContext) -> list[str]:
    sel = a.selection
    if sel is None:
        return ["**No trial has finished yet, so no plan is recommended.**", ""]
    rec = a.variants[a.variants["recommended"]].iloc[0]
    base = a.variants[a.variants["variant"] == a.baseline].iloc[0]
    line = f"**Recommended kernel plan: {sel.recommended}** (`{rec['plan']}`), "
    if sel.recommended == a.baseline:
        line += f"the baseline, {human(rec['macs'])} MACs"
    elif rec["macs"] <= base["macs"]:
        ratio = base["macs"] / rec["macs"]
        line += f"{human(rec['macs'])} MACs, {ratio:.3g}× fewer than the baseline {a.baseline}"
    else:
        ratio = rec["macs"] / base["macs"]
        line += f"{human(rec['macs'])} MACs, {ratio:.3g}× those of the baseline {a.baseline}"
    versus = a.comparisons.get(sel.recommended)
    against = (
        ""
        if versus is None
        else f" Paired with the baseline on validation accuracy: {pp(versus.mean_diff)}, "
        f"{versus.verdict}."
    )
    return [
        f"{line}; mean validation accuracy {pct(rec['val_acc_mean'])} over "
        f"{n_seeds(rec['n_seeds'])}"
        + (" (those every variant has finished: the sweep is partial)" if a.seeds else "")
        + f", chosen by the one-standard-error rule on {ctx.cost_label}."
        + against,
        "",
    ]


def _details(a: Analysis, ctx: CardContext) -> list[str]:
    meta = ctx.meta
    recipe = meta["resolved"].get("recipe", {})
    network = meta["resolved"].get("network", {})
    stages = network.get("stages", [])
    out = [
        "### Model details",
        "",
        f"- A compact CNN (stem of {network.get('stem', {}).get('out_ch', 16)} channels, "
        f"{len(stages)} stages of "
        f"{', '.join(str(s.get('out_ch')) for s in stages) or 'no'} channels, "
        f"{network.get('norm', 'batch')} norm, {network.get('act', 'relu')}; a global average "
        "pool and a linear head), in "
        f"{len(a.variants)} kernel plans that differ only in their kernel sizes.",
        f"- Sweep `{meta['name']}` from `{meta['source']}`, definition fingerprint "
        f"`{meta['fingerprint']}` (a hash of the resolved network, recipe and data settings; "
        "see Reproducing for the whole sweep's).",
        f"- Each plan trained once per seed ({', '.join(map(str, meta['seeds']))}) under one "
        f"recipe: {recipe.get('epochs')} epochs, batch {recipe.get('batch_size')}, "
        f"{recipe.get('optimizer', 'sgd')} at peak lr {recipe.get('lr')}, "
        f"{recipe.get('schedule', 'cosine')} schedule, on {meta.get('device', 'cpu')}.",
    ]
    if meta.get("budget_seconds"):
        out.append(f"- Wall-clock budget: {meta['budget_seconds'] / 3600:.2g} h.")
    if meta.get("story"):
        out.append(f"- Why the sweep was run: {meta['story']}")
    out += [
        "",
        "### Intended use",
        "",
        "Choosing the kernel sizes of this network for this data. The numbers compare kernel "
        "plans with each other under identical, short training; they are not estimates of the "
        "final model's accuracy.",
        "",
        "### Metrics",
        "",
        "- Selection metric: mean validation accuracy over seeds. Test accuracy is reported "
        "separately and is never used to choose.",
        "- Costs, counted before training: parameters; MACs (multiply-accumulates of conv and "
        "linear layers, FLOPs = 2 × MACs); the theoretical receptive field at the head "
        "(Araujo, Norris & Sim 2019)"
        + ("; CPU latency at batch 1." if a.variants["latency_ms"].notna().any() else "."),
        "- Uncertainty: 95% Student-t intervals over seeds. Comparisons: per-seed paired "
        "differences against the baseline, with a paired t-test (`scipy.stats.ttest_rel`).",
        "",
    ]
    return out


def _data_sections(data: dict) -> list[str]:
    sizes, sha = data["sizes"], data["indices_sha1"]
    c, h, w = data["in_shape"]
    return [
        "### Training data",
        "",
        f"- Source `{data['source']}`: {sizes['train']} training images ({c}×{h}×{w}, "
        f"{data['n_classes']} classes), a fixed-seed, class-balanced subset; normalisation "
        "statistics from the training images only.",
        f"- Split index digest: train `{sha['train']}` (SHA-1 prefix; the full index lists are "
        "in `data.json`).",
        "",
        "### Evaluation data",
        "",
        f"- Validation: {sizes['val']} images from the training pool, class-balanced "
        f"(`{sha['val']}`); the only data model selection looks at.",
        f"- Test: {sizes['test']} images, {data['test_pool']} (`{sha['test']}`); reported, "
        "never used to choose.",
        "",
    ]


def _recommendation(a: Analysis, ctx: CardContext) -> list[str]:
    sel = a.selection
    if sel is None:
        return ["No trial has finished yet, so no plan is recommended.", ""]
    rec = a.variants[a.variants["recommended"]].iloc[0]
    latency = f", {rec['latency_ms']:.3g} ms" if math.isfinite(rec["latency_ms"]) else ""
    out = [
        "#### Recommended plan",
        "",
        f"**{sel.recommended}** (`{rec['plan']}`): {human(rec['macs'])} MACs, "
        f"{human(rec['params'])} params, receptive field {rec['rf']} px{latency}. "
        f"Validation accuracy {pct(rec['val_acc_mean'])} {ci_prose(rec)} over "
        f"{n_seeds(rec['n_seeds'])}.",
        "",
        "Why: by the one-standard-error rule (Breiman et al. 1984; Hastie, Tibshirani & "
        f"Friedman, *The Elements of Statistical Learning*, §7.10), {sel.reason}. The rule "
        f"keeps every variant whose mean is at least {pct(sel.threshold)} ("
        + (
            f"the best mean minus {sel.within_se:g} × its standard error"
            if math.isfinite(sel.best_se)
            else "the best mean itself, for want of a standard error"
        )
        + f") and takes the cheapest by {ctx.cost_label}: {', '.join(sel.candidates)} "
        "qualified.",
        "",
    ]
    tc = a.test_comparison
    test_line = (
        f"Held-out test accuracy of {sel.recommended}, reported separately: "
        f"{pct(rec['test_acc_mean'])} {ci_prose(rec, 'test_acc')}"
    )
    if tc is not None and not tc.too_few:
        test_line += (
            f"; paired against the baseline on test: {pp(tc.mean_diff)} "
            f"{paired_ci(tc)}, p = {tc.p_value:.3g}"
        )
    out += [test_line + ".", ""]
    return out


def _front_table(a: Analysis) -> list[str]:
    v = a.variants.sort_values(["macs", "variant"])
    sel = a.selection
    tol = f"±{sel.within_se if sel is not None else 1.0:g} SE"
    fronts = [("MACs", "front_macs"), ("params", "front_params")]
    if v["front_latency"].notna().all():
        fronts.append(("latency", "front_latency"))
    lines = [
        "#### Variants and Pareto fronts",
        "",
        "Sorted by MACs. *front* names the costs on whose Pareto front (validation accuracy up, "
        "cost down) the variant lies; *all* means the front over every cost at once.",
        "",
        f"| variant | kernel plan | val acc, mean [95% CI] | {tol} | MACs | params | rf "
        "| seeds | front |",
        "|---|---|---|---:|---:|---:|---:|---:|---|",
    ]
    for row in v.itertuples():
        on = [label for label, col in fronts if flag(getattr(row, col))]
        if row.front_all:
            on.append("all")
        marks = []
        if row.recommended:
            marks.append("**recommended**")
        if row.variant == a.baseline:
            marks.append("baseline")
        name = row.variant + (f" ({', '.join(marks)})" if marks else "")
        if row.n_seeds:
            acc = f"{pct(row.val_acc_mean)} {ci(row.val_acc_ci_low, row.val_acc_ci_high)}"
        else:
            acc = "not trained yet"
        within = "yes" if sel is not None and row.variant in sel.candidates else "-"
        seeds = f"{row.n_seeds}/{row.n_planned}"
        lines.append(
            f"| {name} | `{row.plan}` | {acc} | {within} | {human(row.macs)} | "
            f"{human(row.params)} | {row.rf} | {seeds} | {', '.join(on) or '-'} |"
        )
    lines += [
        "",
        f"*{tol}*: within the selection rule's tolerance of the best mean. Intervals are shown "
        "clipped to [0%, 100%]; `variants.csv` keeps the raw t-limits.",
        "",
    ]
    return lines


def _test_table(a: Analysis) -> list[str]:
    v = a.variants[a.variants["n_seeds"] > 0].sort_values(["macs", "variant"])
    lines = [
        "#### Held-out test accuracy (reported, not used to choose)",
        "",
        "| variant | test acc, mean [95% CI] | seeds |",
        "|---|---|---:|",
    ]
    for row in v.itertuples():
        lines.append(
            f"| {row.variant} | {pct(row.test_acc_mean)} "
            f"{ci(row.test_acc_ci_low, row.test_acc_ci_high)} | {row.test_acc_n} |"
        )
    return lines + [""]


def _comparison_table(a: Analysis) -> list[str]:
    lines = [
        "#### Comparison with the baseline",
        "",
        f"Paired by seed against the baseline **{a.baseline}** on validation accuracy "
        "(variant minus baseline; same seed, same data order and augmentation). p is the "
        "two-sided paired t-test of `scipy.stats.ttest_rel`; where every seed shows the same "
        "difference the t-test is undefined, and p is the exact two-sided sign test's.",
        "",
        "| variant | pairs | mean difference | 95% CI | p | reading |",
        "|---|---:|---:|---|---:|---|",
    ]
    for name, c in a.comparisons.items():
        p = "n/a" if not math.isfinite(c.p_value) else f"{c.p_value:.3g}"
        lines.append(f"| {name} | {c.n} | {pp(c.mean_diff)} | {paired_ci(c)} | {p} | {c.verdict} |")
    if not a.comparisons:
        lines.append("| (no other variant) | | | | | |")
    return lines + [""]


def _erf_section(a: Analysis) -> list[str]:
    out = ["#### Effective receptive field", ""]
    if not a.erf:
        return out + [
            f"Not computed: {a.erf_note or 'no map was made'}. The theoretical receptive "
            "fields are in the table above.",
            "",
        ]
    out += [
        "The mean magnitude of the input gradient of the centre output of the last feature "
        "map, over validation images and seeds (Luo et al. 2016), beside the theoretical "
        "receptive field. A side is the smallest centred square holding that share of the "
        "gradient mass.",
        "",
        "| variant | theoretical rf | 50% of the mass within | 95% within | input "
        "| images × seeds |",
        "|---|---:|---:|---:|---:|---:|",
    ]
    for m in a.erf:
        h, w = m.grad.shape
        out.append(
            f"| {m.variant} | {m.geometry.rf[0]} px | {m.extent50} px | {m.extent95} px | "
            f"{h}×{w} px | {m.n_images} × {len(m.seeds)} |"
        )
    if a.erf_note:
        out += ["", f"Only part of the maps: {a.erf_note}."]
    return out + [""]


def _partial(a: Analysis) -> list[str]:
    """The planned trials the statistics do not use: not finished yet, diverged, or held back
    to compare every variant on the same seeds."""
    t, held = a.trials, a.held_back
    left_out = t.loc[t["status"].ne("done") | held, ["variant", "seed", "status"]].copy()
    if not len(left_out):
        return []
    left_out.loc[held[held].index, "status"] = "done, held back"
    n_missing = len(a.missing)
    n_diverged = int((left_out["status"] == "diverged").sum())
    said = []
    if n_missing:
        said.append(
            f"Partial sweep: {n_missing} of {len(t)} trials have no result yet; the "
            "statistics above use the seeds that finished."
        )
    if a.seeds is not None:
        said.append(
            "Not every variant has finished the same seeds, and a seed moves every variant "
            "alike, so the statistics, the fronts and the recommended plan use only seed(s) "
            f"{', '.join(map(str, a.seeds))}, which every variant has finished; "
            f"{int(held.sum())} finished trial(s) at other seeds are held back (they are in "
            "`trials.csv`, and the paired comparisons with the baseline use them). Rerun the "
            "sweep's command to finish the rest."
        )
    if n_diverged:
        said.append(
            f"{n_diverged} of {len(t)} trials diverged (the training loss blew up) and are "
            "left out of the statistics."
        )
    out = ["#### Trials without a result", "", " ".join(said), "", "| variant | seed | status |"]
    out.append("|---|---:|---|")
    out += [f"| {r.variant} | {r.seed} | {r.status} |" for r in left_out.itertuples()]
    return out + [""]


def _plots(plots: tuple[str, ...]) -> list[str]:
    out = ["#### Plots", ""] if plots else []
    for plot in plots:
        stem = plot.rsplit(".", 1)[0]
        caption = PLOT_CAPTIONS.get(stem, stem.replace("_", " "))
        out += [f"![{caption}]({plot})", "", f"*{caption}* ([SVG]({stem}.svg))", ""]
    return out


def _resolution_caveat(a: Analysis, val_size: int) -> list[str]:
    """Warn when the seed-to-seed standard error is finer than one validation image.

    The standard error over seeds measures training noise only. The validation set adds its
    own: accuracy moves in steps of 1/val_size, and a binomial standard error of
    sqrt(p(1 − p)/val_size) (common practice). When the seed SE is below one step, the
    selection rule's tolerance is narrower than a single image.
    """
    sel = a.selection
    if sel is None or not val_size or not math.isfinite(sel.best_se):
        return []
    step = 1.0 / val_size
    if sel.best_se >= step:
        return []
    best = a.variants.loc[a.variants["variant"] == sel.best, "val_acc_mean"].iloc[0]
    binomial = math.sqrt(max(best * (1 - best), 0.0) / val_size)
    return [
        f"- The standard error over seeds of the best variant ({100 * sel.best_se:.2f} pp) is "
        "smaller "
        f"than one validation image ({100 * step:.2f} pp of {val_size}); the validation set's "
        f"own sampling error is about {100 * binomial:.2f} pp (binomial). The rule may therefore "
        "separate variants that differ by a single image: treat the variants within "
        "about one validation image of the best as tied, or raise `val_size` or "
        "`within_se` (`[pick]`)."
    ]


def _caveats(a: Analysis, val_size: int = 0) -> list[str]:
    out = []
    n = a.variants.loc[a.variants["n_seeds"] > 0, "n_seeds"]
    if len(n) and n.min() < 3:
        out.append(
            f"- Some variants have only {int(n.min())} finished seed(s); their intervals are "
            "very wide or missing."
        )
    if a.n_missing:
        out.append(f"- {a.n_missing} planned trials have no result: see the list above.")
    diverged = a.variants.loc[a.variants["n_diverged"] > 0, "variant"].tolist()
    if diverged:
        out.append(
            f"- Training diverged on some seeds of {', '.join(diverged)}; the statistics use "
            "only the seeds that trained, so they flatter a plan that is unstable under this "
            "recipe."
        )
    out += _resolution_caveat(a, val_size)
    unclear = [name for name, c in a.comparisons.items() if c.too_few or c.p_value >= 0.05]
    if unclear:
        out.append(
            f"- At these seed counts, {len(unclear)} of {len(a.comparisons)} variants cannot be "
            "told apart from the baseline; more seeds narrow the intervals by about 1/√n."
        )
    return out + ([""] if out else [])


def _reproducing(meta: dict) -> list[str]:
    env = meta.get("environment", {})
    packages = ", ".join(f"{k} {v}" for k, v in env.get("packages", {}).items())
    return [
        "### Reproducing",
        "",
        f"- Command: `{meta.get('command') or 'kablate run ' + meta['source']}`",
        f"- Sweep file `{meta['source']}`"
        + (f" (SHA-256 `{meta['file_sha256'][:16]}…`)" if meta.get("file_sha256") else "")
        + (
            f"; resolved-sweep fingerprint `{meta['sweep_fingerprint']}` (plans, seeds, "
            "network, recipe, data, with includes merged)"
            if meta.get("sweep_fingerprint")
            else ""
        )
        + f"; definition fingerprint `{meta['fingerprint']}` (network, recipe and data only: "
        "it stays the same when seeds or plans are added). The resolved settings are in "
        "`sweep.json` beside `trials.csv` and `variants.csv`.",
        f"- Machine: {env.get('cpu', 'unknown CPU')}, {env.get('cores', '?')} cores; "
        f"{meta.get('workers')} worker(s) × {meta.get('threads')} thread(s); device "
        f"{meta.get('device', 'cpu')}; storage {meta.get('storage')}.",
        f"- Software: Python {env.get('python', '?')}; {packages}.",
        "",
    ]
