"""The warning on kernels that exceed the input by a wide margin (costs/pointless.py)."""

from __future__ import annotations

import shutil

from kablate.costs.catalog import build_catalog
from kablate.costs.pointless import pointless_kernels
from kablate.spec.loader import load_sweep
from tests.conftest import REPO


def quickstart_with(tmp_path, extra: str, baseline: str = "all-3"):
    """The quickstart sweep (8x8 digits) with more plans and the baseline named."""
    shutil.copytree(REPO / "configs", tmp_path / "configs")
    path = tmp_path / "quickstart.toml"
    text = (REPO / "sweeps" / "quickstart.toml").read_text() + extra
    path.write_text(
        text.replace('name = "quickstart"', f'name = "quickstart"\nbaseline = "{baseline}"')
    )
    return build_catalog(load_sweep(path))


def test_a_9x9_body_on_8x8_digits_is_warned_with_its_figures(tmp_path):
    catalog = quickstart_with(tmp_path, '\n[[plan]]\nname = "body-9"\nbody = "9"\n')
    warnings = pointless_kernels(catalog)
    # Receptive field by the recurrence r += (k - 1)·j, j *= s (Araujo, Norris & Sim 2019):
    # baseline: stem 3, stage1 5, 7, maxpool 2/2 -> 8 (j = 2), stage2 12, 16: 16 >= 8.
    # body-9: stem 3, stage1 11, 19, maxpool -> 20 (j = 2), stage2.0 20 + 8·2 = 36 >= 3·8.
    # MACs (k·k·in·out·H·W per conv, plus the 64 -> 10 linear layer):
    # baseline 9·(1·16·64 + 16·32·64 + 32·32·64 + 32·64·16 + 64·64·16) + 640 = 1,779,328;
    # body-9 replaces the four body convs' 9 by 81: 15,935,104, i.e. 8.96x.
    assert warnings == [
        "body-5: its receptive field is already 28x28 at layer stage2.1, 3.5x the 8x8 input "
        "(warned from 3x), and the baseline's 16x16 already covers it; its 2.77x the "
        "baseline's MACs buy no wider view here",
        "body-9: its receptive field is already 36x36 at layer stage2.0, 4.5x the 8x8 input "
        "(warned from 3x), and the baseline's 16x16 already covers it; its 8.96x the "
        "baseline's MACs buy no wider view here",
    ]
    assert catalog.baseline.cost.macs == 1_779_328
    assert catalog.by_name("body-9").cost.macs == 15_935_104


def test_no_warning_when_the_baseline_does_not_see_the_whole_input(tmp_path):
    plans = '\n[[plan]]\nname = "all-1"\nstem = "1"\nbody = "1"\n'
    plans += '\n[[plan]]\nname = "body-9"\nbody = "9"\n'
    catalog = quickstart_with(tmp_path, plans, baseline="all-1")
    # 1x1 convs add nothing; the 2x2 max-pool adds 1: a receptive field of 2 < 8 pixels.
    assert catalog.baseline.cost.rf_hw == (2, 2)
    assert catalog.by_name("body-9").cost.rf == 52  # 36 + 8·2 at the head; yet no warning
    assert pointless_kernels(catalog) == []
    # On 32x32 images the 3x3 baseline of cifar-body reaches 28 < 32 pixels.
    catalog = build_catalog(load_sweep(REPO / "sweeps" / "cifar-body.toml"))
    assert catalog.baseline.cost.rf_hw == (28, 28)
    assert pointless_kernels(catalog) == []
