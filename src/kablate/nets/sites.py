"""The convs of a user's model, and the kernel plan that addresses them.

A *site* is one ``nn.Conv2d`` of the built model, named by its module path (``layer1.0.conv1``)
in ``named_modules()`` order. A plan for a user's model maps keys to kernel specs (the grammar
of `kablate.plans.grammar`). A key is one of three things, from least to most specific:

    role            a named set of convs (`ROLES`); roles contain "-", which no key of ours
                    treats as a path
    pattern         a module path with wildcards: ``*`` matches within one path component,
                    ``**`` matches any number of components (also none): ``layer1.*.conv1``,
                    ``**.conv2``, ``features.**``
    exact path      a key without wildcards, equal to one conv's path

A more specific key wins whatever the order of the keys. Two keys of the same specificity that
give one conv different specs are refused, as is a role or pattern that matches no conv (a
mistyped key would otherwise change nothing, silently).
"""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass, replace

from torch import nn

from kablate.errors import did_you_mean
from kablate.plans.grammar import KernelSpec
from kablate.plans.groups import GroupError, parse_group_spec

PLAIN_CONV = "torch.nn.modules.conv.Conv2d"  # the class name find_convs records for nn.Conv2d


@dataclass(frozen=True)
class ConvSite:
    """One ``nn.Conv2d`` of a built model, as it was built."""

    path: str  # "layer1.0.conv1"
    index: int  # position among the model's Conv2d modules (0 = first)
    in_ch: int
    out_ch: int
    kernel: tuple[int, int]
    stride: tuple[int, int]
    dilation: tuple[int, int]
    padding: tuple[int, int] | str  # as the module has it: (h, w), "same" or "valid"
    groups: int
    bias: bool
    padding_mode: str = "zeros"
    module_type: str = PLAIN_CONV  # a subclass may pad or weigh otherwise

    @property
    def spec(self) -> KernelSpec:
        """Its own kernel as a dense spec. A spec holds one dilation: a conv dilated
        differently per axis is shown by its height's; a 1×1 kernel has dilation 1, as
        `kablate.plans.grammar.parse_kernel` writes it."""
        dilation = 1 if self.kernel == (1, 1) else self.dilation[0]
        return KernelSpec(self.kernel[0], self.kernel[1], dilation)


def find_convs(model: nn.Module) -> list[ConvSite]:
    """Every ``nn.Conv2d`` (or subclass) of ``model``, in ``named_modules()`` order."""
    sites = []
    for path, module in model.named_modules():
        if isinstance(module, nn.Conv2d):
            padding = module.padding
            cls = type(module)
            sites.append(
                ConvSite(
                    path=path,
                    index=len(sites),
                    in_ch=module.in_channels,
                    out_ch=module.out_channels,
                    kernel=tuple(module.kernel_size),  # type: ignore[arg-type]
                    stride=tuple(module.stride),  # type: ignore[arg-type]
                    dilation=tuple(module.dilation),  # type: ignore[arg-type]
                    padding=padding if isinstance(padding, str) else tuple(padding),  # type: ignore[arg-type]
                    groups=module.groups,
                    bias=module.bias is not None,
                    padding_mode=module.padding_mode,
                    module_type=f"{cls.__module__}.{cls.__qualname__}",
                )
            )
    return sites


ROLES: dict[str, str] = {
    "first-conv": "the first Conv2d in module order, usually the stem",
    "every-3x3": "every conv whose kernel is 3×3",
    "every-stride1": "every conv with stride 1 on both axes",
    "every-depthwise": "every depthwise conv (groups equal to its input channels, more than 1)",
}

_ROLE_TEST: dict[str, Callable[[ConvSite], bool]] = {
    "first-conv": lambda site: site.index == 0,
    "every-3x3": lambda site: site.kernel == (3, 3),
    "every-stride1": lambda site: site.stride == (1, 1),
    "every-depthwise": lambda site: site.groups == site.in_ch > 1,
}

ROLE, PATTERN, EXACT = 0, 1, 2  # specificity: a higher level wins


def pattern_regex(key: str) -> re.Pattern[str]:
    """The regular expression of a module-path pattern (``*`` within a component, ``**`` any
    number of components)."""
    parts = key.split(".")
    regex = ""
    for i, part in enumerate(parts):
        last = i == len(parts) - 1
        if part == "**":
            regex += ".+" if last else r"(?:[^.]+\.)*"
        else:
            regex += re.escape(part).replace(r"\*", "[^.]*") + ("" if last else r"\.")
    return re.compile(regex)


def key_members(sites: list[ConvSite], key: str) -> tuple[int, list[str]]:
    """The specificity of plan key ``key`` and the conv paths it addresses.

    Raises:
        GroupError: ``key`` is neither a role nor a path, or it matches no conv.
    """
    paths = [site.path for site in sites]
    if key in ROLES:
        members = [site.path for site in sites if _ROLE_TEST[key](site)]
        level = ROLE
    elif "*" in key:
        regex = pattern_regex(key)
        members = [path for path in paths if regex.fullmatch(path)]
        level = PATTERN
    elif key in paths:
        return EXACT, [key]
    else:
        hint = did_you_mean(key, [*ROLES, *paths])
        raise GroupError(
            key,
            f"is neither a role nor the path of a Conv2d of the model{hint} (roles: "
            f"{', '.join(ROLES)}; paths as named_modules() gives them, with * and ** as "
            "wildcards)",
        )
    if not members:
        what = "role" if level == ROLE else "pattern"
        hint = did_you_mean(key, paths) if level == PATTERN else ""
        raise GroupError(key, f"is a {what} that matches no Conv2d of the model{hint}")
    return level, members


def resolve_model_plan(sites: list[ConvSite], plan: dict[str, str]) -> dict[str, KernelSpec]:
    """Every site's path → its kernel spec under ``plan`` (unchanged sites: ``site.spec``).

    Raises:
        GroupError: naming the plan key, for an unknown role or path, a pattern or role that
            matches no conv, a spec that does not parse, a stride for a conv other than the
            first (`first_conv_stride`), or two keys of the same specificity
            that give one conv different specs.
    """
    chosen: dict[str, tuple[int, KernelSpec, str]] = {
        site.path: (-1, site.spec, "") for site in sites
    }
    by_path = {site.path: site for site in sites}
    for key, text in plan.items():
        level, members = key_members(sites, key)
        spec = parse_group_spec(text, key)
        for path in members:
            spec = first_conv_stride(by_path[path], spec, key, text)
            held_level, held_spec, held_key = chosen[path]
            if level == held_level and spec != held_spec:
                raise GroupError(
                    key,
                    f'gives conv {path} "{spec}", but `{held_key}`, which is as specific, gives '
                    f'it "{held_spec}"; name the conv by its exact path to settle it',
                )
            if level >= held_level:
                chosen[path] = (level, spec, key)
    return {path: spec for path, (_, spec, _) in chosen.items()}


def first_conv_stride(site: ConvSite, spec: KernelSpec, key: str, text: str) -> KernelSpec:
    """``spec`` for ``site``, its stride dropped when it is the conv's own (one spelling per
    network). A stride is the stem's setting, so only the model's first conv takes one.

    Raises:
        GroupError: a stride for any other conv, naming the plan key.
    """
    if not spec.stride:
        return spec
    if site.index != 0:
        raise GroupError(
            key,
            f'gives conv {site.path} stride {spec.stride} ("{text}"), but only the model\'s '
            "first conv (the `first-conv` role or its path) takes a stride",
        )
    return replace(spec, stride=0) if site.stride == (spec.stride,) * 2 else spec
