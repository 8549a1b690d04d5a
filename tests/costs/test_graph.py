"""Static costs of models kablate did not build, against published tables and torch itself."""

from __future__ import annotations

import warnings

import pytest
import torch
import torchvision
from torch import nn
from torch.utils.flop_counter import FlopCounterMode

from kablate.costs.graph import graph_cost
from kablate.costs.memory import saved_activation_bytes
from kablate.costs.static import static_cost
from kablate.nets.build import build_network
from tests.nets.tiny import tiny_layout, tiny_network

# Builder arguments for the model as torchvision ships it: googlenet's published weights drop
# the auxiliary heads (inception_v3's keep them); the init flags only silence warnings.
SHIPPED_AS = {"googlenet": {"aux_logits": False, "init_weights": False}}
SHIPPED_AS["inception_v3"] = {"init_weights": False}


def build_on_meta(name: str) -> tuple[nn.Module, int]:
    """torchvision's model ``name`` on the meta device (nothing is computed), and the crop
    size its first published weights were measured at."""
    weights = next(iter(torchvision.models.get_model_weights(name)))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            with torch.device("meta"):
                model = torchvision.models.get_model(name, **SHIPPED_AS.get(name, {}))
        except NotImplementedError:  # RegNet computes its widths with tensors: build on CPU
            model = torchvision.models.get_model(name, **SHIPPED_AS.get(name, {})).to("meta")
    return model, weights.transforms.keywords["crop_size"]


def published(name: str) -> tuple[int, float]:
    """torchvision's published parameter count and GFLOPS (which counts multiply-accumulates:
    the docs' model table shows ``meta["_ops"]`` to two decimals)."""
    meta = next(iter(torchvision.models.get_model_weights(name))).meta
    return meta["num_params"], meta["_ops"]


# One or two models of every convolutional classification family in torchvision's table.
FAMILIES = [
    "alexnet",
    "vgg16",
    "vgg11_bn",
    "resnet18",
    "resnet50",
    "resnext50_32x4d",
    "wide_resnet50_2",
    "squeezenet1_0",
    "squeezenet1_1",
    "densenet121",
    "googlenet",
    "inception_v3",  # at 3×299×299, its weights' crop size
    "mobilenet_v2",
    "mobilenet_v3_small",
    "mobilenet_v3_large",
    "mnasnet0_5",
    "shufflenet_v2_x1_0",
    "efficientnet_b0",
    "efficientnet_b1",  # at 240×240
    "regnet_x_400mf",
    "regnet_y_400mf",
    "convnext_tiny",
]
TRANSFORMERS = ("vit", "swin", "maxvit")
# regnet_y_128gf: 645 M parameters that must be initialised on CPU (its builder computes widths
# with tensors, which the meta device refuses) -- too large for the test machines.
TOO_LARGE = {"regnet_y_128gf"}
THE_REST = sorted(
    set(torchvision.models.list_models(module=torchvision.models))
    - set(FAMILIES)
    - TOO_LARGE
    - {n for n in torchvision.models.list_models() if n.startswith(TRANSFORMERS)}
)


def check_against_the_table(name: str) -> None:
    model, crop = build_on_meta(name)
    cost = graph_cost(model, (3, crop, crop), batch_size=None)
    n_params, gmacs = published(name)
    # Source: torchvision's model table (meta "num_params" and "_ops", GFLOPS = GMACs).
    # Every conv model agrees to the third decimal that meta carries, so no model needs an
    # explanation for a difference in the table's second decimal.
    assert cost.params == n_params, name
    assert round(cost.macs / 1e9, 3) == pytest.approx(gmacs, abs=1e-9), (name, cost.macs)
    assert cost.rf is not None and cost.rf > 1, (name, cost.notes)


@pytest.mark.parametrize("name", FAMILIES)
def test_params_and_macs_match_torchvisions_table(name):
    check_against_the_table(name)


@pytest.mark.slow
@pytest.mark.parametrize("name", THE_REST)
def test_every_other_conv_model_matches_the_table(name):
    check_against_the_table(name)


@pytest.mark.parametrize(
    ("name", "n_params", "gmacs"),
    [
        # Source: issue 16, quoting torchvision's model table (Params, GFLOPS columns).
        ("resnet18", 11_689_512, 1.81),
        ("mobilenet_v2", 3_504_872, 0.30),
        ("vgg16", 138_357_544, 15.47),
    ],
)
def test_the_issues_quoted_figures(name, n_params, gmacs):
    model, crop = build_on_meta(name)
    cost = graph_cost(model, (3, crop, crop), batch_size=None)
    assert (cost.params, round(cost.macs / 1e9, 2)) == (n_params, gmacs)
    assert cost.flops == 2 * cost.macs


