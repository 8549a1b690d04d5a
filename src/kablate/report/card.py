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
from kablate.costs.plan_output import human
from kablate.lifecycle import DIVERGED, DONE, RETIRED, STOPPED
from kablate.plans.expand import read_plan_text
from kablate.plans.grammar import KernelSpecError, parse_kernel
from kablate.report.halving import halving_section
from kablate.report.race import race_section
from kablate.report.search import search_section
from kablate.report.search_plots import HYPERVOLUME_PLOT
from kablate.report.stem_card import stem_section
from kablate.report.tables import (
    ci,
    class_table,
    latency_table,
    memory_table,
    test_table,
    variant_table,
)
from kablate.report.verdict import (
    cost_ratio,
    diff_prose,
    headline,
    pct,
    rule_sentence,
)
from kablate.results.data_record import DataRecord
from kablate.spec.costs import COSTS
from kablate.spec.fields import Where, read_table
from kablate.spec.schema import NetworkSpec, RecipeSpec

LATENCY = COSTS["latency"].column  # the median at batch 1 the card quotes

STAMP_PREFIX = "Generated "
CAUTION = (
    "These results come from short CPU training runs, often on subsets of the data, with a "
    "few seeds. They are evidence for choosing between kernel plans under identical "
    "conditions, not a measurement of how the chosen network will perform once deployed. The "
    "intervals count two sources of chance, the seeds and the particular validation images "
    "(a paired two-level bootstrap); they do not count a change of recipe, data distribution "
    "or hardware, and with 2 or 3 seeds a bootstrap over seeds tends to be too narrow. "
    "Do not use this section as a deployment sign-off, and do not use it for a "
    "safety-related application without a full evaluation of the final model under the rules "
    "that apply to that use."
)
PLOT_CAPTIONS = {
    **{
        cost.plot: f"Validation accuracy (95% bootstrap interval) against {cost.prose}; the band "
        "runs from the baseline's accuracy down by the margin; hollow markers cannot be told "
        "apart from the baseline"
        for cost in COSTS.values()
    },
    "rf_vs_accuracy": "Validation accuracy (95% bootstrap interval) against the theoretical "
    "receptive field; hollow markers cannot be told apart from the baseline",
    "learning_curves": "Validation accuracy per epoch (mean over seeds; band: min–max)",
    "grid_heatmap": "Validation accuracy over the two-axis grid, ± the half-width of each "
    "cell's 95% bootstrap interval; the colour scale spans at least one typical interval, so "
    "cells that differ by less than the noise look alike",
    "effective_rf": "Effective receptive field of the recommended plan and the baseline",
    "stem_atlas": "The stem's trained filters (first seed), each scaled to its own largest "
    "weight (mid-grey is zero), one tile pixel per kernel pixel in every panel; dead and "
    "near-duplicate filters framed",
    "stem_spectrum": "Radially averaged power spectrum of the stem's filters (mean over live "
    "filters and seeds) and their energy per frequency band (95% interval over seeds)",
    HYPERVOLUME_PLOT: "Hypervolume of the plans the search trained (one seed) after each plan, "
    "with its reference point; a flat stretch is plans that did not move the front",
    "confusion": "Confusion matrices of the recommended plan and the baseline on the validation "
    "images, pooled over seeds",
}


@dataclass(frozen=True)
class CardContext:
    """What the card says about where the numbers came from (all from the results folder)."""

    meta: dict  # sweep.json
    data: DataRecord  # data.json
    version: str  # kablate's version writing the card
    plots: tuple[str, ...]  # PNG file names, relative to the card
    cost_label: str  # "MACs", "params" or "latency"


def n_seeds(n: int) -> str:
    return f"{n} seed" if n == 1 else f"{n} seeds"


def ci_prose(row, metric: str = "val_acc") -> str:
    """A variant's 95% CI for running text: the interval, or why there is none."""
    if not math.isfinite(row[f"{metric}_ci_low"]):  # fewer than two seeds
        return "(one seed: no interval)"
    return ci(row[f"{metric}_ci_low"], row[f"{metric}_ci_high"])


def resolved_table(meta: dict, cls: type, key: str):
    """Table ``key`` of the sweep as it ran, as a ``cls``, defaults filled in: the resolved TOML
    holds only what the file wrote, and the card never restates the schema's defaults."""
    raw = meta["resolved"].get(key, {})
    return read_table(cls, raw, Where(meta.get("source", "sweep.json"), key))


def recipe_of(meta: dict) -> RecipeSpec:
    """The recipe the sweep ran, defaults filled in."""
    return resolved_table(meta, RecipeSpec, "recipe")


def scored_weights(recipe: RecipeSpec) -> str:
    if recipe.test_from == "best":
        return "the epoch with the best accuracy on the early-stopping fold"
    return "the last epoch's"


