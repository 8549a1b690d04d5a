"""Static costs against torch and published numbers: params, MACs and receptive fields."""

from __future__ import annotations

import pytest
import torch
from torch import nn
from torch.utils.flop_counter import FlopCounterMode

from kablate.costs.static import static_cost
from kablate.nets.build import build_network
from kablate.spec.schema import NetworkSpec, StageSpec, StemSpec
from tests.nets.tiny import tiny_layout, tiny_network

SPECS = [
    "3",
    "4",
    "5x3",
    "3d2",
    "7:stack",
    "5:split",
    "4x2:split",
    "3:depthwise",
    "4d2:depthwise",
    "3:bottleneck/2",
    "5:bottleneck",
]
NETWORKS = {
    "batch-maxpool": tiny_network(stages=((4, 2, "none"), (8, 1, "maxpool"))),
    "group-stride-residual": tiny_network(
        stages=((4, 2, "none"), (8, 2, "stride")), residual=True, norm="group", norm_groups=2
    ),
    "none-avgpool-valid": tiny_network(
        stages=((4, 1, "none"), (6, 1, "avgpool")), norm="none", padding="valid"
    ),
}


def layouts():
    for net_name, net in NETWORKS.items():
        for spec in SPECS:
            shape = (2, 30, 27) if net.padding == "valid" else (2, 9, 7)
            yield f"{net_name}:{spec}", tiny_layout({"stem": spec, "body": spec}, net, shape)


@pytest.mark.parametrize(("label", "layout"), list(layouts()))
def test_params_and_macs_equal_torchs_counts(label, layout):
    cost = static_cost(layout, batch_size=2)
    model = build_network(layout, device="meta")
    # parameters: sum(p.numel()) of the built module
    assert cost.params == sum(p.numel() for p in model.parameters()), label
    # MACs: torch.utils.flop_counter counts 2 FLOPs per multiply-accumulate of conv and linear
    counter = FlopCounterMode(display=False)
    with counter:
        model(torch.empty(3, *layout.in_shape, device="meta"))
    assert counter.get_total_flops() == 3 * cost.flops == 3 * 2 * cost.macs, label


def test_totals_are_the_sums_over_layers():
    for _, layout in layouts():
        cost = static_cost(layout, 1)
        assert cost.params == sum(row.params for row in cost.layers)
        assert cost.macs == sum(row.macs for row in cost.layers)


