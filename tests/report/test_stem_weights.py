"""Which stems the atlas reads, and which weight is a stem's, from plan.json-shaped entries."""

from __future__ import annotations

from types import SimpleNamespace

import torch

from kablate.report.stem_weights import chosen_variants, first_conv_weight, stem_label, stem_layers


def conv(name: str, k: int, stride: int = 1, in_ch: int = 3, out_ch: int = 8) -> dict:
    return {
        "name": name,
        "kind": "conv",
        "in_ch": in_ch,
        "out_ch": out_ch,
        "kernel": [k, k],
        "stride": [stride, stride],
        "dilation": [1, 1],
        "groups": 1,
    }


BODY = [conv("stage1.0", 3, in_ch=8), {"name": "head.fc", "kind": "linear"}]
ENTRIES = {
    "all-3": {"layers": [conv("stem", 3), *BODY]},
    "body-5": {"layers": [conv("stem", 3), conv("stage1.0", 5, in_ch=8)]},
    "stem-7": {"layers": [conv("stem", 7, stride=2), *BODY]},
    "stem-7s": {"layers": [conv("stem.s0", 3), conv("stem.s1", 3, in_ch=8), *BODY]},
}


def test_the_baseline_the_pick_and_every_other_stem_are_chosen_in_plan_order():
    analysis = SimpleNamespace(baseline="all-3", recommended="body-5")
    roles = chosen_variants(analysis, ENTRIES, own=True)
    # body-5 has the baseline's stem but is the pick; stem-7 and the stack differ.
    assert roles == {"all-3": "baseline", "body-5": "recommended", "stem-7": "", "stem-7s": ""}
    assert len(stem_layers(ENTRIES["stem-7s"], own_network=True)) == 2  # no single filter
    assert stem_label(stem_layers(ENTRIES["stem-7"], True)[0]) == "7×7/2"


def test_a_user_models_first_conv_and_what_a_rewrite_made_of_it():
    plain = {"layers": [conv("conv1", 7, stride=2), conv("layer1.0.conv1", 3, in_ch=8)]}
    stacked = {
        "rewrites": {"conv1": "7:stack"},
        "layers": [conv("conv1.0", 3), conv("conv1.3", 3, in_ch=8), conv("layer1.0.conv1", 3)],
    }
    assert [c["name"] for c in stem_layers(plain, own_network=False)] == ["conv1"]
    assert [c["name"] for c in stem_layers(stacked, own_network=False)] == ["conv1.0", "conv1.3"]


def test_the_stem_weight_is_found_by_path_or_as_the_first_conv_and_checked_by_shape():
    stem = torch.randn(8, 3, 7, 7)
    state = {"bn.weight": torch.ones(8), "blocks.0.body.0.weight": stem, "x.weight": stem * 2}
    assert (first_conv_weight(state, conv("stem", 7)) == stem.numpy()).all()
    assert (first_conv_weight(state, conv("x", 7)) == 2 * stem.numpy()).all()
    assert first_conv_weight(state, conv("stem", 5)) is None  # not the shape plan.json says