def render_card(a: Analysis, ctx: CardContext, now: datetime | None = None) -> str:
    """The Markdown text of the model-card section."""
    meta = ctx.meta
    stamp = (now or datetime.now(UTC)).strftime("%Y-%m-%d %H:%M UTC")
    out = [
        f"## Kernel-size ablation: {meta['name']}",
        "",
        f"{STAMP_PREFIX}{stamp} by kablate {ctx.version}.",
        "",
        *headline(a, ctx.cost_label),
        *_details(a, ctx),
        *_data_sections(ctx.data),
        "### Quantitative analyses",
        "",
        *_recommendation(a, ctx),
        *variant_table(a, ctx.cost_label),
        *memory_table(a, recipe_of(meta).batch_size),
        *latency_table(a),
        *test_table(a),
        *class_table(a),
        *_erf_section(a),
        *stem_section(a.stem, a.stem_note),
        *_partial(a),
        *race_section(a),
        *halving_section(a),
        *search_section(a.search),
        *_plots(ctx.plots),
        "### Caveats and recommendations",
        "",
        CAUTION,
        "",
        *_caveats(a),
        *_reproducing(meta),
    ]
    return "\n".join(out)


def _sets_stem_stride(plans) -> bool:
    """Whether a plan (as `plan_text` wrote it) gives the stem its own stride ("11s4")."""
    specs = [spec for text in plans for spec in read_plan_text(str(text)).values()]
    try:
        return any(parse_kernel(spec).stride for spec in specs)
    except KernelSpecError:  # not a plan kablate wrote: say nothing about strides
        return False


def _network_line(meta: dict, n_variants: int, strided: bool = False) -> str:
    """What the plans rewrite: kablate's own compact CNN, or the user's model; ``strided``:
    some plan also sets the stem's (or the first conv's) stride."""
    differ = "kernel sizes and the stem's stride" if strided else "kernel sizes"
    model = meta["resolved"].get("model")
    if model is not None:
        arguments = ", ".join(f"{k} = {v!r}" for k, v in model.get("arguments", {}).items())
        return (
            f"- Your model, built by `{model['factory']}({arguments})` without pretrained "
            f"weights, in {n_variants} kernel plans that rewrite some of its Conv2d layers "
            + (
                "(shapes kept, except after a first conv given a new stride"
                if strided
                else "(shapes kept"
            )
            + "; see `kablate plan` for each rewrite and its initialisation)."
        )
    network: NetworkSpec = resolved_table(meta, NetworkSpec, "network")
    stages = network.stages
    return (
        f"- A compact CNN (stem of {network.stem.out_ch} channels, "
        f"{len(stages)} stages of "
        f"{', '.join(str(s.out_ch) for s in stages) or 'no'} channels, "
        f"{network.norm} norm, {network.act}; a global average "
        "pool and a linear head), in "
        f"{n_variants} kernel plans that differ only in their {differ}."
    )


def _details(a: Analysis, ctx: CardContext) -> list[str]:
    meta = ctx.meta
    recipe = recipe_of(meta)
    out = [
        "### Model details",
        "",
        _network_line(meta, len(a.variants), _sets_stem_stride(a.variants["plan"])),
        f"- Sweep `{meta['name']}` from `{meta['source']}`, definition fingerprint "
        f"`{meta['fingerprint']}` (a hash of the resolved network or model, recipe and data "
        "settings; see Reproducing for the whole sweep's).",
        f"- Each plan trained once per seed ({', '.join(map(str, meta['seeds']))}) under one "
        f"recipe: {recipe.epochs} epochs, batch {recipe.batch_size}, "
        f"{recipe.optimizer} at peak lr {recipe.lr:g}, "
        f"{recipe.schedule} schedule, on {meta.get('device', 'cpu')}.",
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
        "- Selection metric: validation accuracy of each trial's scored weights ("
        + scored_weights(recipe)
        + "), over every (seed, image) pair. Test accuracy is reported separately and is "
        "never used to choose.",
        "- Costs, counted before training: parameters; MACs (multiply-accumulates of conv and "
        "linear layers, FLOPs = 2 × MACs); the theoretical receptive field at the head "
        "(Araujo, Norris & Sim 2019)"
        + ("; CPU latency at batch 1." if a.variants[LATENCY].notna().any() else "."),
        "- Uncertainty: every trial keeps the class it predicted for every validation and test "
        "image (`predictions.csv.gz`). Intervals come from a paired two-level bootstrap that "
        "resamples seeds, then images, with the same draw for every plan (Bouthillier et al. "
        "2021), 95% percentile intervals, never narrower than the exact binomial interval "
        "(Clopper–Pearson) of one seed's images. Comparisons with the baseline are paired on "
        "seeds and images; their p-values are Holm-adjusted over the comparisons (Holm 1979), "
        "and a one-seed comparison uses the exact McNemar test.",
        "",
    ]
    return out


