"""The card's tables: the variants against the baseline, test accuracy and per-class
accuracy. Only words and layout: every number comes from the `Analysis`."""

from __future__ import annotations

import math

import pandas as pd

from kablate.analysis.classes import per_class_accuracy
from kablate.analysis.summary import Analysis
from kablate.costs.latency import NOISY_IQR_RATIO, Timing
from kablate.costs.plan_output import human
from kablate.report.verdict import cost_ratio, pct, pp
from kablate.spec.costs import COSTS, Cost


def flag(value) -> bool:
    """A front flag: True, False, or None/NaN where that front was not computed."""
    return (
        value is not None and not (isinstance(value, float) and math.isnan(value)) and bool(value)
    )


def ci(low: float, high: float) -> str:
    """A 95% CI of an accuracy, clipped to [0%, 100%] for display (the CSV keeps raw limits)."""
    if not (math.isfinite(low) and math.isfinite(high)):
        return "n/a"
    return f"[{pct(max(low, 0.0))}, {pct(min(high, 1.0))}]"


def variant_cells(a: Analysis, name: str) -> list[str]:
    """Accuracy, difference, lower bound, Holm p, cost, within margin, picked share."""
    d = a.decision
    acc = d.accuracy.get(name) if d else None
    if acc is None:
        return [stopped_text(a, name) or "not compared yet"] + ["-"] * 6
    c = d.contrasts.get(name)
    return [
        f"{pct(acc.mean)} {ci(acc.low, acc.high)}",
        "-" if c is None else f"{pp(c.diff)} [{pp(c.low)}, {pp(c.high)}]",
        "-" if c is None else pp(c.lower_bound),
        "-" if c is None else f"{c.p_holm:.3g}",
        cost_ratio(a, name),
        within_margin(a, name),
        f"{100 * d.pick_share.get(name, 0):.0f}%",
    ]


def stopped_text(a: Analysis, name: str) -> str:
    """'stopped early by epoch 2: last val acc 81.33% (mean of 1 seed); not compared' for a
    variant that successive halving stopped (never compared, never recommended), else ''."""
    v = a.variants
    if "n_stopped" not in v:
        return ""
    row = v[v["variant"] == name].iloc[0]
    if not row["n_stopped"]:
        return ""
    n = int(row["n_stopped"])
    return (
        f"stopped early by epoch {int(row['stopped_epoch'])}: last val acc "
        f"{pct(row['stopped_val_acc'])} (mean of {n} seed{'s' if n != 1 else ''}); not compared"
    )


def within_margin(a: Analysis, name: str) -> str:
    """yes/no for the plans the rule accepts; under the margin rule a costlier plan is marked
    as not eligible. Under the one-se rule: within the tolerance of the best plan."""
    d = a.decision
    if d.rule == "one-se":
        return "yes" if name in d.qualifying else "no"
    c = d.contrasts.get(name)
    if c is None:
        return "-"
    word = "yes" if c.lower_bound > -d.margin else "no"
    return (
        word
        if float(a.variants.set_index("variant").loc[name, "cost_ratio"]) < 1
        else (f"{word} (costlier: not eligible)")
    )


def variant_table(a: Analysis, cost_label: str) -> list[str]:
    v = a.variants.sort_values(["macs", "variant"])
    accepted = "within tolerance" if a.decision and a.decision.rule == "one-se" else "within margin"
    lines = [
        "#### Variants against the baseline",
        "",
        "Sorted by MACs. Validation accuracy over every (seed, image) pair with its 95% "
        f"bootstrap interval; *difference* is plan − baseline ({a.baseline}), paired on seeds "
        "and images; *lower bound* is its one-sided 95% lower bound; *p (Holm)* tests "
        '"no difference", adjusted over the comparisons; *picked* is how often the rule picks '
        "the plan in a bootstrap resample; *front* names the costs on whose Pareto front "
        "(accuracy up, cost down; on point estimates) the plan lies.",
        "",
        f"| variant | kernel plan | val acc [95% CI] | difference [95% CI] | lower bound | "
        f"p (Holm) | {cost_label} (× baseline) | {accepted} | picked | front | warnings |",
        "|---|---|---|---|---:|---:|---:|---|---:|---|---|",
    ]
    fronts = [(c.label, c.front) for c in COSTS.values()]
    for row in v.itertuples():
        marks = []
        if row.recommended:
            marks.append("**recommended**")
        if row.variant == a.baseline:
            marks.append("baseline")
        name = row.variant + (f" ({', '.join(marks)})" if marks else "")
        on = [label for label, col in fronts if flag(getattr(row, col))]
        warn = "; ".join(a.flags.get(row.variant, [])) or "-"
        cells = " | ".join(variant_cells(a, row.variant))
        lines.append(f"| {name} | `{row.plan}` | {cells} | {', '.join(on) or '-'} | {warn} |")
    return lines + [""]