@pytest.mark.parametrize("name", ["resnet18", "mobilenet_v2", "shufflenet_v2_x1_0", "googlenet"])
def test_macs_equal_torchs_flop_counter(name):
    model, crop = build_on_meta(name)
    cost = graph_cost(model, (3, crop, crop), batch_size=None)
    # torch.utils.flop_counter counts 2 FLOPs per multiply-accumulate of conv and linear layers
    counter = FlopCounterMode(display=False)
    with counter, torch.no_grad():
        model.eval()(torch.empty(1, 3, crop, crop, device="meta"))
    assert counter.get_total_flops() == 2 * cost.macs


@pytest.mark.parametrize(
    ("name", "rf"),
    [
        # Source: Araujo, Norris & Sim 2019, "Computing Receptive Fields of Convolutional
        # Neural Networks", Distill, table of receptive fields (at pool5, the map the head
        # pools over).
        ("vgg16", 212),
        ("alexnet", 195),
        # Hand-worked with the same recurrence: torchvision's ResNet-50 (v1.5) puts the stride
        # on the 3×3 conv: 11 after the max-pool, +24, +8+48, +16+160, +32+128 = 427.
        ("resnet50", 427),
    ],
)
def test_receptive_field_matches_the_published_table(name, rf):
    model, crop = build_on_meta(name)
    cost = graph_cost(model, (3, crop, crop), batch_size=None)
    assert (cost.rf, cost.jump, cost.out_hw) == (rf, 32, (7, 7) if name != "alexnet" else (6, 6))


def test_a_head_on_a_map_already_1x1_is_still_the_head():
    # The recurrence r ← r + (k − 1)·j, j ← j·s (Araujo et al. 2019) does not depend on the
    # input's size: at CIFAR's 32×32, where ResNet-50's last map is 1×1, its rf and jump are
    # those of the 224×224 case above (427, 32).
    model, _ = build_on_meta("resnet50")
    cost = graph_cost(model, (3, 32, 32), batch_size=None)
    assert (cost.rf, cost.jump, cost.out_hw) == (427, 32, (1, 1))


def test_the_original_resnet50_sees_483_pixels():
    # Source, from memory: the Distill table (Araujo et al. 2019) lists ResNet-50 at 483 px.
    # That is the original ResNet-50, with the stride on each stage's first 1×1 conv.
    model, _ = build_on_meta("resnet50")
    for stage in (model.layer2, model.layer3, model.layer4):
        stage[0].conv1.stride, stage[0].conv2.stride = (2, 2), (1, 1)
    cost = graph_cost(model, (3, 224, 224), batch_size=None)
    assert (cost.rf, cost.jump) == (483, 32)


class Branchy(nn.Module):
    """Two branches of different reach joined by cat, a residual add, a functional max-pool."""

    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(1, 4, 3, stride=2, padding=1)
        self.narrow = nn.Conv2d(4, 4, 1)
        self.wide = nn.Sequential(
            nn.Conv2d(4, 4, 5, padding=2), nn.Conv2d(4, 4, 3, padding=2, dilation=2)
        )
        self.mix = nn.Conv2d(8, 8, 3, padding=1)
        self.fc = nn.Linear(8, 3)

    def forward(self, x):
        x = torch.relu(self.stem(x))
        y = torch.cat([self.narrow(x), self.wide(x)], dim=1)
        y = y + torch.nn.functional.max_pool2d(self.mix(y), 3, stride=1, padding=1)
        return self.fc(torch.flatten(nn.functional.adaptive_avg_pool2d(y, 1), 1))