def _data_sections(data: DataRecord) -> list[str]:
    sizes, sha = data.sizes, data.indices_sha1
    c, h, w = data.in_shape
    return [
        "### Training data",
        "",
        f"- Source `{data.source}`: {sizes['train']} training images ({c}×{h}×{w}, "
        f"{data.n_classes} classes), a fixed-seed, class-balanced subset; normalisation "
        "statistics from the training images only.",
        f"- Split index digest: train `{sha['train']}` (SHA-1 prefix; the full index lists are "
        "in `data.json`).",
        "",
        "### Evaluation data",
        "",
        f"- Validation: {sizes['val']} images from the training pool, class-balanced "
        f"(`{sha['val']}`); the only data model selection looks at.",
        *(
            [
                f"- Early-stopping fold: {sizes['stop']} images from the training pool "
                f"(`{sha['stop']}`), on which each trial chose the epoch it is scored with."
            ]
            if "stop" in sizes
            else []
        ),
        f"- Test: {sizes['test']} images, {data.test_pool} (`{sha['test']}`); reported, "
        "never used to choose.",
        "",
    ]


def _recommendation(a: Analysis, ctx: CardContext) -> list[str]:
    d = a.decision
    if d is None:
        return []
    rec = a.variants.set_index("variant").loc[d.recommended]
    ms = rec[LATENCY]
    latency = f", {ms:.3g} ms" if math.isfinite(ms) else ""
    acc = d.accuracy[d.recommended]
    out = [
        "#### Recommended plan",
        "",
        f"**{d.recommended}** (`{rec['plan']}`)"
        + (" (the baseline)" if d.keeps_baseline else "")
        + f": {human(rec['macs'])} MACs, {human(rec['params'])} params, receptive field "
        f"{rec['rf']} px{latency}. Validation accuracy {pct(acc.mean)} "
        f"{ci(acc.low, acc.high)}: {acc.n_correct} of {acc.n_scored} (seed, image) pairs.",
        "",
        f"Rule: {rule_sentence(d, ctx.cost_label)}. Plans that qualified: "
        f"{', '.join(d.qualifying) or 'none'}.",
        "",
    ]
    if d.worth_cost:
        out += [
            "**Worth its cost?** These plans cost more than the baseline and are shown better "
            "than it (one-sided 95% lower bound above zero). The rule never picks them; weigh "
            "the gain against the cost yourself:",
            "",
        ]
        out += [
            f"- {n}: {diff_prose(d.contrasts[n])}; {cost_ratio(a, n)} {ctx.cost_label} "
            "(× the baseline's)."
            for n in d.worth_cost
        ]
        out.append("")
    tc = a.test_contrast
    test = (
        f"Held-out test accuracy of {d.recommended}, reported separately: "
        f"{pct(rec['test_acc_mean'])} {ci_prose(rec, 'test_acc')}"
    )
    if tc is not None:
        test += f"; against the baseline on the test images: {diff_prose(tc)}"
    return out + [test + ".", ""]


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
    # racing and successive halving have their own sections
    waiting = ~t["status"].isin((DONE, RETIRED, STOPPED))
    left_out = t.loc[waiting | held, ["variant", "seed", "status"]].copy()
    if not len(left_out):
        return []
    left_out.loc[held[held].index, "status"] = "done, held back"
    n_missing = len(a.missing)
    n_diverged = int((left_out["status"] == DIVERGED).sum())
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


def _caveats(a: Analysis) -> list[str]:
    out = []
    n = a.variants.loc[a.variants["n_seeds"] > 0, "n_seeds"]
    if len(n) and n.min() < 3:
        out.append(
            f"- Some variants have only {int(n.min())} finished seed(s): the seed level of the "
            "bootstrap has almost nothing to resample, so their intervals mostly reflect the "
            "validation images."
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
    for name, found in a.flags.items():
        if found:
            out.append(f"- {name}: {'; '.join(found)}.")
    d = a.decision
    if d is not None and d.contrasts:
        unclear = [n for n, c in d.contrasts.items() if c.p_holm >= 0.05]
        if unclear:
            out.append(
                f"- {len(unclear)} of {len(d.contrasts)} variants cannot be told apart from the "
                'baseline after Holm\'s adjustment; "not told apart" is not "equal": see what '
                "the sweep could resolve, in the first paragraph."
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
        + f"; definition fingerprint `{meta['fingerprint']}` (network or model, recipe and data "
        "only: it stays the same when seeds or plans are added). The resolved settings are in "
        "`sweep.json` beside `trials.csv` and `variants.csv`.",
        f"- Machine: {env.get('cpu', 'unknown CPU')}, {env.get('cores', '?')} cores; "
        f"{meta.get('workers')} worker(s) × {meta.get('threads')} thread(s); device "
        f"{meta.get('device', 'cpu')}; storage {meta.get('storage')}.",
        f"- Software: Python {env.get('python', '?')}; {packages}.",
        "",
    ]
