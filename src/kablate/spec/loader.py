"""Read a sweep file (TOML) and the configs it includes into a `SweepSpec`.

Includes: the ``network`` and ``recipe`` tables may say ``from = "configs/..."``. The included
file is read first and validated on its own (so its errors name it); keys written inline in
the sweep then override it, table by table.
"""

from __future__ import annotations

import math
import re
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

from kablate.errors import SweepError
from kablate.spec.bounds import MAX_DEPTH, MAX_GRID_CELLS, MAX_NAME, MAX_SEED
from kablate.spec.fields import Where, check, read_table, read_value
from kablate.spec.schema import (
    DataSpec,
    FilterSpec,
    HalvingSpec,
    ModelSpec,
    NetworkSpec,
    PickSpec,
    PlanSpec,
    RecipeSpec,
    SweepSpec,
    TargetSpec,
)
from kablate.spec.search import read_search

NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]*$")


def _slug(value: str) -> str | None:
    if len(value) > MAX_NAME:
        return f"must be at most {MAX_NAME} characters long (this one has {len(value)})"
    return None if NAME_RE.match(value) else "must be letters, digits, '.', '_' or '-'"


def _seeds(value: tuple[int, ...]) -> str | None:
    if not value:
        return "must list at least one seed"
    if len(set(value)) != len(value) or min(value) < 0 or max(value) > MAX_SEED:
        return f"must be distinct integers from 0 to {MAX_SEED} (2³¹ − 1)"
    return None


@dataclass(frozen=True)
class SweepTable:
    """The ``[sweep]`` table."""

    name: str = check(_slug)
    seeds: tuple[int, ...] = check(_seeds, (0, 1, 2))
    baseline: str = ""
    story: str = ""
    # auto: race for --budget runs (and resumed races); see kablate.trials.race
    racing: Literal["auto", "on", "off"] = "auto"


TOP_LEVEL = (
    "sweep",
    "data",
    "network",
    "model",
    "recipe",
    "plan",
    "grid",
    "filter",
    "pick",
    "target",
    "search",
    "halving",
)


def load_sweep(path: str | Path) -> SweepSpec:
    """Load, resolve and validate a sweep file.

    Raises:
        SweepError: for any syntax error, unknown key, wrong type or value out of range.
    """
    return sweep_from_dict(read_toml(Path(path), str(path)), Path(path))


def sweep_from_dict(raw: dict, path: Path) -> SweepSpec:
    """Validate an already-parsed sweep (``path`` names it in errors and anchors includes).

    A resolved sweep, as saved in ``results/<name>/sweep.json``, has no includes left, so
    this rebuilds the exact `SweepSpec` a results folder was produced from.
    """
    source = str(path)
    where = Where(source)
    for key in raw:
        if key not in TOP_LEVEL:
            read_table(_TopLevel, {key: None}, where)  # raises with a "did you mean"
    if "sweep" not in raw:
        raise SweepError(source, "sweep", "is required: a [sweep] table with at least `name`")
    head = read_table(SweepTable, raw["sweep"], where.key("sweep"))
    network_raw = resolve_include(raw.get("network", {}), NetworkSpec, path, "network")
    recipe_raw = resolve_include(raw.get("recipe", {}), RecipeSpec, path, "recipe")
    data = read_table(DataSpec, raw.get("data", {}), where.key("data"))
    network = read_table(NetworkSpec, network_raw, where.key("network"))
    recipe = read_table(RecipeSpec, recipe_raw, where.key("recipe"))
    filters = read_table(FilterSpec, raw.get("filter", {}), where.key("filter"))
    pick = read_table(PickSpec, raw.get("pick", {}), where.key("pick"))
    target = read_table(TargetSpec, raw.get("target", {}), where.key("target"))
    halving = read_table(HalvingSpec, raw.get("halving", {}), where.key("halving"))
    model = read_model(raw, where)
    plans = read_plans(raw.get("plan", []), where.key("plan"))
    grids = read_grids(raw.get("grid", []), where.key("grid"))
    search = read_search(raw, where, pick)
    if not plans and not grids and search is None:
        raise SweepError(
            source, "plan", "is missing: give at least one [[plan]], [[grid]] or a [search] space"
        )
    if recipe.test_from == "best" and not data.stop_size:
        raise SweepError(
            source,
            "recipe.test_from",
            '= "best" chooses an epoch, which must not be chosen on the validation images that '
            "score it: set `data.stop_size` (e.g. 200) to carve an early-stopping fold out of "
            'the training pool, or use test_from = "last"',
        )
    if halving.enabled and halving.first_epoch >= recipe.epochs:
        raise SweepError(
            source,
            "halving.first_epoch",
            f"= {halving.first_epoch} leaves no rung before the recipe's last epoch "
            f"({recipe.epochs}): successive halving would stop nothing; lower it below "
            f"{recipe.epochs}, or set `halving.enabled = false`",
        )
    resolved = dict(raw, network=network_raw, recipe=recipe_raw)
    return SweepSpec(
        name=head.name,
        source=source,
        seeds=head.seeds,
        data=data,
        network=network,
        recipe=recipe,
        plans=plans,
        grids=grids,
        filters=filters,
        baseline=head.baseline,
        story=head.story,
        racing=head.racing,
        pick=pick,
        model=model,
        target=target,
        search=search,
        halving=halving,
        raw=resolved,
    )


@dataclass(frozen=True)
class _TopLevel:
    sweep: Any = None
    data: Any = None
    network: Any = None
    model: Any = None
    recipe: Any = None
    plan: Any = None
    grid: Any = None
    filter: Any = None
    pick: Any = None
    target: Any = None
    search: Any = None
    halving: Any = None


