"""The shipped sweeps, and `kablate plan` on each of them in every format."""

from __future__ import annotations

import copy
import csv
import io
import json
import tomllib
from pathlib import Path

import pytest
from click.testing import CliRunner

import kablate.costs.catalog
from kablate.cli import main
from kablate.costs.catalog import Catalog, build_catalog
from kablate.spec import load_sweep
from kablate.spec.schema import SweepSpec
from tests.conftest import REPO, write_sweep

SHIPPED = sorted((REPO / "sweeps").glob("*.toml"))
COSTED: dict[str, Catalog] = {}  # repr of a sweep spec → its catalog, costed once per module


def costed(sweep: SweepSpec) -> Catalog:
    """`build_catalog`, run once per distinct sweep spec in this module; each caller gets its
    own deep copy (`kablate plan` adds its warnings to the catalog in place).

    Costing a sweep (ResNet-18's six traced variants above all) is most of what a `plan` call
    costs; these tests check the command's formats and the shipped files, which read the same
    catalog however often it is built. The command's other steps (loading the file, the
    pointless-kernel warnings, the preflight, rendering, latency) still run on every call."""
    key = repr(sweep)
    if key not in COSTED:
        COSTED[key] = build_catalog(sweep)
    return copy.deepcopy(COSTED[key])


@pytest.fixture(autouse=True)
def cost_each_sweep_once(monkeypatch):
    """`kablate plan` here reads `costed` (its import of build_catalog runs at each call)."""
    monkeypatch.setattr(kablate.costs.catalog, "build_catalog", costed)


def plan(*args: str):
    return CliRunner().invoke(main, ["plan", *args], catch_exceptions=False)


def test_there_are_ready_made_sweeps():
    assert {"stem-size", "stack-vs-dense", "channel-forms"} <= {p.stem for p in SHIPPED}


@pytest.mark.parametrize("path", SHIPPED, ids=lambda p: p.stem)
def test_a_shipped_sweep_is_named_after_its_file_and_plans_cleanly(path: Path):
    assert tomllib.loads(path.read_text())["sweep"]["name"] == path.stem
    catalog = costed(load_sweep(path))
    assert len(catalog.variants) >= 2
    assert catalog.baseline in catalog.variants


@pytest.mark.parametrize("path", SHIPPED, ids=lambda p: p.stem)
def test_plan_prints_table_json_and_csv(path: Path):
    table = plan(str(path))
    assert table.exit_code == 0 and "variant" in table.stdout and " rf " in table.stdout
    assert max(len(line) for line in table.stdout.splitlines()) <= 100
    as_json = json.loads(plan(str(path), "--format", "json").stdout)
    as_csv = list(csv.DictReader(io.StringIO(plan(str(path), "--format", "csv").stdout)))
    assert [v["name"] for v in as_json] == [row["name"] for row in as_csv]
    assert all(v["name"] in table.stdout for v in as_json)


def test_every_plan_of_the_resnet_sweep_rewrites_resnet18_into_its_own_variant():
    # tests/report/test_model_sweep.py trains three of these plans; here all of them are laid
    # out on torchvision's ResNet-18 at the shipped input size, none merged into another.
    path = REPO / "sweeps" / "resnet-stages.toml"
    names = [p["name"] for p in tomllib.loads(path.read_text())["plan"]]
    catalog = costed(load_sweep(path))
    assert sorted(v.name for v in catalog.variants) == sorted([*names, "unchanged"])
    assert not catalog.dropped


def test_the_equal_rf_sweep_compares_at_one_receptive_field():
    catalog = costed(load_sweep(REPO / "sweeps" / "stack-vs-dense.toml"))
    assert {v.cost.rf for v in catalog.variants} == {catalog.baseline.cost.rf}
    assert catalog.dropped  # the grid holds other receptive fields, which equal_rf drops
    forms = {spec.split(":")[-1] for v in catalog.variants for spec in v.variant.plan.values()}
    assert {"5", "stack", "3d2"} <= forms


REFUSED = """
[sweep]
name = "refused"
[network]
from = "configs/tiny-net.toml"
padding = "valid"
[[plan]]
name = "huge-stem"
stem = "9"
"""


def test_a_broken_variant_is_refused_with_exit_code_2(tmp_path):
    result = plan(str(write_sweep(tmp_path, REFUSED, name="refused")))
    assert result.exit_code == 2
    assert "Traceback" not in result.stderr
    for part in (
        "refused.toml",
        "variant huge-stem",
        "layer stem",
        "9×9 kernel",
        "input is only 8×8",
    ):
        assert part in result.stderr


VANISHING = """
[sweep]
name = "vanishing"
[network]
from = "configs/tiny-net.toml"
[network.stem]
stride = 8
[[grid]]
stem = ["3", "5"]
"""


def test_a_map_smaller_than_1x1_is_refused_naming_the_grid_variant(tmp_path):
    # an 8×8 digit after a stride-8 stem is 1×1; stage2's 2×2 max-pool has nothing left
    result = plan(str(write_sweep(tmp_path, VANISHING, name="vanishing")), "--format", "json")
    assert result.exit_code == 2 and result.stdout == ""
    assert "Traceback" not in result.stderr
    for part in (
        "vanishing.toml",
        "variant stem=3",
        "layer stage2.pool",
        "smaller than 1×1",
        "input 1×1",
        "kernel 2×2",
    ):
        assert part in result.stderr


# kablate's own networks: a [model] sweep's costs come from its traced graph, and are checked
# against torch's own counters in tests/report/test_model_sweep.py.
OWN_NETWORK = [p for p in SHIPPED if "model" not in tomllib.loads(p.read_text())]


@pytest.mark.parametrize("path", OWN_NETWORK, ids=lambda p: p.stem)
def test_shipped_plans_agree_with_a_recomputation_from_layers(path: Path):
    from tests.costs.recount import recompute

    for v in json.loads(plan(str(path), "--format", "json").stdout):
        again = recompute(v["layers"])
        assert again == {k: v[k] for k in ("params", "macs", "rf", "jump")}, v["name"]
        pool = next(x for x in v["layers"] if x["kind"] == "global_pool")
        assert v["out_hw"] == pool["in_hw"] and v["flops"] == 2 * v["macs"]


EVEN = """
[sweep]
name = "even"
baseline = "even-stem"
[network]
from = "configs/tiny-net.toml"
[[plan]]
name = "even-stem"
stem = "4"
[[plan]]
name = "wide-stem"
stem = "7"
[filter]
max_macs = 1
"""


def test_json_stays_parseable_while_warnings_and_drops_go_to_stderr(tmp_path):
    result = plan(str(write_sweep(tmp_path, EVEN, name="even")), "--format", "json")
    assert result.exit_code == 0
    assert [v["name"] for v in json.loads(result.stdout)] == ["even-stem"]
    assert "warning: layer stem: the even 4×4 kernel" in result.stderr
    assert "dropped wide-stem: MACs" in result.stderr


def test_latency_flag_fills_latency_ms(tmp_path):
    result = plan(
        str(write_sweep(tmp_path, EVEN, name="even")),
        "--format",
        "json",
        "--latency",
        "--threads",
        "1",
    )
    v = json.loads(result.stdout)[0]
    assert v["latency_ms"] > 0 and v["latency_batch_ms"] > 0 and v["latency_threads"] == 1