def memory_table(a: Analysis, batch_size: int) -> list[str]:
    """Activation memory of a training step and the weights' bytes at fp32 and int8, per
    variant, cheapest activation memory first; empty for a plan that does not record it."""
    v = a.variants
    if v["act_mem_bytes"].isna().any():
        return []
    v = v.sort_values(["act_mem_bytes", "variant"])
    base = float(v.set_index("variant").loc[a.baseline, "act_mem_bytes"])
    inference = pd.to_numeric(v["infer_mem_bytes"], errors="coerce").notna().all()
    lines = [
        "#### Memory",
        "",
        f"*Activations* are the bytes one training step at batch {batch_size} keeps from the "
        "forward pass for backward (what PyTorch's autograd saves, counted before training; × "
        "baseline in brackets). "
        + (
            "*At inference* is the peak of activation bytes alive at once in one eval-mode "
            "forward pass at batch 1, the input included (measured with the latency, on the "
            "operators torch runs). "
            if inference
            else ""
        )
        + "*Weights* are the parameters × 4 bytes (fp32, as trained) and × 1 byte "
        "(int8 after quantization; its scales and zero points not counted).",
        "",
        "| variant | activations per training step | "
        + ("at inference, batch 1 | " if inference else "")
        + "weights fp32 | weights int8 |",
        "|---|---:|---:|---:|" + ("---:|" if inference else ""),
    ]
    for row in v.itertuples():
        peak = f"{human(row.infer_mem_bytes)}B | " if inference else ""
        lines.append(
            f"| {row.variant} | {human(row.act_mem_bytes)}B ({row.act_mem_bytes / base:.2f}×) | "
            f"{peak}{human(row.weight_bytes_fp32)}B | {human(row.weight_bytes_int8)}B |"
        )
    return lines + [""]


def _timing(row, cost: Cost, batch: bool) -> str:
    """'0.48 [0.45, 0.52]' from a variant row's fields of the timed ``cost`` at batch 1 or at
    the latency batch size; '!' marks a noisy timing, '-' a missing one."""
    median = getattr(row, cost.timing(batch=batch))
    if pd.isna(median):
        return "-"
    q1, q3 = getattr(row, cost.timing("q1", batch)), getattr(row, cost.timing("q3", batch))
    timing = Timing(median, q1, q3, 0)
    return timing.text() + (" !" if timing.noisy else "")


def latency_table(a: Analysis) -> list[str]:
    """CPU latency under torch and, beside it, ONNX Runtime (or why it is absent), each a
    median with its interquartile range; empty when latency was not measured."""
    timed = COSTS["latency"], COSTS["ort_latency"]  # the table's columns: torch's, then ORT's
    torch_ms, ort_ms = (cost.column for cost in timed)
    v = a.variants
    if v[torch_ms].isna().all():
        return []
    v = v.sort_values([torch_ms, "variant"])
    first = v.iloc[0]
    if pd.isna(first["latency_batch_size"]):  # a plan from before the statistic
        return []
    batch = int(first["latency_batch_size"])
    ort = v[v[ort_ms].notna()]
    if len(ort):
        beside = (
            f" ONNX Runtime {ort.iloc[0]['onnxruntime_version']} ran the network exported to "
            "ONNX in the same rounds, threads and inputs; *ORT × torch* is the ratio of the "
            "medians at batch 1."
        )
    else:
        reason = next((r for r in v["ort_absent"] if isinstance(r, str) and r), "not measured")
        beside = f" ONNX Runtime latency is absent: {reason}."
    lines = [
        "#### Latency",
        "",
        f"Milliseconds on the CPU, median [interquartile range] of {int(first['latency_rounds'])} "
        f"interleaved rounds at batch 1 and fewer at batch {batch}; eval mode, "
        f"{int(first['latency_threads'])} thread(s), torch {first['latency_torch']}.{beside} "
        f"! marks a noisy timing (interquartile range above {NOISY_IQR_RATIO:.0%} of the "
        "median): compare those on a quiet machine.",
        "",
        f"| variant | torch @1 | torch @{batch} | ONNX Runtime @1 | ONNX Runtime @{batch} | "
        "ORT × torch |",
        "|---|---:|---:|---:|---:|---:|",
    ]
    for row in v.itertuples():
        cells = [_timing(row, cost, batch) for cost in timed for batch in (False, True)]
        ort, torch = getattr(row, ort_ms), getattr(row, torch_ms)
        shown = f"{ort / torch:.2f}" if pd.notna(ort) else "-"
        lines.append(f"| {row.variant} | {' | '.join(cells)} | {shown} |")
    return lines + [""]


def test_table(a: Analysis) -> list[str]:
    v = a.variants[a.variants["n_seeds"] > 0].sort_values(["macs", "variant"])
    lines = [
        "#### Held-out test accuracy (reported, not used to choose)",
        "",
        "Over every (seed, test image) pair, with the same paired two-level bootstrap as "
        "validation.",
        "",
        "| variant | test acc [95% CI] | seeds |",
        "|---|---|---:|",
    ]
    for row in v.itertuples():
        lines.append(
            f"| {row.variant} | {pct(row.test_acc_mean)} "
            f"{ci(row.test_acc_ci_low, row.test_acc_ci_high)} | {row.test_acc_n} |"
        )
    return lines + [""]


def class_table(a: Analysis) -> list[str]:
    """Per-class validation accuracy of the recommended plan and the baseline."""
    d = a.decision
    if d is None or a.evidence is None:
        return []
    names = list(dict.fromkeys([d.recommended, d.baseline]))
    table = per_class_accuracy(a.evidence, names, a.classes)
    lines = [
        "#### Per-class validation accuracy",
        "",
        f"Pooled over {len(a.evidence.seeds)} seed(s) of the recommended plan and the baseline.",
        "",
        f"| class | images | {' | '.join(names)} |",
        "|---|---:|" + "---:|" * len(names),
    ]
    for _, row in table.iterrows():
        accs = " | ".join(pct(row[n]) for n in names)
        lines.append(f"| {row['class']} | {row['n_images']} | {accs} |")
    return lines + [""]
