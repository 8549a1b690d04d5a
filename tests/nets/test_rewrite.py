"""Rewriting a user's model: which convs a plan addresses, and that every shape is kept.

Outside references: torch itself (forward hooks give the shapes; `sum(p.numel())` the params;
`torch.utils.flop_counter.FlopCounterMode` the FLOPs), PyTorch's Conv2d and torch.nn.init
documentation (weight shape, output length, initial distributions), torchvision's ResNet-18
and MobileNetV2, and He et al. 2016 (the ResNet-18 layout).
"""

from __future__ import annotations

import copy
import math
from collections import OrderedDict

import pytest
import torch
import torchvision
from torch import nn
from torch.utils.flop_counter import FlopCounterMode

from kablate.costs.graph import graph_cost
from kablate.costs.static import static_cost
from kablate.errors import PlanError
from kablate.nets.build import build_network
from kablate.nets.rewrite import check_rewrite, rewrite_model
from kablate.nets.sites import ROLES, find_convs, resolve_model_plan
from kablate.plans.grammar import parse_kernel
from kablate.plans.groups import GroupError
from tests.nets.tiny import tiny_layout, tiny_network

FORMS = ["5", "1", "2", "7:stack", "5:split", "3:depthwise", "3:bottleneck/4", "3d2"]
SIZES = [(32, 32), (40, 48)]  # CIFAR's size and an odd one: the padding rule holds for any size
# Applied by role and by pattern; both include stride-2 convs (the stem, layer2.0.conv1, the
# 1×1 downsampling convs) and convs with padding 0.
SELECTORS = {
    "role": ("first-conv", "every-3x3"),
    "pattern": ("layer*.*.conv1", "**.downsample.0"),
}


def resnet18() -> nn.Module:
    torch.manual_seed(0)
    return torchvision.models.resnet18(num_classes=10).eval()


def rewritten(model: nn.Module, plan: dict[str, str]):
    """A rewritten copy of ``model`` under ``plan``, and the report."""
    new = copy.deepcopy(model)
    sites = find_convs(new)
    report = rewrite_model(new, resolve_model_plan(sites, plan), sites)
    return new, report


def output_shapes(model: nn.Module, paths: list[str], hw: tuple[int, int]):
    """The output shape of the module at each path, from forward hooks, and the model's."""
    seen: dict[str, tuple[int, ...]] = {}
    handles = [
        model.get_submodule(path).register_forward_hook(
            lambda mod, args, out, path=path: seen.__setitem__(path, tuple(out.shape))
        )
        for path in paths
    ]
    with torch.no_grad():
        out = model(torch.randn(2, 3, *hw))
    for handle in handles:
        handle.remove()
    return seen, tuple(out.shape)


def assert_shapes_kept(original: nn.Module, new: nn.Module, paths: list[str]) -> None:
    for hw in SIZES:
        before, out_before = output_shapes(original, paths, hw)
        after, out_after = output_shapes(new, paths, hw)
        assert len(before) == len(paths) > 0
        assert after == before, hw
        assert out_after == out_before, hw


@pytest.mark.parametrize("how", SELECTORS)
@pytest.mark.parametrize("spec", FORMS)
def test_every_form_keeps_every_rewritten_layers_shape_on_resnet18(spec, how):
    original = resnet18()
    new, report = rewritten(original, dict.fromkeys(SELECTORS[how], spec))
    paths = [r.path for r in report.rewrites]
    if spec != "1":  # "1" leaves the 1×1 downsampling convs as they are
        assert len(paths) >= 9
    assert_shapes_kept(original, new, paths)


@pytest.mark.parametrize("spec", [s for s in FORMS if "bottleneck" not in s])
def test_every_form_keeps_shapes_on_mobilenet_v2s_depthwise_convs(spec):
    torch.manual_seed(0)
    original = torchvision.models.mobilenet_v2(num_classes=10).eval()
    new, report = rewritten(original, {"every-depthwise": spec})
    # MobileNetV2 has 17 inverted-residual blocks, each with one depthwise 3×3 (Sandler et al.
    # 2018, Table 2: 1+2+3+4+3+3+1 blocks); "3d2" and every other form change them all
    assert len(report.rewrites) == 17
    assert_shapes_kept(original, new, [r.path for r in report.rewrites])


