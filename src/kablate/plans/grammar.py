"""The kernel-spec grammar: how one layer group's kernel is written in a plan.

    spec  := size [ "d" dilation ] [ "s" stride ] [ ":" form [ "/" ratio ] ]
    size  := k | kh "x" kw            ("×" is accepted for "x")
    form  := dense | stack | split | depthwise | bottleneck

Examples: ``"3"``, ``"5x3"``, ``"3d2"`` (3×3, dilation 2), ``"11s4"`` (11×11, stride 4: only
the stem takes a stride, `kablate.plans.groups` refuses it elsewhere), ``"7:stack"`` (three
3×3 convs, the stacking argument of Simonyan & Zisserman 2014, VGG), ``"5:split"`` (5×1 then
1×5, Szegedy et al. 2016, Inception-v3), ``"3:depthwise"`` (depthwise 3×3 + 1×1, Howard et al.
2017, MobileNets), ``"3:bottleneck/4"`` (1×1 reduce by 4 → 3×3 → 1×1 expand).
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Literal

from kablate.errors import did_you_mean
from kablate.spec.bounds import MAX_KERNEL, MAX_SPEC_DIGITS, MAX_STRIDE

Form = Literal["dense", "stack", "split", "depthwise", "bottleneck"]
FORMS: tuple[str, ...] = ("dense", "stack", "split", "depthwise", "bottleneck")

# ASCII digits only: `\d` would also take full-width and Arabic-Indic digits, which int() reads.
_SPEC_RE = re.compile(
    r"^(?P<kh>[0-9]+)(?:[x×](?P<kw>[0-9]+))?(?:d(?P<dil>[0-9]+))?(?:s(?P<stride>[0-9]+))?"
    r"(?::(?P<form>[a-z]+)(?:/(?P<ratio>[0-9]+))?)?$"
)
GRAMMAR_HELP = (
    'a kernel spec such as "3", "5x3", "3d2", "11s4", "7:stack", "5:split", "3:depthwise" '
    'or "3:bottleneck/4"'
)


class KernelSpecError(ValueError):
    """A kernel spec string that does not parse; the message says what is allowed."""


@dataclass(frozen=True, order=True)
class KernelSpec:
    kh: int
    kw: int
    dilation: int = 1
    form: Form = "dense"
    ratio: int = 4  # bottleneck reduction; ignored by other forms
    stride: int = 0  # 0: the conv's own stride in the base network (the stem's `stride` key)

    @property
    def is_plain_3x3(self) -> bool:
        return (self.kh, self.kw, self.dilation, self.form, self.stride) == (3, 3, 1, "dense", 0)

    @property
    def extent(self) -> tuple[int, int]:
        """The receptive extent of the spec: d·(k−1)+1 per axis, whatever the form."""
        return (self.dilation * (self.kh - 1) + 1, self.dilation * (self.kw - 1) + 1)

    def __str__(self) -> str:
        size = f"{self.kh}" if self.kh == self.kw else f"{self.kh}x{self.kw}"
        dil = f"d{self.dilation}" if self.dilation != 1 else ""
        stride = f"s{self.stride}" if self.stride else ""
        form = "" if self.form == "dense" else f":{self.form}"
        ratio = f"/{self.ratio}" if self.form == "bottleneck" else ""
        return f"{size}{dil}{stride}{form}{ratio}"


def parse_kernel(text: str) -> KernelSpec:
    """Parse one kernel spec; raise `KernelSpecError` with what is allowed."""
    match = _SPEC_RE.match(text.strip().lower().replace(" ", ""))
    if not match:
        raise KernelSpecError(f"must be {GRAMMAR_HELP}")
    kh = _number(match["kh"])
    kw = _number(match["kw"]) if match["kw"] else kh
    dilation = _number(match["dil"]) if match["dil"] else 1
    form = match["form"] or "dense"
    if form not in FORMS:
        hint = did_you_mean(form, FORMS)
        raise KernelSpecError(f"names form `{form}`{hint} (the forms are {', '.join(FORMS)})")
    if kh < 1 or kw < 1 or dilation < 1:
        raise KernelSpecError("needs kernel sizes and dilation ≥ 1")
    if match["ratio"] and form != "bottleneck":
        raise KernelSpecError("gives a ratio, which only the bottleneck form takes")
    ratio = _number(match["ratio"]) if match["ratio"] else 4
    stride = _number(match["stride"]) if match["stride"] else 0
    if match["stride"] and not 1 <= stride <= MAX_STRIDE:
        raise KernelSpecError(
            f"gives stride {stride}; a stride is at least 1 and at most {MAX_STRIDE}"
        )
    if kh == kw == 1:
        dilation = 1  # dilation has no effect on a 1×1 kernel; keep one spelling per network
    if ratio < 1:
        raise KernelSpecError("needs a bottleneck ratio ≥ 1")
    spec = KernelSpec(kh, kw, dilation, form, ratio, stride)  # type: ignore[arg-type]
    _check_form(spec)
    return spec


def _number(digits: str) -> int:
    """One size, dilation, stride or ratio, at most `MAX_KERNEL` (its digits are counted before
    int() reads them, so a 5,000-digit number costs nothing)."""
    significant = digits.lstrip("0") or "0"
    if len(significant) > MAX_SPEC_DIGITS or int(significant) > MAX_KERNEL:
        shown = significant if len(significant) <= 12 else f"{significant[:12]}..."
        raise KernelSpecError(
            f"has the number {shown}; kernel sizes, dilations and ratios are at most {MAX_KERNEL}"
        )
    return int(significant)


def _check_form(spec: KernelSpec) -> None:
    if spec.form == "stack" and (spec.kh != spec.kw or spec.kh % 2 == 0 or spec.kh < 3):
        raise KernelSpecError(
            "uses the stack form, which needs a square odd kernel ≥ 3 (k×k becomes (k−1)/2 "
            "stacked 3×3 convs)"
        )
    if spec.form == "split" and 1 in (spec.kh, spec.kw):
        raise KernelSpecError("uses the split form, which needs both sizes ≥ 2 (kh×1 then 1×kw)")


def stack_depth(spec: KernelSpec) -> int:
    """How many 3×3 convs the stack form uses: (k−1)/2, which keeps the receptive field."""
    return (spec.kh - 1) // 2
