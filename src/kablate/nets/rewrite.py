"""Rewrite the convs of a user's model in place under a kernel plan, keeping every shape
(except after a conv whose stride the plan changes).

Read `kablate.nets.sites` first (which convs a plan addresses); this module decides what each
addressed conv becomes. The rules (sweeps/README.md, "Rewriting a user's model", says the same):

- **Dense** specs keep the conv's in/out channels, stride, groups and bias; only the kernel,
  the dilation and the padding change.
- **Padding keeps every output shape, for any input size.** A conv's output length is
  ``floor((size + P − E) / s) + 1`` (PyTorch's Conv2d documentation), with P the total padding
  and E = d·(k−1)+1 the extent of one axis. Keeping P − E keeps the output for every size, so
  the new total padding per axis is ``P_old + (E_new − E_old)``, split evenly; when it is odd
  the extra pixel goes to the bottom/right (an ``nn.ZeroPad2d`` before a conv with padding 0,
  as `kablate.nets.build` does) and the feature map shifts by half a pixel, which is warned.
  ``padding="valid"`` counts as 0; a conv with ``padding="same"`` (stride 1) stays ``"same"``.
  A rewrite that needs negative padding is refused, naming the module path.
- **Multi-conv forms** (stack, split, depthwise, bottleneck) become an ``nn.Sequential`` in
  the conv's place, laid out as in our own networks (`kablate.nets.layout.unit_layers`). The
  conv that carries the stride on an axis (stack: the last 3×3; split: kh×1 for the height,
  1×kw for the width; depthwise: the k×k; bottleneck: the spatial conv) gets the padding rule
  above; the others have stride 1 on that axis and ``same`` padding, so they keep the size.
  Between the convs of one replacement sit a BatchNorm2d and a ReLU, as VGG puts a
  nonlinearity between its stacked 3×3 convs (Simonyan & Zisserman 2014): without one a stack
  would be a single, low-rank k×k conv. The last conv feeds the model's own norm and
  activation, as the replaced conv did; inner convs have no bias, the last keeps the original's.
- **A new stride** (``"7s2"``, the model's first conv only, `kablate.nets.sites`) cannot keep
  the output shape: the conv that carries it gets same padding (total d·(k−1), as our own
  networks pad), so its output is ⌈size / s⌉, and every shape after it changes. The model
  must still answer its classes (an adaptive pool before its head, as torchvision's AlexNet
  and ResNets have); `kablate.costs.user_model` checks it when the variant is costed.
- **Groups**: every new conv keeps the original's groups, except the depthwise conv of the
  depthwise form (groups = its channels). A count the groups do not divide (a bottleneck's
  middle width, say) is refused, naming the module path.
- **Initialisation**: new convs get the model's factory's conv initialisation where kablate
  knows it, else torch's default (`kablate.nets.inits`); the report says which, per path.
  Inserted BatchNorm2d layers start at weight 1, bias 0. New weights are drawn from torch's
  global generator, so seed it before rewriting. Every new module is made on the replaced
  conv's device and dtype.
"""

from __future__ import annotations

import dataclasses
from collections import OrderedDict
from dataclasses import dataclass

from torch import nn

from kablate.errors import PlanError
from kablate.nets.inits import conv_init_for
from kablate.nets.padding import Pair, Quad, is_symmetric, split_padding
from kablate.nets.sites import PLAIN_CONV, ConvSite, find_convs
from kablate.plans.grammar import KernelSpec, stack_depth

ONE: Pair = (1, 1)  # a 1×1 kernel, or dilation 1
NO_AXIS = (False, False)  # a conv that carries neither axis's stride


@dataclass(frozen=True)
class NewConv:
    """One conv of a replacement, as it will be built."""

    name: str  # its name inside the replacement ("conv" for a dense one)
    in_ch: int
    out_ch: int
    kernel: Pair
    stride: Pair
    dilation: Pair
    groups: int
    padding: Quad  # top, bottom, left, right
    bias: bool


@dataclass(frozen=True)
class ConvRewrite:
    """What one replaced conv became."""

    path: str
    before: str  # its own kernel as a spec
    after: str  # the spec it was rewritten to
    init: str  # the initialisation its new convs got
    params_before: int
    params_after: int


@dataclass(frozen=True)
class RewriteReport:
    rewrites: tuple[ConvRewrite, ...]
    warnings: tuple[str, ...]

    @property
    def inits(self) -> dict[str, str]:
        """Module path → the initialisation its new convs got."""
        return {r.path: r.init for r in self.rewrites}

    @property
    def kernels(self) -> dict[str, str]:
        """Module path → the spec it was rewritten to: a plan that redoes this rewrite."""
        return {r.path: r.after for r in self.rewrites}


