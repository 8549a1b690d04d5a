"""`kablate export`: write the recommended (or a named) variant of a results folder as a
handoff file (`kablate.nets.handoff`) the user can build in their own code."""

from __future__ import annotations

import json
from pathlib import Path

from kablate.errors import KablateError, UsageError, did_you_mean
from kablate.nets.handoff import HANDOFF_DIR, handoff_dict
from kablate.trials.meta import write_json
from kablate.trials.results import ResultsFolder

VARIANTS_FILE = "variants.json"  # written by the report: which variant it recommends


def recommended_variant(folder: ResultsFolder) -> str:
    """The variant the folder's last report recommends.

    Raises:
        UsageError: there is no report yet, or it recommends nothing.
    """
    path = folder.path / VARIANTS_FILE
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
    from kablate.costs.catalog import build_catalog
    from kablate.spec.loader import sweep_from_dict

    name = variant or recommended_variant(folder)
    try:
        sweep = sweep_from_dict(folder.meta["resolved"], Path(folder.meta["source"]))
        in_shape = tuple(folder.plan["in_shape"])
        catalog = build_catalog(sweep, in_shape=in_shape, n_classes=folder.plan["n_classes"])
    except KablateError as exc:
        raise UsageError(f"the sweep of {folder.path} cannot be rebuilt here: {exc}") from None
    names = {v.name: v for v in catalog.variants}
    names.update({alias: v for v in catalog.variants for alias in v.variant.aliases})
    if name not in names:
        hint = did_you_mean(name, list(names))
        raise UsageError(f"{folder.path} has no variant {name!r}{hint}")
    item = names[name]
    recommended = variant is None or _is_recommended(folder, item.name)
    handoff = handoff_dict(sweep, item, in_shape, catalog.n_classes, recommended)
    path = out or folder.path / HANDOFF_DIR / f"{item.name}.json"
    write_json(path, handoff)
    return path


def _is_recommended(folder: ResultsFolder, name: str) -> bool:
    try:
        return recommended_variant(folder) == name
    except UsageError:
        return False
