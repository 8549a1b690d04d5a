"""A `[model]` sweep end to end: torchvision's ResNet-18, rewritten by the plans of the shipped
`sweeps/resnet-stages.toml`, trained on a tiny image folder written here, reported,
exported, and rebuilt from its handoff file with costs checked by torch's own counters.

The images are 16×16, not CIFAR's 32×32: every cost and check here holds at any input side
(ResNet-18 still leaves a 1×1 map for its last stage), and a quarter of the pixels makes the
run's latency rounds, calibration and training steps about four times cheaper. It trains three
of the shipped plans, one of each rewrite form (a plain larger kernel, a stack, depthwise), plus
the unchanged model; every shipped plan is costed on ResNet-18 by
tests/costs/test_sweeps.py."""

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
from click.testing import CliRunner
from PIL import Image
from torch.utils.flop_counter import FlopCounterMode

from kablate.cli import main
from kablate.nets.handoff import apply_handoff, build_handoff
from tests.conftest import REPO

SHIPPED = REPO / "sweeps" / "resnet-stages.toml"
N_CLASSES = 4
SIDE = 16  # of the square images written here
# The shipped plans trained here: a stack (the exported one), a plain 5×5, and depthwise convs.
RUN_PLANS = ("stem-7-stacked", "stage1-5", "stride1-depthwise")


def write_image_folder(root: Path, n_train: int = 8, n_test: int = 4) -> None:
    """SIDE×SIDE RGB images in one folder per class; each class has its own dominant colour."""
    rng = np.random.default_rng(0)
    for split, n in (("train", n_train), ("test", n_test)):
        for c in range(N_CLASSES):
            folder = root / split / f"kind{c}"
            folder.mkdir(parents=True)
            for i in range(n):
                image = rng.integers(0, 80, (SIDE, SIDE, 3), dtype=np.uint8)
                image[..., c % 3] += 120
                if c == 3:
                    image[SIDE // 4 : 3 * SIDE // 4, SIDE // 4 : 3 * SIDE // 4] = 220
                Image.fromarray(image).save(folder / f"{i}.png")


def twin_sweep(folder: Path) -> Path:
    """The shipped sweep's [model] and RUN_PLANS, on tiny data for one short epoch."""
    shipped = tomllib.loads(SHIPPED.read_text())
    tables = [p for p in shipped["plan"] if p["name"] in RUN_PLANS]
    assert [p["name"] for p in tables] == list(RUN_PLANS)  # still shipped, in this order
    plans = "\n".join(
        "[[plan]]\n" + "".join(f"{json.dumps(k)} = {json.dumps(v)}\n" for k, v in p.items())
        for p in tables
    )
    path = folder / "resnet-twin.toml"
    path.write_text(
        f"""
[sweep]
name = "resnet-twin"
seeds = [0]

[data]
source = "folder"
root = "images"
val_size = 8

[model]
factory = "{shipped["model"]["factory"]}"
arguments = {{ num_classes = {N_CLASSES} }}

[recipe]
epochs = 1
max_steps = 2
batch_size = 8

{plans}"""
    )
    return path


def kablate(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "kablate", *args], cwd=cwd, capture_output=True, text=True,
        timeout=900,
    )  # fmt: skip


def plan_here(sweep: Path, monkeypatch):
    """`kablate plan SWEEP` in this process, from the sweep's folder (its data root is relative):
    the refusals below need no fresh interpreter to import torch again."""
    monkeypatch.chdir(sweep.parent)
    return CliRunner().invoke(main, ["plan", sweep.name])


def torch_macs(model: torch.nn.Module, in_shape) -> int:
    """MACs of one image by torch's FlopCounterMode (it counts 2 FLOPs per multiply-add)."""
    with FlopCounterMode(display=False) as counter:
        model.eval()(torch.zeros(1, *in_shape))
    return counter.get_total_flops() // 2


@pytest.mark.slow
@pytest.mark.timeout(900)  # four ResNet-18 trials, their report and an export: minutes when busy
def test_a_resnet18_sweep_runs_reports_and_exports_a_variant_that_rebuilds(tmp_path):
    write_image_folder(tmp_path / "images")
    sweep = twin_sweep(tmp_path)
    ran = kablate("run", str(sweep), "--workers", "1", cwd=tmp_path)
    assert ran.returncode == 0, ran.stderr
    results = tmp_path / "results" / "resnet-twin"
    variants = {v["name"]: v for v in json.loads((results / "plan.json").read_text())["variants"]}
    assert set(variants) == {*RUN_PLANS, "unchanged"}
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
    assert applied(torch.zeros(2, 3, SIDE, SIDE)).shape == (2, N_CLASSES)
    # The unchanged model costs what torch counts for torchvision's own resnet18.
    plain = torchvision.models.resnet18(num_classes=N_CLASSES)
    assert variants["unchanged"]["macs"] == torch_macs(plain, (3, SIDE, SIDE))


def test_a_model_that_does_not_answer_the_data_classes_is_refused(tmp_path, monkeypatch):
    write_image_folder(tmp_path / "images", n_train=6, n_test=2)
    sweep = twin_sweep(tmp_path)
    sweep.write_text(sweep.read_text().replace("num_classes = 4", "num_classes = 10"))
    planned = plan_here(sweep, monkeypatch)
    assert planned.exit_code == 2
    assert "answers (2, 10)" in planned.stderr and "num_classes = 4" in planned.stderr


def test_a_sweep_with_both_model_and_network_is_refused(tmp_path, monkeypatch):
    write_image_folder(tmp_path / "images", n_train=6, n_test=2)
    sweep = twin_sweep(tmp_path)
    sweep.write_text(sweep.read_text() + '\n[network]\nkernel = "3"\n')
    planned = plan_here(sweep, monkeypatch)
    assert planned.exit_code == 2
    assert "`model` and [network] are both given" in planned.stderr


def test_a_rewrite_that_cannot_keep_its_shapes_is_refused_naming_the_module(tmp_path, monkeypatch):
    # mobilenet_v2's depthwise convs have groups = channels; a bottleneck's middle width
    # (channels // 4) is not divisible by them, so kablate.nets.rewrite refuses it.
    write_image_folder(tmp_path / "images", n_train=6, n_test=2)
    sweep = twin_sweep(tmp_path)
    text = sweep.read_text().replace("resnet18", "mobilenet_v2")
    text = text[: text.index("[[plan]]")] + '[[plan]]\nname = "dw-bottleneck"\n'
    sweep.write_text(text + 'every-depthwise = "3:bottleneck/4"\n')
    planned = plan_here(sweep, monkeypatch)
    assert planned.exit_code == 2, planned.stdout
    assert "features.1.conv.0.0" in planned.stderr and "Traceback" not in planned.stderr