def _old_total(site: ConvSite, axis: int) -> int:
    """The total padding the original conv puts on ``axis``."""
    if site.padding == "valid":
        return 0
    if site.padding == "same":
        return site.dilation[axis] * (site.kernel[axis] - 1)
    return 2 * site.padding[axis]


def _new_conv(
    site: ConvSite,
    spec: KernelSpec,
    name: str,
    io: Pair,
    kernel: Pair,
    dilation: Pair,
    carries: tuple[bool, bool] = (True, True),
    groups: int | None = None,
) -> NewConv:
    """A conv of the replacement of ``site``, from ``io[0]`` to ``io[1]`` channels. On each
    axis it ``carries`` it takes the original's stride and the padding rule; on the others it
    has stride 1 and same padding (total d·(k−1)), so it keeps the size."""
    groups = site.groups if groups is None else groups
    stride = [1, 1]
    totals = [dilation[0] * (kernel[0] - 1), dilation[1] * (kernel[1] - 1)]
    for axis in (0, 1):
        if not carries[axis]:
            continue
        stride[axis] = spec.stride or site.stride[axis]
        if stride[axis] != site.stride[axis]:
            continue  # a new stride cannot keep the shape: same padding, d·(k−1) in total
        old_extent = site.dilation[axis] * (site.kernel[axis] - 1) + 1
        old_total = _old_total(site, axis)
        totals[axis] = old_total + (totals[axis] + 1) - old_extent  # P_old + E_new − E_old
        if totals[axis] < 0:
            raise PlanError(
                f'conv {site.path}: "{spec}" would need padding {totals[axis]} on the '
                f"{('height', 'width')[axis]} axis to keep its output shape (its "
                f"{site.kernel[0]}×{site.kernel[1]} kernel reaches {old_extent} pixels with "
                f"padding {old_total}); choose a kernel that reaches at least "
                f"{old_extent - old_total} pixels on that axis"
            )
    if io[0] % groups or io[1] % groups:
        raise PlanError(
            f'conv {site.path}: "{spec}" needs a conv {name} from {io[0]} to {io[1]} channels, '
            f"which its {groups} groups do not divide; choose a spec or ratio whose channel "
            "counts the groups divide"
        )
    padding = split_padding(*totals)
    return NewConv(name, *io, kernel, (stride[0], stride[1]), dilation, groups, padding, False)