def empirical_rf(layout) -> tuple[int, int]:
    """The extent of input pixels that reach the centre output at the head's input.

    Max-pools are swapped for avg-pools (a max-pool's gradient reaches one input per window),
    weights are made positive and activations removed, so no gradient cancels out.
    """
    model = build_network(layout).double().eval()
    for parent in model.modules():
        for name, child in parent.named_children():
            if isinstance(child, nn.MaxPool2d):
                setattr(parent, name, nn.AvgPool2d(child.kernel_size, child.stride))
            elif isinstance(child, nn.ReLU | nn.GELU | nn.SiLU):
                setattr(parent, name, nn.Identity())
    with torch.no_grad():
        for p in model.parameters():
            p.copy_(p.abs() + 0.1)
    x = torch.ones(1, *layout.in_shape, dtype=torch.float64, requires_grad=True)
    features = model.blocks[:-1](x)  # the input of the head's global pool
    h, w = features.shape[-2:]
    features[0, :, h // 2, w // 2].sum().backward()
    rows = x.grad[0].abs().sum(dim=(0, 2)).nonzero()
    cols = x.grad[0].abs().sum(dim=(0, 1)).nonzero()
    return int(rows.max() - rows.min() + 1), int(cols.max() - cols.min() + 1)


@pytest.mark.parametrize(
    "spec",
    ["3", "4", "5x3", "3d2", "2x3d2", "7:stack", "5x3:split", "3:depthwise", "3:bottleneck/2"],
)
@pytest.mark.parametrize("down", ["maxpool", "avgpool", "stride"])
def test_analytic_rf_equals_the_input_gradient_extent(spec, down):
    # the recurrence of Araujo, Norris & Sim 2019 against the gradient's support
    net = tiny_network(stages=((2, 1, "none"), (2, 2, down)), residual=True, stem_ch=2)
    layout = tiny_layout({"stem": spec, "body": spec}, net, in_shape=(1, 48, 48))
    cost = static_cost(layout, 1)
    assert max(cost.rf_hw) < 40  # the centre output's window lies inside the 48×48 input
    assert empirical_rf(layout) == cost.rf_hw


def vgg16_network(norm: str = "none") -> NetworkSpec:
    """VGG-16's conv layers (Simonyan & Zisserman 2014, configuration D) in our network spec:
    conv1_1 is the stem, each pooling step begins the next stage, pool5 is a bare stage."""
    stages = [StageSpec(out_ch=64, n_convs=1, name="block1")]
    for i, (ch, n) in enumerate([(128, 2), (256, 3), (512, 3), (512, 3)], start=2):
        stages.append(StageSpec(out_ch=ch, n_convs=n, down="maxpool", name=f"block{i}"))
    stages.append(StageSpec(out_ch=512, n_convs=0, down="maxpool", name="pool5"))
    return NetworkSpec(stem=StemSpec(out_ch=64), stages=tuple(stages), norm=norm)  # type: ignore[arg-type]


def test_vgg16_receptive_field_is_the_published_212():
    # Araujo, Norris & Sim 2019 (Distill), table of receptive fields: VGG-16, r = 212,
    # effective stride 32, at the end of its last conv block (after pool5), 224×224 input.
    layout = tiny_layout({"body": "3"}, vgg16_network(), in_shape=(3, 224, 224), n_classes=1000)
    cost = static_cost(layout, 1)
    assert (cost.rf, cost.jump, cost.out_hw) == (212, 32, (7, 7))
    # before pool5 (after conv5_3) the same recurrence gives 196
    conv5_3 = next(row for row in cost.layers if row.layer.name == "block5.2")
    assert conv5_3.rf == (196, 196)


def test_vgg16_conv_params_and_macs_equal_torchvisions_vgg16():
    # reference library: torchvision.models.vgg16 (no weights), its `features` part
    from torchvision.models import vgg16

    with torch.device("meta"):
        reference = vgg16(weights=None).features
    counter = FlopCounterMode(display=False)
    with counter:
        reference(torch.empty(1, 3, 224, 224, device="meta"))
    layout = tiny_layout({}, vgg16_network(), in_shape=(3, 224, 224), n_classes=1000)
    convs = [row for row in static_cost(layout, 1).layers if row.layer.kind == "conv"]
    assert sum(r.params for r in convs) == sum(p.numel() for p in reference.parameters())
    assert 2 * sum(r.macs for r in convs) == counter.get_total_flops()
    assert sum(r.params for r in convs) == 14_714_688  # from memory: VGG-16's conv weights


@pytest.mark.parametrize(("k", "ratio"), [(5, 0.72), (7, 0.55)])
def test_stacked_3x3_see_as_far_with_fewer_weights(k, ratio):
    # common practice (the argument of Simonyan & Zisserman 2014): two 3×3 convs see 5×5
    # with 72% of the weights of one 5×5; three 3×3 see 7×7 with 55% of one 7×7
    net = tiny_network(stem_ch=64, stages=((64, 1, "none"),), norm="none")
    dense = static_cost(tiny_layout({"stage1": str(k)}, net, in_shape=(64, 16, 16)), 1)
    stack = static_cost(tiny_layout({"stage1": f"{k}:stack"}, net, in_shape=(64, 16, 16)), 1)
    assert dense.rf == stack.rf

    def weights(cost):
        return sum(
            r.params - r.layer.out_ch for r in cost.layers if r.layer.name.startswith("stage1")
        )

    assert weights(stack) / weights(dense) == pytest.approx(ratio, abs=0.005)


def test_a_1x1_body_keeps_resolution_and_adds_no_receptive_field():
    # common practice: a 1×1 kernel keeps the resolution
    cost = static_cost(tiny_layout({"body": "1"}), 1)
    stage1 = next(r for r in cost.layers if r.layer.name == "stage1.0")
    assert stage1.layer.in_hw == stage1.layer.out_hw == (8, 8)
    assert cost.rf == 3 + 1  # the stem's 3, then the pool's one more pixel; 1×1 convs add none


@pytest.mark.parametrize("down", ["none", "stride"])
def test_every_form_sees_what_its_dense_kernel_sees(down):
    # the forms' published purpose: same view, fewer weights. Stride included: a strided
    # stack strides on its last 3×3, a split along each axis in its own half.
    net = tiny_network(stages=((4, 1, "none"), (8, 2, down)))
    for k in (5, 7):
        dense = static_cost(tiny_layout({"body": str(k)}, net, in_shape=(1, 32, 32)), 1)
        for form in ("stack", "split", "depthwise", "bottleneck"):
            other = static_cost(tiny_layout({"body": f"{k}:{form}"}, net, in_shape=(1, 32, 32)), 1)
            assert (other.rf_hw, other.jump, other.out_hw) == (
                dense.rf_hw,
                dense.jump,
                dense.out_hw,
            )


STEM_STRIDES = [
    "11s4",
    "7s2",
    "7s2:stack",
    "5x3s2:split",
    "3d2s3",
    "5s2:depthwise",
    "3s2:bottleneck",
]


@pytest.mark.parametrize("spec", STEM_STRIDES)
def test_a_stem_with_its_own_stride_costs_what_torch_counts_and_sees_what_its_gradient_sees(spec):
    net = tiny_network(stages=((2, 1, "none"), (2, 2, "maxpool")), residual=True, stem_ch=4)
    layout = tiny_layout({"stem": spec}, net, in_shape=(1, 96, 96))
    cost = static_cost(layout, 1)
    model = build_network(layout)
    # the map after the stem: ceil(96 / s) under same padding (PyTorch's Conv2d output formula)
    stride = int(spec.split("s")[1].split(":")[0])
    stem_out = model.blocks[0](torch.zeros(1, *layout.in_shape)).shape[-2:]
    assert (
        tuple(stem_out)
        == (-(-96 // stride),) * 2
        == cost.layers[len(layout.blocks[0].layers) - 1].layer.out_hw
    )
    assert cost.params == sum(p.numel() for p in model.parameters())
    counter = FlopCounterMode(display=False)  # torch counts 2 FLOPs per multiply-accumulate
    with counter:
        model(torch.zeros(1, *layout.in_shape))
    assert counter.get_total_flops() == cost.flops
    # the recurrence of Araujo, Norris & Sim 2019 against the gradient's support
    assert max(cost.rf_hw) < 80 and empirical_rf(layout) == cost.rf_hw


def closed_form_rf(kernels_strides: list[tuple[int, int]]) -> tuple[int, int]:
    """Araujo, Norris & Sim 2019 (Distill), the closed form for one path of L layers:
    r = 1 + Σ_l (k_l − 1) · Π_{i<l} s_i, and the jump (effective stride) Π_l s_l."""
    rf, jump = 1, 1
    for k, s in kernels_strides:
        rf, jump = rf + (k - 1) * jump, jump * s
    return rf, jump


def test_an_11x11_stride_4_stem_has_the_published_arithmetic():
    # AlexNet's first layer (Krizhevsky et al. 2012): 11×11, stride 4, so r = 11, j = 4; then
    # each 3×3 conv adds 2·4 = 8 pixels at jump 4, a 2×2 pool adds 1·4 and doubles the jump.
    net = tiny_network(stages=((4, 2, "none"), (8, 2, "maxpool")))
    layout = tiny_layout({"stem": "11s4"}, net, in_shape=(3, 64, 64))
    rows = static_cost(layout, 1).layers
    path = [(layer.kernel[0], layer.stride[0]) for layer in layout.layers[:-2]]
    assert path == [(11, 4), (3, 1), (3, 1), (2, 2), (3, 1), (3, 1)]
    for n, row in enumerate(rows[: len(path)]):
        assert (row.rf[0], row.jump[0]) == closed_form_rf(path[: n + 1]), row.layer.name
    assert (rows[0].rf, rows[0].jump, rows[0].layer.out_hw) == ((11, 11), (4, 4), (16, 16))
    assert (rows[len(path) - 1].rf[0], rows[len(path) - 1].jump[0]) == (11 + 16 + 4 + 32, 8)


def test_a_plan_stride_overrides_the_networks_stem_stride():
    net = tiny_network(stem_stride=2)
    assert tiny_layout({}, net, in_shape=(1, 16, 16)).layers[0].stride == (2, 2)
    assert tiny_layout({"stem": "5s1"}, net, in_shape=(1, 16, 16)).layers[0].stride == (1, 1)
    assert tiny_layout({"stem": "5s4"}, net, in_shape=(1, 16, 16)).layers[0].out_hw == (4, 4)
