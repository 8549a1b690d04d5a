"""Load what the effective-receptive-field maps need from a results folder: the variant's
layout, its trained weights per seed, and the validation images. Anything missing is a
reason to skip the maps (said in the card), never an error."""

from __future__ import annotations

from pathlib import Path

import torch

from kablate.analysis.erf import ErfMap, effective_rf
from kablate.analysis.summary import Analysis
from kablate.errors import KablateError
from kablate.train.loop import CHECKPOINT, scored_state
from kablate.trials.results import ResultsFolder


def erf_maps(folder: ResultsFolder, analysis: Analysis, data: dict) -> tuple[list[ErfMap], str]:
    """Maps for the recommended plan and the baseline (one map if they are the same).

    Returns:
        The maps, and "" or the reason there are none (or no baseline map).
    """
    from kablate.costs.catalog import build_catalog
    from kablate.data.prepare import prepare_data
    from kablate.nets.build import build_network
    from kablate.spec.loader import sweep_from_dict

    if analysis.decision is None:
        return [], "there is no recommended plan yet to map"
    if folder.meta["resolved"].get("model"):
        return [], (
            "effective-receptive-field maps are drawn for kablate's own networks only (they "
            "cut the network before its head by kablate's own layer names)"
        )
    trials = analysis.trials
    done = trials[trials["status"] == "done"]
    # A decision needs the baseline's evidence, so both have finished trials here.
    names = list(dict.fromkeys([analysis.decision.recommended, analysis.baseline]))
    note = ""
    ids = dict(zip(analysis.variants["variant"], analysis.variants["variant_id"], strict=True))
    states = {
        name: scored_states(
            folder.path, ids[name], sorted(done.loc[done["variant"] == name, "seed"].astype(int))
        )
        for name in names
    }
    absent = [name for name, found in states.items() if not found]
    if absent:
        return [], (
            f"no checkpoints in {folder.path.name}/trials/ for {', '.join(absent)} (the "
            "trials may have been trained on another machine)"
        )
    try:
        sweep = sweep_from_dict(folder.meta["resolved"], Path(folder.meta["source"]))
        catalog = build_catalog(
            sweep, in_shape=tuple(folder.plan["in_shape"]), n_classes=folder.plan["n_classes"]
        )
        prepared = prepare_data(sweep.data)
    except (KablateError, OSError, ValueError) as exc:
        return [], f"the sweep's data could not be loaded here ({type(exc).__name__}: {exc})"
    if prepared.manifest()["indices_sha1"]["val"] != data["indices_sha1"]["val"]:
        return [], "the validation split loaded here differs from the one the sweep used"
    layouts = {cv.variant.id: cv.blueprint for cv in catalog.variants}
    maps = []
    for name in names:
        layout = layouts.get(ids[name])
        if layout is None:
            return [], f"variant {name} is no longer part of the sweep file's plans"
        maps.append(effective_rf(name, layout, states[name], prepared.val.images, build_network))
    return maps, note


def scored_states(results: Path, variant_id: str, seeds: list[int]) -> dict[int, dict]:
    """seed → the scored weights of each given (finished) trial whose checkpoint exists."""
    out = {}
    for seed in seeds:
        path = results / "trials" / f"{variant_id}-s{seed}" / CHECKPOINT
        if not path.is_file():
            continue
        try:
            saved = torch.load(path, map_location="cpu", weights_only=True)
        except Exception:  # a torn or foreign file: skip it, the others still count
            continue
        if isinstance(saved, dict) and (saved.get("best_state") or saved.get("model")):
            out[seed] = scored_state(saved)
    return out
