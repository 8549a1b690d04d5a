"""Layouts and built modules agree layer by layer; broken variants are refused by name."""

from __future__ import annotations

import pytest
import torch
from torch import nn

from kablate.errors import PlanError
from kablate.nets.build import build_network
from tests.nets.tiny import tiny_layout, tiny_network

SPECS = [
    "3",
    "4",
    "5x3",
    "3d2",
    "2x4d3",
    "7:stack",
    "5:split",
    "4x6:split",
    "3:depthwise",
    "4d2:depthwise",
    "3:bottleneck/2",
    "5x3:bottleneck",
]


def module_shapes(layout, x):
    """The output shape of every conv, pool and linear module, in forward order."""
    model = build_network(layout).eval()
    shapes = []
    kinds = (nn.Conv2d, nn.MaxPool2d, nn.AvgPool2d, nn.AdaptiveAvgPool2d, nn.Linear)
    hooks = [
        m.register_forward_hook(lambda _m, _i, out: shapes.append(tuple(out.shape[1:])))
        for m in model.modules()
        if isinstance(m, kinds)
    ]
    with torch.no_grad():
        y = model(x)
    for h in hooks:
        h.remove()
    return shapes, y


@pytest.mark.parametrize("down", ["maxpool", "avgpool", "stride"])
@pytest.mark.parametrize("norm", ["batch", "group", "none"])
def test_every_layer_shape_matches_the_built_module(down, norm):
    net = tiny_network(
        stages=((4, 2, "none"), (8, 2, down)), residual=True, norm=norm, norm_groups=2
    )
    for spec in SPECS:
        layout = tiny_layout({"body": spec, "stem": spec}, net, in_shape=(2, 9, 7))
        shapes, y = module_shapes(layout, torch.randn(2, 2, 9, 7))
        expected = []
        for layer in layout.layers:
            if layer.kind == "linear":
                expected.append((layer.out_ch,))
            else:
                expected.append((layer.out_ch, *layer.out_hw))
        assert shapes == expected, spec
        assert y.shape == (2, 3)


def test_strided_downsampling_halves_the_map_on_the_first_conv_of_the_stage():
    layout = tiny_layout({}, tiny_network(stages=((4, 1, "none"), (8, 2, "stride"))))
    convs = {layer.name: layer for layer in layout.layers}
    assert convs["stage2.0"].stride == (2, 2) and convs["stage2.0"].out_hw == (4, 4)
    assert convs["stage2.1"].stride == (1, 1)
    assert not any(layer.kind == "pool" for layer in layout.layers)


def test_residual_blocks_add_their_input_where_the_shapes_match():
    net = tiny_network(stages=((4, 2, "none"), (8, 2, "stride")), residual=True, norm="none")
    layout = tiny_layout({}, net)
    residual = {block.name: block.residual for block in layout.blocks}
    assert residual == {
        "stem": False,
        "stage1.0": True,
        "stage1.1": True,
        "stage2.0": False,  # 4 → 8 channels and stride 2: no shortcut
        "stage2.1": True,
        "head": False,
    }
    model = build_network(layout).eval()
    block = model.blocks[1]
    x = torch.randn(1, 4, 8, 8)
    with torch.no_grad():
        assert torch.allclose(block(x), x + block.body(x))


def test_group_norm_uses_a_divisor_of_the_channels():
    net = tiny_network(stem_ch=6, stages=((12, 1, "none"),), norm="group", norm_groups=4)
    model = build_network(tiny_layout({}, net))
    groups = [m.num_groups for m in model.modules() if isinstance(m, nn.GroupNorm)]
    assert groups == [3, 4]  # 6 channels: 3 groups; 12 channels: 4


def test_forms_become_the_published_layer_sequences():
    def seq(spec):
        layout = tiny_layout({"stage2": spec})
        return [
            (layer.name, layer.kernel, layer.groups, layer.out_ch)
            for layer in layout.layers
            if layer.name.startswith("stage2.0")
        ]

    assert seq("7:stack") == [(f"stage2.0.s{i}", (3, 3), 1, 8) for i in range(3)]
    assert seq("5x3:split") == [("stage2.0.v", (5, 1), 1, 8), ("stage2.0.h", (1, 3), 1, 8)]
    assert seq("3:depthwise") == [("stage2.0.dw", (3, 3), 4, 4), ("stage2.0.pw", (1, 1), 1, 8)]
    assert seq("3:bottleneck/2") == [
        ("stage2.0.reduce", (1, 1), 1, 4),
        ("stage2.0.spatial", (3, 3), 1, 4),
        ("stage2.0.expand", (1, 1), 1, 8),
    ]


def test_even_kernels_are_padded_bottom_right():
    # The warning it earns is worded once, by costs.catalog.padding_warnings (test_catalog.py).
    stem = tiny_layout({"stem": "4"}, name="even-stem").layers[0]
    assert stem.padding == (1, 2, 1, 2) and stem.out_hw == (8, 8)


def test_a_kernel_larger_than_its_input_under_valid_padding_is_refused():
    net = tiny_network(padding="valid")
    with pytest.raises(PlanError) as exc:
        tiny_layout({"stage2": "5"}, net, name="big-body")
    # stem 3 (8 → 6), stage1 3 (6 → 4), pool (4 → 2): a 5×5 does not fit in 2×2
    message = str(exc.value)
    for part in ("variant big-body", "layer stage2.0", "5×5 kernel", "input is only 2×2", "valid"):
        assert part in message


def test_a_kernel_as_large_as_its_input_fits_under_valid_padding():
    # common practice: a kernel as large as its input gives a 1×1 output under valid padding
    net = tiny_network(stages=(), padding="valid")
    layout = tiny_layout({"stem": "8"}, net)
    assert layout.layers[0].out_hw == (1, 1)


def test_a_map_smaller_than_1x1_is_refused():
    net = tiny_network(
        stages=((4, 1, "maxpool"), (4, 0, "maxpool"), (4, 0, "maxpool"), (4, 0, "maxpool"))
    )
    with pytest.raises(PlanError) as exc:
        tiny_layout({}, net, name="too-deep")
    message = str(exc.value)
    for part in (
        "variant too-deep",
        "layer stage4.pool",
        "smaller than 1×1",
        "input 1×1",
        "kernel 2×2",
    ):
        assert part in message


def test_a_bare_stage_needs_a_pool():
    net = tiny_network(stages=((4, 0, "stride"),))
    with pytest.raises(PlanError, match='n_convs = 0.*"maxpool" or "avgpool", but got "stride"'):
        tiny_layout({}, net)


def test_a_kernel_far_larger_than_its_input_is_refused_before_anything_is_built():
    # Under same padding an output of an n-pixel map reaches at most 2n − 1 inputs (the
    # padding arithmetic of Dumoulin & Visin 2016, §2.2 — from memory); kablate refuses an
    # extent beyond 4n. The tiny network's stage2 runs at 4×4 after the pool (tests/nets/tiny).
    with pytest.raises(PlanError) as exc:
        tiny_layout({"body": "255"}, name="slip")
    message = str(exc.value)
    for part in ("variant slip", "layer stage1.0", "255×255 kernel", "8×8 input", "32 here"):
        assert part in message
    assert tiny_layout({"stage2": "15"}).layers  # 15 ≤ 4·4: a pointless but allowed size
    with pytest.raises(PlanError, match="layer stage2.0 .* 17×17 kernel .* 4×4 input"):
        tiny_layout({"stage2": "17"})
    with pytest.raises(PlanError, match="extent 41×41"):  # dilation counts: 3d20 → 41
        tiny_layout({"stem": "3d20"})
