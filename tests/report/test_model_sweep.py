"""A `[model]` sweep end to end: torchvision's ResNet-18, rewritten by the plans of the shipped
`sweeps/resnet-stages.toml`, trained on a CIFAR-sized image folder written here, reported,
exported, and rebuilt from its handoff file with costs checked by torch's own counters."""

from __future__ import annotations

import json
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pytest
import torch
import torchvision
from PIL import Image
from torch.utils.flop_counter import FlopCounterMode

from kablate.nets.handoff import apply_handoff, build_handoff
from tests.conftest import REPO

SHIPPED = REPO / "sweeps" / "resnet-stages.toml"
N_CLASSES = 4


def write_image_folder(root: Path, n_train: int = 24, n_test: int = 8) -> None:
    """32×32 RGB images in one folder per class; each class has its own dominant colour."""
    rng = np.random.default_rng(0)
    for split, n in (("train", n_train), ("test", n_test)):
        for c in range(N_CLASSES):
            folder = root / split / f"kind{c}"
            folder.mkdir(parents=True)
            for i in range(n):
                image = rng.integers(0, 80, (32, 32, 3), dtype=np.uint8)
                image[..., c % 3] += 120
                if c == 3:
                    image[8:24, 8:24] = 220
                Image.fromarray(image).save(folder / f"{i}.png")


def twin_sweep(folder: Path) -> Path:
    """The shipped sweep's [model] and plans, on tiny data for one short epoch."""
    text = SHIPPED.read_text()
    shipped = tomllib.loads(text)
    plans = text[text.index("[[plan]]") :]
    path = folder / "resnet-twin.toml"
    path.write_text(
        f"""
[sweep]
name = "resnet-twin"
seeds = [0]

[data]
source = "folder"
root = "images"
val_size = 16

[model]
factory = "{shipped["model"]["factory"]}"
arguments = {{ num_classes = {N_CLASSES} }}

[recipe]
epochs = 1
max_steps = 2
batch_size = 32

{plans}"""
    )
    return path


def kablate(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "kablate", *args], cwd=cwd, capture_output=True, text=True,
        timeout=900,
    )  # fmt: skip


def torch_macs(model: torch.nn.Module, in_shape) -> int:
    """MACs of one image by torch's FlopCounterMode (it counts 2 FLOPs per multiply-add)."""
    with FlopCounterMode(display=False) as counter:
        model.eval()(torch.zeros(1, *in_shape))
    return counter.get_total_flops() // 2


@pytest.mark.slow
@pytest.mark.timeout(900)  # six ResNet-18 trials, their report and an export: minutes when busy
def test_a_resnet18_sweep_runs_reports_and_exports_a_variant_that_rebuilds(tmp_path):
    write_image_folder(tmp_path / "images")
    sweep = twin_sweep(tmp_path)
    ran = kablate("run", str(sweep), "--workers", "1", cwd=tmp_path)
    assert ran.returncode == 0, ran.stderr
    results = tmp_path / "results" / "resnet-twin"
    variants = {v["name"]: v for v in json.loads((results / "plan.json").read_text())["variants"]}
    shipped_plans = [p["name"] for p in tomllib.loads(SHIPPED.read_text())["plan"]]
    assert set(variants) == {*shipped_plans, "unchanged"}
    with open(results / "trials.csv") as f:
        statuses = [line.split(",") for line in f.read().splitlines()[1:]]
    assert len(statuses) == len(variants)
    card = (results / "report" / "model_card.md").read_text()
    assert "Your model, built by `torchvision.models:resnet18(num_classes = 4)`" in card

    exported = kablate("export", str(results), "--variant", "stem-7-stacked", cwd=tmp_path)
    assert exported.returncode == 0, exported.stderr
    path = results / "handoff" / "stem-7-stacked.json"
    handoff = json.loads(path.read_text())
    assert handoff["rewrites"] == {"conv1": "7:stack"}
    assert handoff["costs"]["macs"] == variants["stem-7-stacked"]["macs"]

    # Rebuilt from the file alone, the variant has the costs kablate planned, counted by torch.
    rebuilt = build_handoff(path)
    assert sum(p.numel() for p in rebuilt.parameters()) == handoff["costs"]["params"]
    assert torch_macs(rebuilt, handoff["input"]) == handoff["costs"]["macs"]
    # Applied to a model the user builds, it gives the same network.
    applied = apply_handoff(torchvision.models.resnet18(num_classes=N_CLASSES), path)
    assert sum(p.numel() for p in applied.parameters()) == handoff["costs"]["params"]
    assert applied(torch.zeros(2, 3, 32, 32)).shape == (2, N_CLASSES)
    # The unchanged model costs what torch counts for torchvision's own resnet18.
    plain = torchvision.models.resnet18(num_classes=N_CLASSES)
    assert variants["unchanged"]["macs"] == torch_macs(plain, (3, 32, 32))


def test_a_model_that_does_not_answer_the_data_classes_is_refused(tmp_path):
    write_image_folder(tmp_path / "images", n_train=6, n_test=2)
    sweep = twin_sweep(tmp_path)
    sweep.write_text(sweep.read_text().replace("num_classes = 4", "num_classes = 10"))
    planned = kablate("plan", str(sweep), cwd=tmp_path)
    assert planned.returncode == 2
    assert "answers (2, 10)" in planned.stderr and "num_classes = 4" in planned.stderr


def test_a_sweep_with_both_model_and_network_is_refused(tmp_path):
    write_image_folder(tmp_path / "images", n_train=6, n_test=2)
    sweep = twin_sweep(tmp_path)
    sweep.write_text(sweep.read_text() + '\n[network]\nkernel = "3"\n')
    planned = kablate("plan", str(sweep), cwd=tmp_path)
    assert planned.returncode == 2
    assert "`model` and [network] are both given" in planned.stderr


def test_a_rewrite_that_cannot_keep_its_shapes_is_refused_naming_the_module(tmp_path):
    # mobilenet_v2's depthwise convs have groups = channels; a bottleneck's middle width
    # (channels // 4) is not divisible by them, so kablate.nets.rewrite refuses it.
    write_image_folder(tmp_path / "images", n_train=6, n_test=2)
    sweep = twin_sweep(tmp_path)
    text = sweep.read_text().replace("resnet18", "mobilenet_v2")
    text = text[: text.index("[[plan]]")] + '[[plan]]\nname = "dw-bottleneck"\n'
    sweep.write_text(text + 'every-depthwise = "3:bottleneck/4"\n')
    planned = kablate("plan", str(sweep), cwd=tmp_path)
    assert planned.returncode == 2, planned.stdout
    assert "features.1.conv.0.0" in planned.stderr and "Traceback" not in planned.stderr
