"""What a results folder records about its sweep, and the check that a rerun is the same sweep.

A rerun may add seeds or plans (only the new trials run). It may not change the definition of
existing variants: the network, the recipe or the data. Those are fingerprinted when the sweep
first starts and compared on every later start.
"""

from __future__ import annotations

import hashlib
import json
from typing import Any

import optuna

from kablate.errors import UsageError
from kablate.spec.schema import SweepSpec

DEFINITION_ATTR = "definition"
FIXED_PARTS = ("network", "recipe", "data")


def fingerprint(value: Any) -> str:
    """A short, stable hash of JSON-able settings."""
    text = json.dumps(value, sort_keys=True, default=str)
    return hashlib.sha1(text.encode()).hexdigest()[:12]


def definition(sweep: SweepSpec) -> dict:
    """The fixed parts of a sweep, resolved (includes merged)."""
    raw = sweep.raw
    out = {part: raw.get(part, {}) for part in FIXED_PARTS}
    if "model" in raw:  # only then, so folders of kablate's own networks keep their hash
        out["model"] = raw["model"]
    return out


def flat_diff(old: Any, new: Any, prefix: str = "") -> list[str]:
    """Human-readable differences between two TOML-like values."""
    if isinstance(old, dict) and isinstance(new, dict):
        out = []
        for key in sorted(set(old) | set(new)):
            out += flat_diff(old.get(key), new.get(key), f"{prefix}.{key}" if prefix else key)
        return out
    return [] if old == new else [f"{prefix}: {json.dumps(old)} → {json.dumps(new)}"]


def check_definition(study: optuna.Study, sweep: SweepSpec) -> None:
    """Record the sweep's definition on first start; refuse a changed one later.

    Raises:
        UsageError: the network, recipe or data differ from the ones the sweep started with.
    """
    current = definition(sweep)
    stored = study.user_attrs.get(DEFINITION_ATTR)
    if stored is None:
        study.set_user_attr(DEFINITION_ATTR, json.loads(json.dumps(current, default=str)))
        return
    changes = flat_diff(stored, json.loads(json.dumps(current, default=str)))
    if changes:
        listed = "\n  ".join(changes[:12])
        raise UsageError(
            f"{sweep.source} changed the definition of sweep {sweep.name} since it started, so "
            f"its finished trials would no longer compare with new ones:\n  {listed}\n"
            "Adding seeds or plans is fine; to change the network, recipe or data, give the "
            "sweep a new [sweep].name (or delete its results folder and storage)."
        )
