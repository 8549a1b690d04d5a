"""`kablate plan --model`: one model in the plan's JSON contract, and errors that exit 2."""

from __future__ import annotations

import csv
import io
import json

import pytest
import torch
import torchvision
from click.testing import CliRunner
from torch.utils.flop_counter import FlopCounterMode

from kablate.cli import main
from tests.costs.recount import VARIANT_FIELDS


def plan(*args: str):
    return CliRunner().invoke(main, ["plan", *args])


def test_json_has_the_fields_of_a_sweeps_variant_and_the_published_costs():
    out = plan("--model", "torchvision.models:resnet18", "--input", "3x64x64", "--format", "json")
    assert out.exit_code == 0, out.output
    (variant,) = json.loads(out.stdout)
    assert set(variant) >= VARIANT_FIELDS
    assert variant["model"] == {
        "factory": "torchvision.models:resnet18",
        "kwargs": {},
        "input": [3, 64, 64],
        "batch_size": 1,
    }
    # Source: torchvision's model table, resnet18: 11,689,512 params
    assert variant["params"] == 11_689_512
    # torch.utils.flop_counter: 2 FLOPs per multiply-accumulate of conv and linear layers
    counter = FlopCounterMode(display=False)
    with counter, torch.no_grad():
        torchvision.models.resnet18().eval()(torch.zeros(1, 3, 64, 64))
    assert 2 * variant["macs"] == counter.get_total_flops()
    assert variant["flops"] == 2 * variant["macs"]
    assert (variant["rf"], variant["jump"], variant["out_hw"]) == (435, 32, [2, 2])
    assert sum(layer["macs"] for layer in variant["layers"]) == variant["macs"]
    assert variant["act_mem_bytes"] > 0


def test_kwargs_reach_the_factory_and_csv_and_table_print():
    args = ("--model", "torchvision.models:squeezenet1_1", "--input", "3x64x64")
    kwargs = ("--kwargs", '{"num_classes": 10}')
    rows = list(csv.DictReader(io.StringIO(plan(*args, *kwargs, "--format", "csv").stdout)))
    assert len(rows) == 1 and rows[0]["id"] == "model"
    # the classifier conv shrinks from 512·1000 + 1000 to 512·10 + 10 parameters
    assert int(rows[0]["params"]) == 1_235_496 - 513_000 + 5_130
    table = plan(*args, *kwargs).stdout
    assert "squeezenet1_1 on 3x64x64" in table
    assert all(len(line) <= 100 for line in table.splitlines())


@pytest.mark.parametrize(
    ("args", "says"),
    [
        (["--model", "resnet18", "--input", "3x8x8"], "package.module:callable"),
        (["--model", "no_such_pkg.x:f", "--input", "3x8x8"], "does not import"),
        (["--model", "torchvision.models:resnet81", "--input", "3x8x8"], "no attribute"),
        (["--model", "torchvision.models:resnet18", "--input", "3x224"], "--input must be"),
        (["--model", "torchvision.models:resnet18", "--input", "0x8x8"], "--input must be"),
        (["--model", "torchvision.models:resnet18"], "needs --input"),
        (["--model", "torchvision.models:resnet18", "--input", "1x64x64"], "check --input"),
        (["--model", "torchvision.models:resnet18", "--input", "3x8x8", "--kwargs", "{x"], "JSON"),
        (
            ["--model", "torchvision.models:resnet18", "--input", "3x8x8", "--kwargs", "[1]"],
            "object",
        ),
        (
            ["--model", "torchvision.models:resnet18", "--input", "3x8x8", "--kwargs", '{"x": 1}'],
            "fails with --kwargs {'x': 1}: TypeError",
        ),
        (["sweeps/quickstart.toml", "--model", "torchvision.models:resnet18"], "one of the two"),
        ([], "one of the two"),
    ],
)
def test_bad_input_exits_2_with_one_line_that_says_how_to_fix_it(args, says):
    out = plan(*args)
    assert out.exit_code == 2, out.output
    assert says in out.output
    assert len(out.output.strip().splitlines()) == 1 and "Traceback" not in out.output


def test_timm_names_work_when_timm_is_installed():
    timm = pytest.importorskip("timm")
    out = plan("--model", "timm:resnet18", "--input", "3x64x64", "--format", "json")
    assert out.exit_code == 0, out.output
    (variant,) = json.loads(out.stdout)
    model = timm.create_model("resnet18", pretrained=False)
    assert variant["params"] == sum(p.numel() for p in model.parameters())
    assert variant["rf"] == 435  # the same layers as torchvision's resnet18


def test_help_warns_that_the_factory_runs_code():
    assert "runs its code" in plan("--help").output
