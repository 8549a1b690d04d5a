"""Load the trained stem filters that the filter atlas describes, from a results folder.

Which variants: the baseline, the recommended plan, and every variant whose stem differs from
the baseline's (by the stem's layers in ``plan.json``: kernel, stride, dilation, groups). The
stem is the layout block ``stem`` of kablate's own network; in a ``[model]`` sweep it is the
model's first conv (the first conv layer of its traced graph, and the first 4-D weight of
its state dict, which must agree in shape).

Only a stem that is one dense conv is one bank of linear filters on the input. kablate's
other forms (stack, split, depthwise, bottleneck) put a norm and an activation between their
convs, so they compose no single filter: they are skipped, with that reason in the card.
Anything missing (checkpoints, layer lists) is a reason to skip, never an error.
"""

from __future__ import annotations

import numpy as np

from kablate.analysis.stem import StemAtlas, summarize_stems
from kablate.analysis.summary import Analysis
from kablate.lifecycle import DONE
from kablate.results.checkpoint import scored_states
from kablate.results.folder import ResultsFolder

GROUPED = "its first conv is grouped (each filter sees only some input channels)"
NOT_LINEAR = "its stem is {n} convs with a norm and an activation between them: no single filter"


def stem_layers(entry: dict, own_network: bool) -> list[dict]:
    """The stem's conv layers of one ``plan.json`` variant (its first conv for a user model)."""
    convs = [layer for layer in entry.get("layers", []) if layer["kind"] == "conv"]
    if own_network:
        return [c for c in convs if under(c["name"], "stem")]
    for path in entry.get("rewrites", {}):  # a rewritten first conv: every conv it became
        if convs and under(convs[0]["name"], path):
            return [c for c in convs if under(c["name"], path)]
    return convs[:1]


def under(name: str, path: str) -> bool:
    """Whether the layer ``name`` is the module ``path`` or inside it."""
    return name == path or name.startswith(path + ".")


def stem_key(layers: list[dict]) -> tuple:
    """What makes two stems the same filter bank (names aside)."""
    fields = ("in_ch", "out_ch", "kernel", "stride", "dilation", "groups")
    return tuple(tuple(str(layer[f]) for f in fields) for layer in layers)


def stem_label(layer: dict) -> str:
    """'7×7/2', '5×5', '3×3 d2': kernel, then stride and dilation when not 1."""
    kh, kw = layer["kernel"]
    label = f"{kh}×{kw}"
    if max(layer["stride"]) > 1:
        label += f"/{layer['stride'][0]}"
    if max(layer["dilation"]) > 1:
        label += f" d{layer['dilation'][0]}"
    return label


def first_conv_weight(state: dict, layer: dict) -> np.ndarray | None:
    """The weight of the given conv: by its module path (a user model), else the first 4-D
    tensor of the state dict (the first conv in module order); None when its shape is not the
    layer's."""
    expected = (layer["out_ch"], layer["in_ch"] // layer["groups"], *layer["kernel"])
    named = state.get(f"{layer['name']}.weight")  # a user model's conv, by its module path
    candidates = [named] if named is not None else state.values()
    for value in candidates:
        if getattr(value, "ndim", 0) == 4:
            weight = value.detach().cpu().float().numpy()
            return weight if tuple(weight.shape) == expected else None
    return None


def chosen_variants(analysis: Analysis, entries: dict[str, dict], own: bool) -> dict[str, str]:
    """variant → role: the baseline, the recommended plan, and every variant whose stem differs
    from the baseline's, in plan order."""
    rec, base = analysis.recommended, analysis.baseline
    base_key = stem_key(stem_layers(entries[base], own))
    if rec not in entries:
        rec = None
    roles = {base: "recommended and baseline" if rec == base else "baseline"}
    if rec is not None and rec != base:
        roles[rec] = "recommended"
    for name, entry in entries.items():
        if name not in roles and stem_key(stem_layers(entry, own)) != base_key:
            roles[name] = ""
    return dict(sorted(roles.items(), key=lambda item: list(entries).index(item[0])))


def stem_atlas(folder: ResultsFolder, analysis: Analysis) -> tuple[StemAtlas | None, str]:
    """The filter atlas of the chosen variants' stems, and "" or why there is none."""
    own = not folder.meta["resolved"].get("model")
    entries = {entry["name"]: entry for entry in folder.plan["variants"]}
    if analysis.baseline not in entries or "layers" not in entries[analysis.baseline]:
        return None, "plan.json lists no layers for the baseline"
    trials = analysis.trials
    done = trials[trials["status"] == DONE]
    weights, labels, skipped = {}, {}, []
    for name, role in chosen_variants(analysis, entries, own).items():
        layers = stem_layers(entries[name], own)
        if len(layers) != 1 or layers[0]["groups"] != 1:
            why = NOT_LINEAR.format(n=len(layers)) if len(layers) > 1 else GROUPED
            why = why if layers else "plan.json lists no conv for it"
            skipped.append((name, why))
            continue
        seeds = sorted(done.loc[done["variant"] == name, "seed"].astype(int))
        states = scored_states(folder.path, entries[name]["id"], seeds)
        found = {seed: first_conv_weight(state, layers[0]) for seed, state in states.items()}
        found = {seed: w for seed, w in found.items() if w is not None}
        if not found:
            why = (
                f"no checkpoint in {folder.path.name}/trials/ holds its first conv (the trials "
                "may have been trained on another machine, or not finished)"
            )
            skipped.append((name, why))
            continue
        weights[name], labels[name] = found, (role, stem_label(layers[0]))
    if not weights:
        reasons = "; ".join(f"{name}: {why}" for name, why in skipped)
        return None, reasons or "no variant's stem could be read"
    atlas = summarize_stems(weights, labels)
    atlas.skipped = skipped
    return atlas, ""