def read_model(raw: dict, where: Where) -> ModelSpec | None:
    """The ``[model]`` table: the user's own network, which replaces ``[network]``."""
    if "model" not in raw:
        return None
    if raw.get("network"):  # a resolved sweep (sweep.json) holds an empty network table
        raise where.key("model").fail(
            "and [network] are both given: a sweep rewrites either kablate's own network "
            "([network]) or your model ([model]); keep one"
        )
    return read_table(ModelSpec, raw["model"], where.key("model"))


def read_toml(path: Path, source: str) -> dict:
    """Parse a TOML file; a syntax error names the file and the line."""
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise SweepError(source, "", "no such file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise SweepError(source, "", f"cannot be read ({exc})") from None
    try:
        raw = tomllib.loads(text)
    except RecursionError:
        raise SweepError(source, "", "nests arrays or tables too deeply to read") from None
    except ValueError as exc:  # TOMLDecodeError, or an integer of over 4,300 digits
        match = re.search(r"\(at line (\d+), column (\d+)\)", str(exc))
        line = int(match.group(1)) if match else None
        reason = re.sub(r"\s*\(at line \d+, column \d+\)", "", str(exc)).split(";")[0]
        raise SweepError(source, "", f"is not valid TOML: {reason}", line=line) from None
    if nesting_depth(raw) > MAX_DEPTH:
        raise SweepError(
            source, "", f"nests tables and arrays more than {MAX_DEPTH} deep; no setting needs that"
        )
    return raw


def nesting_depth(value: Any) -> int:
    """How deeply tables and arrays nest in ``value`` (a scalar is 0); without recursion."""
    if not isinstance(value, dict | list):
        return 0
    deepest, stack = 0, [(value, 1)]
    while stack:
        item, depth = stack.pop()
        children = item.values() if isinstance(item, dict) else item
        deepest = max(deepest, depth)
        stack += [(child, depth + 1) for child in children if isinstance(child, dict | list)]
    return deepest


def find_include(name: str, sweep_path: Path) -> Path | None:
    """Where an included config is looked for: beside the sweep, one folder up, the cwd."""
    for base in (sweep_path.parent, sweep_path.parent.parent, Path.cwd()):
        candidate = base / name
        if candidate.is_file():
            return candidate
    return None


def resolve_include(table: Any, cls: type, sweep_path: Path, key: str) -> dict:
    """Merge ``table`` over the file its ``from`` key names (if any) and return plain TOML."""
    where = Where(str(sweep_path), key)
    if not isinstance(table, dict):
        raise where.fail("must be a table")
    if "from" not in table:
        return dict(table)
    name = table["from"]
    if not isinstance(name, str):
        raise where.key("from").fail("must be a path to a TOML file, as a string")
    found = find_include(name, sweep_path)
    if found is None:
        looked = f"{sweep_path.parent}, {sweep_path.parent.parent} and the current folder"
        raise where.key("from").fail(f'names "{name}", which was not found in {looked}')
    base = read_toml(found, str(found))
    read_table(cls, base, Where(str(found)))  # the included file must be valid on its own
    return merge(base, {k: v for k, v in table.items() if k != "from"})


def merge(base: dict, over: dict) -> dict:
    """Override ``base`` with ``over``; tables merge key by key, everything else is replaced."""
    out = dict(base)
    for key, value in over.items():
        if isinstance(value, dict) and isinstance(out.get(key), dict):
            out[key] = merge(out[key], value)
        else:
            out[key] = value
    return out


def read_plans(raw: Any, where: Where) -> tuple[PlanSpec, ...]:
    if not isinstance(raw, list):
        raise where.fail("must be an array of tables: write each plan as [[plan]]")
    plans, seen = [], set()
    for i, table in enumerate(raw):
        at = where.key(i)
        if not isinstance(table, dict):
            raise at.fail("must be a table with `name` and one kernel spec per layer group")
        if "name" not in table:
            raise at.key("name").fail("is required: every explicit plan needs a name")
        name = read_value(str, table["name"], at.key("name"))
        if len(name) > MAX_NAME:
            raise at.key("name").fail(f"must be at most {MAX_NAME} characters")
        if _slug(name) or name in seen:
            raise at.key("name").fail(
                f'must be a unique name of letters, digits, ".", "_", "-", but got "{name}"'
            )
        seen.add(name)
        kernels = {g: read_value(str, v, at.key(g)) for g, v in table.items() if g != "name"}
        if not kernels:
            raise at.fail('gives no kernel spec: add e.g. stem = "5"')
        plans.append(PlanSpec(name=name, kernels=kernels, line=at.path))
    return tuple(plans)


def read_grids(raw: Any, where: Where) -> tuple[dict[str, tuple[str, ...]], ...]:
    if not isinstance(raw, list):
        raise where.fail("must be an array of tables: write each grid as [[grid]]")
    grids = []
    for i, table in enumerate(raw):
        at = where.key(i)
        if not isinstance(table, dict) or not table:
            raise at.fail('must be a table of layer group = ["3", "5", ...]')
        axes = {}
        for group, specs in table.items():
            values = read_value(tuple[str, ...], specs, at.key(group))
            if not values:
                raise at.key(group).fail("must list at least one kernel spec")
            axes[group] = values
        grids.append(axes)
    n_cells = sum(math.prod(len(values) for values in axes.values()) for axes in grids)
    if n_cells > MAX_GRID_CELLS:
        raise where.fail(
            f"has {n_cells:,} cells in all, but a sweep may have at most {MAX_GRID_CELLS:,}: "
            "split it into several sweeps or drop some kernel specs"
        )
    return tuple(grids)
