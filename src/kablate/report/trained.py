"""Load what the effective-receptive-field maps need from a results folder: the variant's
layout, its trained weights per seed, and the validation images. Anything missing is a
reason to skip the maps (said in the card), never an error."""

from __future__ import annotations

from kablate.analysis.erf import ErfMap, effective_rf
from kablate.analysis.summary import Analysis
from kablate.errors import KablateError
from kablate.lifecycle import DONE
from kablate.results.checkpoint import scored_states
from kablate.results.data_record import DataRecord
from kablate.results.folder import ResultsFolder
from kablate.results.paths import TRIALS_DIR


def erf_maps(
    folder: ResultsFolder, analysis: Analysis, data: DataRecord
) -> tuple[list[ErfMap], str]:
    """Maps for the recommended plan and the baseline (one map if they are the same).

    Returns:
        The maps, and "" or the reason there are none (or no baseline map).
    """
    from kablate.costs.catalog import build_catalog
    from kablate.data.prepare import prepare_data
    from kablate.nets.build import build_network

    if analysis.decision is None:
        return [], "there is no recommended plan yet to map"
    if folder.meta["resolved"].get("model"):
        return [], (
            "effective-receptive-field maps are drawn for kablate's own networks only (they "
            "cut the network before its head by kablate's own layer names)"
        )
    trials = analysis.trials
    done = trials[trials["status"] == DONE]
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
            f"no checkpoints in {folder.path.name}/{TRIALS_DIR}/ for {', '.join(absent)} (the "
            "trials may have been trained on another machine)"
        )
    try:
        sweep = folder.sweep()
        catalog = build_catalog(
            sweep, in_shape=tuple(folder.plan["in_shape"]), n_classes=folder.plan["n_classes"]
        )
        prepared = prepare_data(sweep.data)
    except (KablateError, OSError, ValueError) as exc:
        return [], f"the sweep's data could not be loaded here ({type(exc).__name__}: {exc})"
    if prepared.manifest()["indices_sha1"]["val"] != data.indices_sha1["val"]:
        return [], "the validation split loaded here differs from the one the sweep used"
    layouts = {cv.variant.id: cv.blueprint for cv in catalog.variants}
    maps = []
    for name in names:
        layout = layouts.get(ids[name])
        if layout is None:
            return [], f"variant {name} is no longer part of the sweep file's plans"
        maps.append(effective_rf(name, layout, states[name], prepared.val.images, build_network))
    return maps, note
