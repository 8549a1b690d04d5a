"""The shipped stem-stride twin end to end: `sweeps/stem-stride-digits.toml` (an 11×11
stride-4 stem against 7×7 stride 2, 5×5, 3×3 and a stack of 3×3) trained briefly on the offline
digits, reported and exported; its stem numbers must reach the tables and the card, and the
exported 11×11/4 variant must rebuild with its stride."""

from __future__ import annotations

import csv
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
import torch
from torch import nn
from torch.utils.flop_counter import FlopCounterMode

from kablate.nets.handoff import build_handoff, read_handoff
from kablate.report.stem_card import share
from tests.conftest import REPO

SHIPPED = REPO / "sweeps" / "stem-stride-digits.toml"
RECIPE = 'from = "configs/recipes/short-cpu.toml"'


@pytest.fixture(scope="module")
def results(tmp_path_factory) -> Path:
    """The shipped twin with two seeds and one epoch, run in a temp folder."""
    home = tmp_path_factory.mktemp("stem-stride")
    shutil.copytree(REPO / "configs", home / "configs")
    text = SHIPPED.read_text()
    assert "seeds = [0, 1, 2]" in text and RECIPE in text  # the shape this test shortens
    text = text.replace("seeds = [0, 1, 2]", "seeds = [0, 1]").replace(
        RECIPE, f"{RECIPE}\nepochs = 1"
    )
    (home / SHIPPED.name).write_text(text)
    done = subprocess.run(
        [sys.executable, "-m", "kablate", "run", SHIPPED.name], cwd=home, capture_output=True,
        text=True, timeout=1800,
    )  # fmt: skip
    assert done.returncode == 0, done.stderr[-3000:]
    return home / "results" / "stem-stride-digits"


def rows_of(path: Path) -> dict[str, dict]:
    return {row["variant"]: row for row in csv.DictReader(path.open())}


@pytest.mark.slow
def test_the_stem_numbers_reach_the_tables_and_the_card(results):
    stems = rows_of(results / "stem.csv")
    # every single-conv stem is described; the stack has no single filter bank
    assert {v: r["stem"] for v, r in stems.items()} == {
        "stem=11s4": "11×11/4",
        "stem=7s2": "7×7/2",
        "stem=5": "5×5",
        "stem=3": "3×3",
    }
    card = (results / "report" / "model_card.md").read_text()
    section = card.split("#### What the stem learned", 1)[1].split("\n####", 1)[0]
    for variant, row in stems.items():
        metrics = ("share_low", "share_middle", "share_high", "dead_share", "duplicate_share")
        cells = " | ".join(share(row | {k: float(v) for k, v in row.items() if "_" in k}, m)
                           for m in metrics)  # fmt: skip
        assert f"| {row['stem']} | 2 × 16 | {cells} |" in section, variant
    for plot in ("stem_atlas", "stem_spectrum"):
        assert f"]({plot}.png)" in card and (results / "report" / f"{plot}.png").is_file()
    assert "differ only in their kernel sizes and the stem's stride" in card
    variants = rows_of(results / "variants.csv")
    assert variants["stem=11s4"]["plan"] == "stem=11s4"
    # Araujo, Norris & Sim 2019: 11×11/4, then four 3×3 and a 2×2 pool: 11 + 4·8 + 4 + 2·16
    assert int(variants["stem=11s4"]["rf"]) == 11 + 2 * 2 * 4 + 1 * 4 + 2 * 2 * 8


@pytest.mark.slow
def test_the_exported_11x11_stride_4_variant_rebuilds_with_its_stride(results, tmp_path):
    out = tmp_path / "stem.json"
    done = subprocess.run(
        [sys.executable, "-m", "kablate", "export", str(results), "--variant", "stem=11s4",
         "--out", str(out)], capture_output=True, text=True, timeout=600,
    )  # fmt: skip
    assert done.returncode == 0, done.stderr[-3000:]
    assert read_handoff(out)["kernels"]["stem"] == "11s4"
    model = build_handoff(out)
    stem = next(m for m in model.modules() if isinstance(m, nn.Conv2d))
    assert (stem.kernel_size, stem.stride) == ((11, 11), (4, 4))
    costs = read_handoff(out)["costs"]
    assert costs["params"] == sum(p.numel() for p in model.parameters())
    counter = FlopCounterMode(display=False)  # torch counts 2 FLOPs per multiply-accumulate
    with counter, torch.no_grad():
        model.eval()(torch.zeros(1, 1, 8, 8))
    assert counter.get_total_flops() == 2 * costs["macs"]