def test_a_bottleneck_on_a_depthwise_conv_is_refused_as_its_groups_do_not_divide():
    model = torchvision.models.mobilenet_v2(num_classes=10)
    sites = find_convs(model)
    kernels = resolve_model_plan(sites, {"every-depthwise": "3:bottleneck/4"})
    with pytest.raises(PlanError, match=r"conv features\.1\.conv\.0\.0: .*32 groups"):
        check_rewrite(sites, kernels)


def conv_params(in_ch: int, out_ch: int, kh: int, kw: int, groups: int = 1) -> int:
    """Conv2d's weight holds out·(in/groups)·kh·kw numbers (PyTorch's Conv2d documentation,
    "weight" of shape (out_channels, in_channels/groups, kernel_size[0], kernel_size[1]))."""
    return out_ch * (in_ch // groups) * kh * kw


def expected_params(site, spec: str) -> int:
    """The params one resnet conv (no bias) becomes under ``spec``, from sweeps/README.md's
    description of the forms; 2·ch for each BatchNorm2d put between two convs."""
    s, i, o = parse_kernel(spec), site.in_ch, site.out_ch
    if s.form == "dense":
        return conv_params(i, o, s.kh, s.kw)
    if s.form == "stack":  # (k−1)/2 3×3 convs
        n = (s.kh - 1) // 2
        return conv_params(i, o, 3, 3) + (n - 1) * conv_params(o, o, 3, 3) + (n - 1) * 2 * o
    if s.form == "split":  # kh×1 then 1×kw
        return conv_params(i, o, s.kh, 1) + conv_params(o, o, 1, s.kw) + 2 * o
    if s.form == "depthwise":  # k×k with groups = in, then 1×1
        return conv_params(i, i, s.kh, s.kw, i) + conv_params(i, o, 1, 1) + 2 * i
    mid = o // s.ratio  # bottleneck: 1×1 to out/ratio, k×k, 1×1 back
    mids = conv_params(i, mid, 1, 1) + conv_params(mid, mid, s.kh, s.kw)
    return mids + conv_params(mid, o, 1, 1) + 2 * 2 * mid


@pytest.mark.parametrize("spec", FORMS)
def test_params_follow_the_documented_formula_and_macs_agree_with_torchs_flop_counter(spec):
    original = resnet18()
    new, report = rewritten(original, {"every-3x3": spec})
    sites = {site.path: site for site in find_convs(original)}
    expected = sum(p.numel() for p in original.parameters())
    for r in report.rewrites:
        site = sites[r.path]
        assert r.params_before == conv_params(site.in_ch, site.out_ch, 3, 3)
        assert r.params_after == expected_params(site, spec)
        expected += r.params_after - r.params_before
    assert sum(p.numel() for p in new.parameters()) == expected
    cost = graph_cost(new, (3, 32, 32), batch_size=None)
    assert cost.params == expected
    counter = FlopCounterMode(display=False)
    with counter, torch.no_grad():
        new(torch.randn(1, 3, 32, 32))
    assert counter.get_total_flops() == 2 * cost.macs  # FLOPs = 2 × MACs


def test_rewriting_our_own_network_gives_the_variant_that_kablate_builds_itself():
    """A rewrite of the all-3×3 network equals the variant laid out with the same spec:
    the same params and MACs (the layout's own costs), for every multi-conv form."""
    network = tiny_network(norm="batch")
    for spec in ["5:stack", "5:split", "3:depthwise", "3:bottleneck/2", "3d2"]:
        torch.manual_seed(0)
        base = build_network(tiny_layout(network=network))
        variant = static_cost(tiny_layout({"stem": spec, "body": spec}, network), 1)
        new, report = rewritten(base, {"every-3x3": spec})
        cost = graph_cost(new, (1, 8, 8), batch_size=None)
        assert len(report.rewrites) == 3
        assert (cost.params, cost.macs) == (variant.params, variant.macs), spec


def test_patterns_and_roles_address_the_convs_they_name():
    sites = find_convs(resnet18())
    paths = [site.path for site in sites]

    def hit(key):
        kernels = resolve_model_plan(sites, {key: "5x4"})
        return sorted(p for p in paths if kernels[p] == parse_kernel("5x4"))

    assert hit("layer1.*.conv1") == ["layer1.0.conv1", "layer1.1.conv1"]
    assert hit("**.conv2") == sorted(p for p in paths if p.endswith(".conv2"))
    assert len(hit("**.conv2")) == 8  # 2 blocks × 4 stages (He et al. 2016, Table 1)
    assert hit("first-conv") == ["conv1"]
    # ResNet-18: a 7×7 stem, then 8 basic blocks of two 3×3 convs (He et al. 2016, Table 1)
    n_3x3 = sum(
        1 for m in resnet18().modules() if isinstance(m, nn.Conv2d) and m.kernel_size == (3, 3)
    )
    assert len(hit("every-3x3")) == n_3x3 == 16
    # stride 2: the stem, the first conv of stages 2-4 and their three 1×1 downsampling convs
    assert len(hit("every-stride1")) == len(paths) - 7
    assert hit("layer2.0.downsample.0") == ["layer2.0.downsample.0"]
    assert set(ROLES) == {"first-conv", "every-3x3", "every-stride1", "every-depthwise"}


@pytest.mark.parametrize("reverse", [False, True])
def test_a_more_specific_key_wins_whatever_the_order(reverse):
    sites = find_convs(resnet18())
    items = [("every-3x3", "5"), ("layer1.*.conv1", "7"), ("layer1.0.conv1", "1")]
    kernels = resolve_model_plan(sites, dict(reversed(items) if reverse else items))
    assert kernels["layer1.0.conv1"] == parse_kernel("1")
    assert kernels["layer1.1.conv1"] == parse_kernel("7")
    assert kernels["layer1.0.conv2"] == parse_kernel("5")
    assert kernels["conv1"] == parse_kernel("7")  # the 7×7 stem keeps its own kernel


def test_two_equally_specific_keys_that_disagree_are_refused_naming_both():
    sites = find_convs(resnet18())
    with pytest.raises(GroupError, match=r"layer1\.0\.conv1.*`layer1\.\*\.conv1`") as err:
        resolve_model_plan(sites, {"layer1.*.conv1": "5", "layer1.0.*": "7"})
    assert err.value.group == "layer1.0.*"
    with pytest.raises(GroupError, match="every-3x3"):
        resolve_model_plan(sites, {"every-3x3": "5", "every-stride1": "7"})
    # agreeing keys of one level are fine
    kernels = resolve_model_plan(sites, {"layer1.*.conv1": "5", "layer1.0.*": "5"})
    assert kernels["layer1.0.conv2"] == parse_kernel("5")


@pytest.mark.parametrize(
    ("key", "spec", "message"),
    [
        ("layer1.*.conv3", "5", r"pattern that matches no Conv2d.*did you mean `layer1\.\d\.conv"),
        ("layer1.0.conv", "5", r"neither a role nor .*did you mean `layer1\.0\.conv"),
        ("every-5x5", "5", r"neither a role nor .*did you mean `every-3x3`"),
        ("every-depthwise", "5", "a role that matches no Conv2d"),
        ("conv1", "4:stack", "stack form"),
    ],
)
def test_keys_that_address_nothing_and_bad_specs_are_refused_naming_the_key(key, spec, message):
    with pytest.raises(GroupError, match=message) as err:
        resolve_model_plan(find_convs(resnet18()), {key: spec})
    assert err.value.group == key


def small_model(down: nn.Conv2d) -> nn.Module:
    """A nested Sequential, so that module paths have two components."""
    stem = nn.Conv2d(3, down.in_channels, 3, padding=1)
    return nn.Sequential(OrderedDict(stem=stem, body=nn.Sequential(OrderedDict(down=down))))


def refusal(model: nn.Module, plan: dict[str, str]) -> str:
    sites = find_convs(model)
    with pytest.raises(PlanError) as err:
        rewrite_model(model, resolve_model_plan(sites, plan), sites)
    return str(err.value)


def test_a_rewrite_that_needs_negative_padding_is_refused_naming_the_path():
    # a valid-padded 3×3 stride 2 conv: 1×1 would need padding 0 + 1 − 3 = −2
    model = small_model(nn.Conv2d(6, 6, 3, stride=2, padding=0))
    assert refusal(model, {"body.down": "1"}).startswith(
        'conv body.down: "1" would need padding -2'
    )
    model = small_model(nn.Conv2d(6, 6, 5, padding="valid"))
    assert "conv body.down" in refusal(model, {"body.down": "3"})


def test_groups_that_do_not_divide_and_other_convs_are_refused_naming_the_path():
    # groups 3, out 12: a bottleneck by 8 has a middle width of 1, which 3 groups cannot split
    model = small_model(nn.Conv2d(6, 12, 3, padding=1, groups=3))
    assert "conv body.down" in refusal(model, {"body.down": "3:bottleneck/8"})
    assert "3 groups do not divide" in refusal(model, {"body.down": "3:bottleneck/8"})
    model = small_model(nn.Conv2d(6, 6, 3, padding=1, padding_mode="reflect"))
    assert "conv body.down" in refusal(model, {"body.down": "5"})

    class Standardised(nn.Conv2d):
        pass

    assert "subclass" in refusal(small_model(Standardised(6, 6, 3, padding=1)), {"**.down": "5"})
    shared = small_model(nn.Conv2d(6, 6, 3, padding=1))
    shared.again = shared.body.down
    assert "also at again" in refusal(shared, {"stem": "5", "body.down": "5"})
    assert shared.stem.kernel_size == (3, 3)  # a refused plan replaces nothing


@pytest.mark.parametrize("padding", ["same", 1, "valid"])
@pytest.mark.parametrize("spec", ["4", "5:stack", "6x3:split", "5:bottleneck/2"])
def test_string_paddings_and_module_dicts_keep_their_shapes(padding, spec):
    class Branches(nn.Module):
        def __init__(self):
            super().__init__()
            self.paths = nn.ModuleDict({"a": nn.Conv2d(3, 4, 3, padding=padding)})

        def forward(self, x):
            return self.paths["a"](x)

    original = Branches()
    new, report = rewritten(original, {"paths.a": spec})
    assert [r.path for r in report.rewrites] == ["paths.a"]
    assert new.paths["a"] is not original.paths["a"]
    for hw in [(9, 9), (10, 7)]:
        x = torch.randn(1, 3, *hw)
        assert new(x).shape == original(x).shape
    if padding == "same":
        convs = [m for m in new.modules() if isinstance(m, nn.Conv2d)]
        assert all(conv.padding == "same" for conv in convs)


def test_the_stride_goes_where_our_own_layout_puts_it():
    model = resnet18()
    for spec, strides in [
        ("7:stack", [(1, 1), (1, 1), (2, 2)]),  # the last 3×3
        ("5:split", [(2, 1), (1, 2)]),  # per axis
        ("3:depthwise", [(2, 2), (1, 1)]),  # the k×k
        ("3:bottleneck/4", [(1, 1), (2, 2), (1, 1)]),  # the spatial conv
    ]:
        new, _ = rewritten(model, {"layer2.0.conv1": spec})
        convs = [m for m in new.layer2[0].conv1.modules() if isinstance(m, nn.Conv2d)]
        assert [conv.stride for conv in convs] == strides, spec
        inner = [conv.bias is None for conv in convs]
        assert all(inner)  # inner convs have none, and the last keeps resnet's (none)
        norms = [m for m in new.layer2[0].conv1.modules() if isinstance(m, nn.BatchNorm2d)]
        assert len(norms) == len(convs) - 1
        assert all(bool((n.weight == 1).all() and (n.bias == 0).all()) for n in norms)


def weight_std(model: nn.Module, path: str) -> float:
    return float(model.get_submodule(path).weight.detach().std())


def test_a_resnet_conv_gets_resnets_own_init_and_the_report_says_so():
    # layer4.0.conv1 is 256 → 512: fan_in 256·25 and fan_out 512·25 differ under "5".
    # torch.nn.init docs: kaiming_normal_ draws N(0, gain²/fan), gain √2 for relu (He et al.
    # 2015); fan_out = out·kh·kw. 3.3M samples: the std's sampling error is ~0.04%.
    new, report = rewritten(resnet18(), {"layer4.0.conv1": "5"})
    assert math.isclose(weight_std(new, "layer4.0.conv1"), math.sqrt(2 / (512 * 25)), rel_tol=0.01)
    assert report.inits["layer4.0.conv1"].startswith("torchvision.models.resnet: ")
    assert 'mode="fan_out"' in report.inits["layer4.0.conv1"]


def test_an_unknown_model_keeps_torchs_default_init_and_the_report_says_so():
    class Mine(nn.Module):
        def __init__(self):
            super().__init__()
            self.conv = nn.Conv2d(64, 128, 3, padding=1)

        def forward(self, x):
            return self.conv(x)

    new, report = rewritten(Mine(), {"conv": "5"})
    # PyTorch's Conv2d docs: weight ~ U(−√k, √k), k = groups / (in·kh·kw); its std is √(k/3)
    assert math.isclose(weight_std(new, "conv"), math.sqrt(1 / (64 * 25) / 3), rel_tol=0.02)
    assert report.inits["conv"].startswith("torch: torch's Conv2d default")
    assert "Mine" in report.inits["conv"]


def test_new_modules_take_the_replaced_convs_device_and_dtype():
    model = resnet18().double()
    new, _ = rewritten(model, {"every-3x3": "3:bottleneck/4"})
    assert {p.dtype for p in new.parameters()} == {torch.float64}
    with torch.device("meta"):
        meta = torchvision.models.resnet18(num_classes=10)
    new, _ = rewritten(meta, {"every-3x3": "5:split"})
    assert {p.device.type for p in new.parameters()} == {"meta"}


def test_a_new_stride_on_alexnets_first_conv_keeps_its_head_and_follows_the_arithmetic():
    # torchvision's AlexNet: features.0 is 11×11, stride 4, padding 2 (Krizhevsky et al. 2012)
    torch.manual_seed(0)
    model = torchvision.models.alexnet(num_classes=10).eval()
    sites = find_convs(model)
    assert resolve_model_plan(sites, {"first-conv": "11s4"})["features.0"] == sites[0].spec
    new, report = rewritten(model, {"first-conv": "7s2"})
    conv = new.features[0]
    assert (conv.kernel_size, conv.stride, conv.padding) == ((7, 7), (2, 2), (3, 3))
    assert report.kernels == {"features.0": "7s2"}
    seen, out = output_shapes(new, ["features.0", "features.12"], (224, 224))
    # PyTorch's Conv2d output length, floor((224 + 6 − 7) / 2) + 1 = 112; its adaptive
    # average pool still gives the classifier a 6×6 map, so the output keeps its shape
    assert seen["features.0"] == (2, 64, 112, 112) and out == (2, 10)
    cost = graph_cost(new, (3, 224, 224), batch_size=None)
    row = next(r for r in cost.layers if r.layer.name == "features.12")
    # Araujo, Norris & Sim 2019: r = 1 + Σ (k_l − 1)·Π s_i over 7/2, pool 3/2, 5/1, pool 3/2,
    # three 3/1, pool 3/2 = 1 + 6 + 2·2 + 4·4 + 2·4 + 3·2·8 + 2·8 = 99, jump 2·2·2·2 = 16
    assert (row.rf, row.jump) == ((99, 99), (16, 16))
    counter = FlopCounterMode(display=False)
    with counter:
        new(torch.zeros(1, 3, 224, 224))
    assert counter.get_total_flops() == 2 * cost.macs


def test_a_stride_is_refused_for_any_conv_but_the_first():
    sites = find_convs(resnet18())
    with pytest.raises(GroupError, match=r'gives conv layer1.0.conv1 stride 2 \("3s2"\).*first'):
        resolve_model_plan(sites, {"layer1.*.conv1": "3s2"})


def test_a_model_that_cannot_take_the_new_stride_is_named_with_its_variant():
    from kablate.costs.user_model import check_output

    model = nn.Sequential(nn.Conv2d(3, 4, 3, stride=2, padding=1), nn.Flatten(), nn.Linear(256, 5))
    rewrite_model(model, resolve_model_plan(find_convs(model), {"first-conv": "3s1"}))
    with pytest.raises(PlanError, match=r"tiny:net, rewritten as variant s1 .*fails on"):
        check_output(model, "tiny:net", (3, 16, 16), 5, "s1")