def plan_convs(site: ConvSite, spec: KernelSpec) -> list[NewConv]:
    """The convs that ``site`` becomes under ``spec`` (the last keeps the original's bias).

    Raises:
        PlanError: naming the path, for negative padding or groups that do not divide.
    """
    i, o = site.in_ch, site.out_ch
    k, d = (spec.kh, spec.kw), (spec.dilation, spec.dilation)
    if spec.form == "dense":
        convs = [_new_conv(site, spec, "conv", (i, o), k, d)]
    elif spec.form == "stack":
        n = stack_depth(spec)
        last = [(j == n - 1,) * 2 for j in range(n)]  # the stride goes on the last 3×3
        convs = [
            _new_conv(site, spec, f"s{j}", (o if j else i, o), (3, 3), d, last[j]) for j in range(n)
        ]
    elif spec.form == "split":
        convs = [
            _new_conv(site, spec, "v", (i, o), (spec.kh, 1), (d[0], 1), (True, False)),
            _new_conv(site, spec, "h", (o, o), (1, spec.kw), (1, d[1]), (False, True)),
        ]
    elif spec.form == "depthwise":
        convs = [
            _new_conv(site, spec, "dw", (i, i), k, d, groups=i),
            _new_conv(site, spec, "pw", (i, o), ONE, ONE, NO_AXIS),
        ]
    else:  # bottleneck: the grammar admits no other form
        mid = max(1, o // spec.ratio)
        convs = [
            _new_conv(site, spec, "reduce", (i, mid), ONE, ONE, NO_AXIS),
            _new_conv(site, spec, "spatial", (mid, mid), k, d),
            _new_conv(site, spec, "expand", (mid, o), ONE, ONE, NO_AXIS),
        ]
    convs[-1] = dataclasses.replace(convs[-1], bias=site.bias)
    return convs


def check_rewrite(sites: list[ConvSite], kernels: dict[str, KernelSpec]) -> list[str]:
    """Check that every changed conv can be rewritten keeping its shapes; return warnings.

    Raises:
        PlanError: naming the module path: a path that is no conv of the model, a conv whose
            class is a subclass of Conv2d (its forward may pad or weigh otherwise), a padding
            mode other than zeros, negative padding needed, groups that do not divide.
    """
    by_path = {site.path: site for site in sites}
    unknown = sorted(set(kernels) - set(by_path))
    if unknown:
        raise PlanError(f"conv {unknown[0]}: the model has no Conv2d at this path")
    warnings = []
    for path, spec in kernels.items():
        site = by_path[path]
        if spec == site.spec:
            continue
        if site.module_type != PLAIN_CONV:
            raise PlanError(
                f"conv {path}: it is a {site.module_type}, a subclass of Conv2d whose forward "
                "kablate cannot reproduce; only plain torch.nn.Conv2d layers are rewritten"
            )
        if site.padding_mode != "zeros":
            raise PlanError(
                f'conv {path}: it pads with padding_mode="{site.padding_mode}"; only zero '
                "padding is rewritten"
            )
        for conv in plan_convs(site, spec):
            if not is_symmetric(conv.padding):
                warnings.append(
                    f'conv {path}: "{spec}" pads {conv.name} asymmetrically {conv.padding} '
                    "(top, bottom, left, right), the extra pixel at the bottom/right; its "
                    "feature map shifts by half a pixel"
                )
    return warnings


def rewrite_model(
    model: nn.Module, kernels: dict[str, KernelSpec], sites: list[ConvSite] | None = None
) -> RewriteReport:
    """Replace each conv whose spec in ``kernels`` differs from its own, in place. Every
    check runs before the first replacement, so a refused plan leaves the model as it was.

    Raises:
        PlanError: as `check_rewrite`, or a changed conv that is registered at two paths (a
            shared module: rewriting one path would split it).
    """
    sites = find_convs(model) if sites is None else sites
    warnings = check_rewrite(sites, kernels)
    paths_of: dict[int, list[str]] = {}
    for path, module in model.named_modules(remove_duplicate=False):
        paths_of.setdefault(id(module), []).append(path)
    changed = [site for site in sites if kernels.get(site.path, site.spec) != site.spec]
    for site in changed:
        paths = paths_of[id(model.get_submodule(site.path))]
        if len(paths) > 1:
            raise PlanError(
                f"conv {site.path}: the same module is also at {paths[1]}; a shared conv "
                "cannot be rewritten at one path only"
            )
    conv_init = conv_init_for(model)
    rewrites = []
    for site in changed:
        spec, old = kernels[site.path], model.get_submodule(site.path)
        new = _build(plan_convs(site, spec), old, site)
        for conv in new.modules():
            if isinstance(conv, nn.Conv2d):
                conv_init.apply(conv, old, site.path)
        parent_path, _, name = site.path.rpartition(".")
        setattr(model.get_submodule(parent_path), name, new)
        params = (
            sum(p.numel() for p in old.parameters()),
            sum(p.numel() for p in new.parameters()),
        )
        rewrites.append(ConvRewrite(site.path, str(site.spec), str(spec), conv_init.label, *params))
    return RewriteReport(tuple(rewrites), tuple(warnings))


def _build(convs: list[NewConv], old: nn.Conv2d, site: ConvSite) -> nn.Module:
    """The module that replaces ``old``: one Conv2d, or a Sequential of pads, convs, and
    BatchNorm2d + ReLU between convs."""
    like = {"device": old.weight.device, "dtype": old.weight.dtype}
    parts: OrderedDict[str, nn.Module] = OrderedDict()
    for n, conv in enumerate(convs):
        same = site.padding == "same"
        symmetric = is_symmetric(conv.padding)
        if not (same or symmetric):
            top, bottom, left, right = conv.padding
            parts[f"{conv.name}_pad"] = nn.ZeroPad2d((left, right, top, bottom))
        padding = "same" if same else (conv.padding[0], conv.padding[2]) if symmetric else 0
        parts[conv.name] = nn.Conv2d(
            conv.in_ch,
            conv.out_ch,
            conv.kernel,
            stride=conv.stride,
            padding=padding,
            dilation=conv.dilation,
            groups=conv.groups,
            bias=conv.bias,
            **like,
        )
        if n < len(convs) - 1:
            norm = nn.BatchNorm2d(conv.out_ch, **like)
            nn.init.ones_(norm.weight)
            nn.init.zeros_(norm.bias)
            parts[f"{conv.name}_bn"] = norm
            parts[f"{conv.name}_act"] = nn.ReLU(inplace=True)
    if len(parts) == 1:
        return parts[convs[0].name]
    return nn.Sequential(parts)
