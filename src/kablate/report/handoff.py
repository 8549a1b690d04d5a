"""`kablate export`: write the recommended (or a named) variant of a results folder as a
handoff file (`kablate.nets.handoff`) the user can build in their own code, and, with
``--onnx``, as an ONNX file (`kablate.nets.onnx_file`).

The ONNX file carries fresh initial weights (``torch.manual_seed(0)``) unless ``--seed S``
names a trial whose checkpoint is in ``RESULTS/trials/<variant id>-s<S>/``: then it carries
the weights that trial was scored with. Fresh weights are the default because the sweep's
trials are short ablation runs, not the model to deploy: the file is for timing and for
checking the deployment path; the variant is meant to be retrained at full length.
"""

from __future__ import annotations

import json
from pathlib import Path

from kablate.errors import KablateError, UsageError, did_you_mean
from kablate.lifecycle import JobKey
from kablate.nets.handoff import HANDOFF_DIR, handoff_dict
from kablate.results.folder import ResultsFolder
from kablate.results.paths import VARIANTS_JSON, checkpoint_path
from kablate.results.write import atomic_write, write_json


def recommended_variant(folder: ResultsFolder) -> str:
    """The variant the folder's last report recommends.

    Raises:
        UsageError: there is no report yet, or it recommends nothing.
    """
    path = folder.path / VARIANTS_JSON  # written by the report: which variant it recommends
    try:
        rows = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        raise UsageError(
            f"{path} is missing or unreadable, so there is no recommended plan to export: run "
            f"kablate report {folder.path} first, or name one with --variant"
        ) from None
    picked = [row["variant"] for row in rows if row.get("recommended")]
    if not picked:
        raise UsageError(
            f"the last report of {folder.path} recommends no plan yet (too few finished "
            "trials): name one with --variant"
        )
    return picked[0]


def write_handoff(folder: ResultsFolder, variant: str | None = None, out: Path | None = None):
    """Write the handoff file of ``variant`` (default: the recommended one); return its path.

    Raises:
        UsageError: an unknown variant, or a sweep that cannot be rebuilt here.
    """
    sweep, catalog, item = find_variant(folder, variant)
    recommended = variant is None or _is_recommended(folder, item.name)
    handoff = handoff_dict(sweep, item, catalog.in_shape, catalog.n_classes, recommended)
    path = out or folder.path / HANDOFF_DIR / f"{item.name}.json"
    write_json(path, handoff)
    return path


def write_onnx_handoff(
    folder: ResultsFolder,
    variant: str | None = None,
    seed: int | None = None,
    out: Path | None = None,
) -> tuple[Path, str]:
    """Write ``out`` (default ``RESULTS/handoff/<variant>.onnx``): fresh initial weights, or
    those trial ``seed`` of the variant was scored with. Returns the path and what weights
    it carries.

    Raises:
        UsageError: the onnx extra is missing; no checkpoint of that seed; as `write_handoff`.
    """
    import torch

    from kablate.nets.build import build_network
    from kablate.nets.onnx_file import export_onnx, onnx_missing
    from kablate.results.checkpoint import scored_states

    missing = onnx_missing()
    if missing:
        raise UsageError(f"--onnx needs the onnx extra: {missing}")
    _, catalog, item = find_variant(folder, variant)
    torch.manual_seed(0)
    model = build_network(item.blueprint)
    weights = "fresh initial weights (torch.manual_seed(0)); --seed S loads a trial's"
    if seed is not None:
        states = scored_states(folder.path, item.variant.id, [seed])
        if seed not in states:
            where = checkpoint_path(folder.path, JobKey(item.variant.id, seed))
            raise UsageError(
                f"no readable checkpoint of {item.name} seed {seed} at {where}: name a seed "
                "that finished on this machine, or drop --seed for fresh weights"
            )
        model.load_state_dict(states[seed])
        weights = f"the weights trial {JobKey(item.variant.id, seed)} was scored with"
    path = out or folder.path / HANDOFF_DIR / f"{item.name}.onnx"
    data = export_onnx(model, catalog.in_shape)
    atomic_write(path, lambda fh: fh.write(data))  # whole or not at all
    return path, weights


def find_variant(folder: ResultsFolder, variant: str | None):
    """(sweep, catalog, costed variant) of ``variant`` (default: the recommended one), rebuilt
    from the folder's resolved sweep.

    Raises:
        UsageError: an unknown variant, or a sweep that cannot be rebuilt here.
    """
    from kablate.costs.catalog import build_catalog

    name = variant or recommended_variant(folder)
    try:
        sweep = folder.sweep()
        in_shape = tuple(folder.plan["in_shape"])
        catalog = build_catalog(sweep, in_shape=in_shape, n_classes=folder.plan["n_classes"])
    except KablateError as exc:
        raise UsageError(f"the sweep of {folder.path} cannot be rebuilt here: {exc}") from None
    names = {v.name: v for v in catalog.variants}
    names.update({alias: v for v in catalog.variants for alias in v.variant.aliases})
    if name not in names:
        hint = did_you_mean(name, list(names))
        raise UsageError(f"{folder.path} has no variant {name!r}{hint}")
    return sweep, catalog, names[name]


def _is_recommended(folder: ResultsFolder, name: str) -> bool:
    try:
        return recommended_variant(folder) == name
    except UsageError:
        return False
