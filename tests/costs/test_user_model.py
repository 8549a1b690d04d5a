"""A `[model]` sweep whose plans give the first conv a new stride: torchvision's AlexNet, its
11×11 stride-4 first conv rewritten as 7×7 stride 2, planned with `kablate plan` on an image
folder written here; costs against torch's own counters and the receptive-field arithmetic."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import torch
import torchvision
from click.testing import CliRunner
from PIL import Image
from torch import nn
from torch.utils.flop_counter import FlopCounterMode

from kablate.cli import main

SIDE = 224  # AlexNet's published input; its first conv needs at least 63 px


def alexnet_sweep(folder: Path, plans: str) -> Path:
    """An AlexNet [model] sweep on a tiny folder of SIDE×SIDE RGB images (two classes)."""
    rng = np.random.default_rng(0)
    for c in range(2):
        (folder / "images" / f"kind{c}").mkdir(parents=True)
        for i in range(3):
            pixels = rng.integers(0, 255, (SIDE, SIDE, 3), dtype=np.uint8)
            Image.fromarray(pixels).save(folder / "images" / f"kind{c}" / f"{i}.png")
    path = folder / "alexnet-stem.toml"
    path.write_text(
        f"""
[sweep]
name = "alexnet-stem"
seeds = [0]
[data]
source = "folder"
root = "{folder / "images"}"
val_size = 2
test_fraction = 0.34
[model]
factory = "torchvision.models:alexnet"
arguments = {{ num_classes = 2 }}
[recipe]
batch_size = 2  # the preflight trains one step of the heaviest variant at this batch
{plans}"""
    )
    return path


PLANS = """
[[plan]]
name = "stem-7s2"
first-conv = "7s2"
[[plan]]
name = "stem-7s2-stacked"
first-conv = "7s2:stack"
[[plan]]
name = "as-built"
"features.0" = "11s4"
"""


def plan(*args: str):
    return CliRunner().invoke(main, ["plan", *args])


@pytest.fixture(scope="module")
def variants(tmp_path_factory) -> dict[str, dict]:
    out = plan(str(alexnet_sweep(tmp_path_factory.mktemp("alexnet"), PLANS)), "--format", "json")
    assert out.exit_code == 0, out.output
    return {v["name"]: v for v in json.loads(out.stdout)}


def test_the_unchanged_alexnet_keeps_the_published_receptive_field(variants):
    # "11s4" on an 11×11 stride-4 conv changes nothing: it is the unchanged model's alias
    assert set(variants) == {"stem-7s2", "stem-7s2-stacked", "as-built"}
    built = variants["as-built"]
    # Araujo, Norris & Sim 2019 (Distill), table of receptive fields: AlexNet, r = 195, at the
    # 6×6 map its head pools (an effective stride of 32 is its four stride-2 and stride-4 steps)
    assert (built["rf"], built["jump"]) == (195, 32)
    first = built["layers"][0]
    assert (first["kernel"], first["stride"], first["out_hw"]) == ([11, 11], [4, 4], [55, 55])


def test_a_7x7_stride_2_first_conv_costs_what_torch_counts(variants):
    stem = variants["stem-7s2"]
    first = stem["layers"][0]
    # PyTorch's Conv2d output length with same padding 3: floor((224 + 6 − 7) / 2) + 1 = 112
    assert (first["kernel"], first["stride"], first["out_hw"]) == ([7, 7], [2, 2], [112, 112])
    # the same model built by hand: torchvision's AlexNet with its first conv replaced
    model = torchvision.models.alexnet(num_classes=2)
    model.features[0] = nn.Conv2d(3, 64, 7, stride=2, padding=3)
    assert stem["params"] == sum(p.numel() for p in model.parameters())
    counter = FlopCounterMode(display=False)  # 2 FLOPs per multiply-accumulate
    with counter, torch.no_grad():
        model.eval()(torch.zeros(1, 3, SIDE, SIDE))
    assert counter.get_total_flops() == 2 * stem["macs"]
    # Araujo et al. 2019's closed form over 7/2, pool 3/2, 5/1, pool 3/2, three 3/1, pool 3/2:
    # 1 + 6·1 + 2·2 + 4·4 + 2·4 + 3·(2·8) + 2·8 = 99, jump 16; the adaptive pool then maps
    # 13×13 onto 6×6 in unequal windows, so the rf past it is unknown, not a guess
    pool5 = next(layer for layer in stem["layers"] if layer["name"] == "features.12")
    assert (pool5["rf"], pool5["jump"]) == ([99, 99], [16, 16])
    assert stem["rf"] is None
    stacked = variants["stem-7s2-stacked"]["layers"]
    assert [layer["stride"] for layer in stacked[:3]] == [[1, 1], [1, 1], [2, 2]]
    assert stacked[2]["rf"] == [7, 7] and stacked[2]["out_hw"] == [112, 112]


def test_a_stride_for_a_later_conv_exits_2_naming_the_key(tmp_path):
    path = alexnet_sweep(tmp_path, '[[plan]]\nname = "late"\n"features.3" = "5s2"\n')
    out = plan(str(path))
    assert out.exit_code == 2 and "Traceback" not in out.output
    assert '`plan[0].features.3` gives conv features.3 stride 2 ("5s2")' in out.output
    assert "only the model's first conv" in out.output