def gradient_extent(model: nn.Module, in_shape, at) -> int:
    """The rows of input pixels whose change reaches one pixel of the map at ``at`` (the
    empirical receptive field: positive weights, max-pools as avg-pools, no activations)."""
    x = torch.zeros(1, *in_shape, dtype=torch.double, requires_grad=True)
    out = at(x)
    out[0, :, out.shape[2] // 2, out.shape[3] // 2].sum().backward()
    rows = x.grad[0].abs().sum(dim=(0, 2)).nonzero()
    return int(rows.max() - rows.min() + 1)


def test_branches_take_the_widest_path_as_the_gradient_shows():
    model = Branchy().double()
    with torch.no_grad():
        for p in model.parameters():
            p.copy_(p.abs() + 0.1)

    def feature_map(x):
        x = model.stem(x)
        y = torch.cat([model.narrow(x), model.wide(x)], dim=1)
        return y + nn.functional.avg_pool2d(model.mix(y), 3, stride=1, padding=1)

    cost = graph_cost(model.float(), (1, 64, 64), batch_size=None)
    # stem 3 (jump 2), wide branch 5 then 3 dilated by 2: 3 + 4·2 + 4·2 = 19, mix +4, pool +4
    assert cost.rf == 27 == gradient_extent(model.double(), (1, 64, 64), feature_map)
    assert cost.jump == 2 and cost.out_hw == (32, 32)


def test_our_networks_measure_as_their_layout_says():
    net = tiny_network(stages=((4, 2, "none"), (8, 2, "stride")), residual=True)
    for plan in ({}, {"body": "5:stack"}, {"stem": "4x2", "body": "3:depthwise"}):
        layout = tiny_layout(plan, net, (2, 12, 10))
        expected = static_cost(layout, batch_size=5)
        cost = graph_cost(build_network(layout), layout.in_shape, batch_size=5)
        assert (cost.params, cost.macs, cost.rf, cost.jump) == (
            expected.params,
            expected.macs,
            expected.rf,
            expected.jump,
        ), plan
        # activation memory: measured at batch 2 and 3 and extrapolated, against the estimate
        assert cost.act_mem_bytes == saved_activation_bytes(layout, 5), plan


class Gated(nn.Module):
    """A squeeze-and-excitation gate inside the network, then the head."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 8, 3)
        self.squeeze, self.excite = nn.AdaptiveAvgPool2d(1), nn.Conv2d(8, 8, 1)
        self.pool, self.fc = nn.AdaptiveAvgPool2d(1), nn.Linear(8, 2)

    def forward(self, x):
        x = self.conv(x)
        x = x * torch.sigmoid(self.excite(self.squeeze(x)))
        return self.fc(self.pool(x).flatten(1))


def test_a_gate_is_not_the_head_and_is_named():
    cost = graph_cost(Gated(), (3, 16, 16), batch_size=None)
    assert (cost.rf, cost.out_hw) == (3, (14, 14))
    assert any("squeeze" in note for note in cost.notes)


class Untraceable(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 4, 3)

    def forward(self, x):
        if x.sum() > 0:  # branches on a tensor's value: torch.fx cannot trace this
            return self.conv(x)
        return self.conv(-x)


class WithUntraceable(nn.Module):
    def __init__(self):
        super().__init__()
        self.body = Untraceable()
        self.up = nn.Conv2d(4, 4, 3)
        self.fc = nn.Linear(4, 2)

    def forward(self, x):
        return self.fc(self.up(self.body(x)).mean((2, 3)))


def test_an_untraceable_module_is_named_and_its_rf_is_unknown():
    cost = graph_cost(WithUntraceable(), (3, 10, 10), batch_size=None)
    assert cost.rf is None and cost.jump is None
    assert any(note.startswith("body:") for note in cost.notes), cost.notes
    assert cost.params == sum(p.numel() for p in WithUntraceable().parameters())
    # its MACs still count (torch's flop counter runs inside it): 8·8·4·27 + 6·6·4·36 + 4·2
    assert cost.macs == 8 * 8 * 4 * 27 + 6 * 6 * 4 * 36 + 8


def test_an_upsampling_makes_the_rf_unknown_and_says_where():
    model = nn.Sequential(
        nn.Conv2d(1, 2, 3), nn.Upsample(scale_factor=2), nn.AdaptiveAvgPool2d(1), nn.Flatten()
    )
    cost = graph_cost(model, (1, 8, 8), batch_size=None)
    assert cost.rf is None
    assert any("Upsample" in note for note in cost.notes), cost.notes


def test_stochastic_depth_passes_the_reach_through_without_importing_torchvision_for_it():
    # ConvNeXt's blocks end in torchvision's stochastic_depth (drops whole samples), which
    # reach.py looks up only once torchvision is imported, as it is here by the model.
    model, crop = build_on_meta("convnext_tiny")
    cost = graph_cost(model, (3, crop, crop), batch_size=None)
    assert cost.rf is not None and cost.jump == 32
