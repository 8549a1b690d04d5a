"""Property-based fuzzing of the sweep loader and of the preflight: whatever a sweep file
holds, kablate either accepts it or raises a `UsageError` (exit 2 at the command line), never
another exception.

Inputs: random text, random TOML-shaped documents built from our own key names, and the
shipped sweeps with one value replaced, removed or added. What loads is then planned
(`build_catalog`) and preflighted as `kablate plan` does, with the machine's available memory
pretended to be 256 MiB so that large settings are refused by the estimate instead of trained.
"""

from __future__ import annotations

import math
import tomllib
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from kablate.costs.catalog import build_catalog
from kablate.errors import DataError, UsageError
from kablate.spec.loader import TOP_LEVEL, load_sweep, sweep_from_dict
from kablate.trials import preflight
from tests.conftest import REPO

SHIPPED = sorted((REPO / "sweeps").glob("*.toml"))
KEYS = [
    "sweep", "name", "seeds", "data", "source", "val_size", "train_size", "test_size",
    "network", "from", "stem", "stages", "out_ch", "n_convs", "kernel", "down", "stride",
    "recipe", "epochs", "batch_size", "lr", "warmup_epochs", "augment", "crop_padding",
    "plan", "grid", "body", "stage1", "stage2", "filter", "max_macs", "pick", "cost",
]  # fmt: skip
SCALARS = st.one_of(
    st.integers(min_value=-(2**63), max_value=2**63),
    st.sampled_from([0, 1, 3, 8, 255, 256, 4096, 65536, 65537, 2**31 - 1, 2**31, 3 * 10**12]),
    st.floats(allow_nan=True, allow_infinity=True),
    st.booleans(),
    st.text(max_size=12),
    st.sampled_from(["3", "5", "7:stack", "3d2", "10001", "３", "٣", "3:bottleneck/0", "digits"]),
    st.sampled_from(["folder", "cifar10", "mnist", "configs/recipes/short-cpu.toml", "n" * 300]),
)
VALUES = st.recursive(
    SCALARS,
    lambda inner: st.one_of(
        st.lists(inner, max_size=4),
        st.dictionaries(st.sampled_from(KEYS) | st.text(max_size=6), inner, max_size=4),
    ),
    max_leaves=12,
)


def fuzz(n: int):
    return settings(
        max_examples=n,
        deadline=None,
        suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
    )


pytestmark = pytest.mark.slow  # about half a minute in all on two cores


@pytest.fixture
def small_machine(monkeypatch, tmp_path):
    meminfo = tmp_path / "meminfo"
    meminfo.write_text(f"MemAvailable:   {256 * 1024} kB\n")
    monkeypatch.setattr(preflight, "MEMINFO", meminfo)


def accepted_or_refused(step, source: Path) -> None:
    """Run ``step``; anything but a `UsageError` fails the test (the property). A refusal must
    say something on its first line and, for a sweep's own values, name the file."""
    try:
        step()
    except UsageError as exc:
        first = str(exc).splitlines()[0]
        assert first.strip(), "an empty message"
        if not isinstance(exc, DataError):  # data messages name the data's files instead
            assert str(source) in first, first


def plan_and_preflight(raw: dict, path: Path) -> None:
    """What `kablate plan` does after parsing."""
    accepted_or_refused(
        lambda: preflight.run_preflight(build_catalog(sweep_from_dict(raw, path))), path
    )


@fuzz(150)
@given(text=st.text(max_size=300))
def test_random_text_loads_or_is_a_usage_error(tmp_path, text):
    path = tmp_path / "fuzz.toml"
    path.write_text(text, encoding="utf-8")
    accepted_or_refused(lambda: load_sweep(path), path)


VALID = {"sweep": {"name": "fuzz"}, "plan": [{"name": "a", "body": "3"}]}


@fuzz(250)
@given(
    # plans and grids are read last, so they are weighted up to be reached more often
    top=st.dictionaries(
        st.sampled_from([*TOP_LEVEL, "plan", "plan", "grid", "grid"]), VALUES, max_size=2
    ),
    inner=st.just({}) | st.dictionaries(st.sampled_from(KEYS), VALUES, max_size=3),
    table=st.sampled_from(TOP_LEVEL),
)
def test_random_documents_load_or_are_a_usage_error(top, inner, table):
    # a valid document with some top-level entries replaced and one table given random keys
    raw = {**VALID, **top}
    raw[table] = {**raw[table], **inner} if isinstance(raw.get(table), dict) else inner
    path = REPO / "sweeps" / "fuzz.toml"
    accepted_or_refused(lambda: sweep_from_dict(raw, path), path)


def key_paths(value, prefix=()):
    """Every path to a table entry or list item in a parsed TOML document."""
    items = value.items() if isinstance(value, dict) else enumerate(value)
    for key, child in items:
        yield (*prefix, key)
        if isinstance(child, dict | list):
            yield from key_paths(child, (*prefix, key))


def mutate(raw: dict, path: tuple, action: str, value) -> None:
    *parents, last = path
    holder = raw
    for key in parents:
        holder = holder[key]
    if action == "replace":
        holder[last] = value
    elif action == "remove":
        del holder[last]
    elif isinstance(holder, dict):
        holder[f"{last}_extra" if isinstance(last, str) else "extra"] = value
    else:
        holder.append(value)


@fuzz(40)
@given(
    which=st.integers(min_value=0, max_value=len(SHIPPED) - 1),
    pick=st.integers(min_value=0),
    action=st.sampled_from(["replace", "replace", "remove", "add"]),
    value=VALUES,
)
def test_mutated_shipped_sweeps_plan_and_preflight_or_are_a_usage_error(
    small_machine, which, pick, action, value
):
    path = SHIPPED[which]
    raw = tomllib.loads(path.read_text())
    paths = list(key_paths(raw))
    mutate(raw, paths[pick % len(paths)], action, value)
    plan_and_preflight(raw, path)


@pytest.mark.parametrize("path", SHIPPED, ids=[p.stem for p in SHIPPED])
def test_every_shipped_sweep_passes_the_preflight(path):
    catalog = build_catalog(load_sweep(path))
    preflight.run_preflight(catalog)
    assert math.isfinite(preflight.step_bytes(preflight.heaviest(catalog), 64))
