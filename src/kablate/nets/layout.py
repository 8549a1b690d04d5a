"""The architecture of a variant as plain data: blocks of layers with their shapes.

This list is the single source of truth. `kablate.nets.build` turns it into a torch module and
`kablate.costs` counts parameters, MACs and receptive fields from it, so the two cannot drift.
Norm layers are not listed on their own: a conv with ``norm=True`` is followed by the network's
norm, whose parameters are counted with that conv. An even kernel's lopsided "same" padding is
recorded in its layer's ``padding``; `kablate.costs.catalog.padding_warnings` words the warning.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

from kablate.errors import PlanError
from kablate.nets.padding import Pair, Quad, conv_out_size, get_padding
from kablate.plans.expand import Variant
from kablate.plans.grammar import KernelSpec, stack_depth
from kablate.plans.groups import list_slots, stage_names
from kablate.spec.schema import NetworkSpec

# A kernel's extent is refused beyond this many times its layer's input side. Under "same"
# padding an output of an n-pixel map reaches at most 2n − 1 input positions, so taps past that
# only multiply padding; 4× leaves room for a plan that keeps one kernel size across stages
# at lower resolutions, and stops a slip such as "255" on an 8×8 input from building a network
# whose one training step takes minutes (our own bound, documented in sweeps/README.md).
EXTENT_PER_SIDE = 4
NO_PADDING: Quad = (0, 0, 0, 0)
ONE: Pair = (1, 1)


@dataclass(frozen=True)
class Layer:
    name: str
    kind: str  # conv | pool | global_pool | linear
    in_ch: int
    out_ch: int
    kernel: Pair
    stride: Pair
    padding: Quad  # top, bottom, left, right
    dilation: Pair
    groups: int
    in_hw: Pair
    out_hw: Pair
    op: str = ""  # pools: "max" or "avg"
    norm: bool = False  # followed by the network's norm layer
    act: bool = False  # followed by the network's activation
    bias: bool = False

    # Named factories: every builder makes a layer through the one for its kind, which fixes
    # that kind's other fields (a pool's stride is its window; the head's fc has a bias ...).
    @classmethod
    def conv(
        cls,
        name: str,
        *,
        in_ch: int,
        out_ch: int,
        kernel: Pair,
        stride: Pair,
        padding: Quad,
        dilation: Pair,
        groups: int,
        in_hw: Pair,
        out_hw: Pair,
        norm: bool,
    ) -> Layer:
        """A conv followed by the activation; a bias only where no norm follows it."""
        geometry = (kernel, stride, padding, dilation, groups)
        return cls(
            name,
            "conv",
            in_ch,
            out_ch,
            *geometry,
            in_hw,
            out_hw,
            norm=norm,
            act=True,
            bias=not norm,
        )

    @classmethod
    def pool(cls, name: str, *, op: str, ch: int, window: Pair, in_hw: Pair, out_hw: Pair) -> Layer:
        """A ``max`` or ``avg`` pool, unpadded, whose stride is its window."""
        return cls._window(name, "pool", (ch, ch), window, (in_hw, out_hw), op=op)

    @classmethod
    def global_pool(cls, name: str, *, ch: int, hw: Pair) -> Layer:
        """The average over the whole ``hw`` map, down to 1×1."""
        return cls._window(name, "global_pool", (ch, ch), hw, (hw, ONE), op="avg")

    @classmethod
    def linear(cls, name: str, *, in_ch: int, out_ch: int) -> Layer:
        """A fully connected layer with a bias, on a 1×1 map."""
        return cls._window(name, "linear", (in_ch, out_ch), ONE, (ONE, ONE), bias=True)

    @classmethod
    def _window(
        cls, name: str, kind: str, channels: Pair, window: Pair, hws: tuple[Pair, Pair], **flags
    ) -> Layer:
        """A layer that moves ``window`` by itself, unpadded and undilated, in one group."""
        (in_ch, out_ch), (in_hw, out_hw) = channels, hws
        return cls(
            name, kind, in_ch, out_ch, window, window, NO_PADDING, ONE, 1, in_hw, out_hw, **flags
        )


@dataclass(frozen=True)
class Block:
    """One slot's layers (or a pooling step, or the head). ``residual`` adds the input back."""

    name: str
    layers: tuple[Layer, ...]
    residual: bool = False


@dataclass(frozen=True)
class Layout:
    variant: str
    in_shape: tuple[int, int, int]  # C, H, W
    n_classes: int
    blocks: tuple[Block, ...]
    norm: str
    norm_groups: int
    act: str
    dropout: float

    @property
    def layers(self) -> tuple[Layer, ...]:
        return tuple(layer for block in self.blocks for layer in block.layers)

    @property
    def signature(self) -> tuple:
        """Everything that makes the built network what it is, without names: equal
        signatures build equal modules (``"3:stack"`` and ``"3"`` both give one 3×3 conv)."""
        return tuple(
            (block.residual, tuple(dataclasses.replace(layer, name="") for layer in block.layers))
            for block in self.blocks
        )


class _Cursor:
    """Threads channels and feature-map size through the layers as they are laid out."""

    def __init__(self, variant: str, network: NetworkSpec, in_shape: tuple[int, int, int]):
        self.variant, self.network = variant, network
        self.ch, self.hw = in_shape[0], (in_shape[1], in_shape[2])

    def conv(
        self,
        name: str,
        out_ch: int,
        kernel: Pair,
        stride: Pair = (1, 1),
        dilation: Pair = (1, 1),
        groups: int = 1,
    ) -> Layer:
        policy = self.network.padding
        padding = get_padding(kernel, dilation, policy)
        extent = (dilation[0] * (kernel[0] - 1) + 1, dilation[1] * (kernel[1] - 1) + 1)
        if policy == "valid" and (extent[0] > self.hw[0] or extent[1] > self.hw[1]):
            raise PlanError(
                f"variant {self.variant}: layer {name} has a {kernel[0]}×{kernel[1]} kernel "
                f"(extent {extent[0]}×{extent[1]}) but its input is only "
                f"{self.hw[0]}×{self.hw[1]} under valid padding"
            )
        for axis in (0, 1):
            if extent[axis] > EXTENT_PER_SIDE * self.hw[axis]:
                raise PlanError(
                    f"variant {self.variant}: layer {name} has a {kernel[0]}×{kernel[1]} "
                    f"kernel (extent {extent[0]}×{extent[1]}) on a {self.hw[0]}×{self.hw[1]} "
                    f"input; kablate allows an extent of at most {EXTENT_PER_SIDE}× the input "
                    f"side ({EXTENT_PER_SIDE * self.hw[axis]} here): past 2·"
                    f"{self.hw[axis]} − 1 = {2 * self.hw[axis] - 1} its taps only ever "
                    "multiply padding, and the cost still grows with k²"
                )
        return self._emit(
            Layer.conv(
                name,
                in_ch=self.ch,
                out_ch=out_ch,
                kernel=kernel,
                stride=stride,
                padding=padding,
                dilation=dilation,
                groups=groups,
                in_hw=self.hw,
                out_hw=self._out(name, kernel, stride, padding, dilation),
                norm=self.network.norm != "none",
            )
        )

    def pool(self, name: str, op: str) -> Layer:
        out = self._out(name, (2, 2), (2, 2), NO_PADDING, ONE)
        return self._emit(
            Layer.pool(name, op=op, ch=self.ch, window=(2, 2), in_hw=self.hw, out_hw=out)
        )

    def head(self, n_classes: int) -> tuple[Layer, Layer]:
        pool = self._emit(Layer.global_pool("head.pool", ch=self.ch, hw=self.hw))
        fc = self._emit(Layer.linear("head.fc", in_ch=self.ch, out_ch=n_classes))
        return pool, fc

    def _out(self, name: str, kernel: Pair, stride: Pair, padding: Quad, dilation: Pair) -> Pair:
        out = (
            conv_out_size(self.hw[0], kernel[0], stride[0], padding[0] + padding[1], dilation[0]),
            conv_out_size(self.hw[1], kernel[1], stride[1], padding[2] + padding[3], dilation[1]),
        )
        if out[0] < 1 or out[1] < 1:
            raise PlanError(
                f"variant {self.variant}: layer {name} would make a feature map smaller than "
                f"1×1 (input {self.hw[0]}×{self.hw[1]}, kernel {kernel[0]}×{kernel[1]}, "
                f"stride {stride[0]}×{stride[1]})"
            )
        return out

    def _emit(self, layer: Layer) -> Layer:
        self.ch, self.hw = layer.out_ch, layer.out_hw
        return layer


def unit_layers(cur: _Cursor, name: str, spec: KernelSpec, out_ch: int, stride: int) -> list[Layer]:
    """The layers that one slot becomes under a kernel spec's form."""
    k, d, s = (spec.kh, spec.kw), (spec.dilation, spec.dilation), (stride, stride)
    if spec.form == "dense":
        return [cur.conv(name, out_ch, k, s, d)]
    if spec.form == "stack":
        # the stride goes on the last 3×3, so that the stack sees exactly what the k×k sees
        n = stack_depth(spec)
        return [
            cur.conv(f"{name}.s{i}", out_ch, (3, 3), s if i == n - 1 else (1, 1), d)
            for i in range(n)
        ]
    if spec.form == "split":
        return [
            cur.conv(f"{name}.v", out_ch, (spec.kh, 1), (stride, 1), (spec.dilation, 1)),
            cur.conv(f"{name}.h", out_ch, (1, spec.kw), (1, stride), (1, spec.dilation)),
        ]
    if spec.form == "depthwise":
        in_ch = cur.ch
        return [
            cur.conv(f"{name}.dw", in_ch, k, s, d, groups=in_ch),
            cur.conv(f"{name}.pw", out_ch, (1, 1)),
        ]
    if spec.form == "bottleneck":
        mid = max(1, out_ch // spec.ratio)
        return [
            cur.conv(f"{name}.reduce", mid, (1, 1)),
            cur.conv(f"{name}.spatial", mid, k, s, d),
            cur.conv(f"{name}.expand", out_ch, (1, 1)),
        ]
    raise AssertionError(f"unknown form {spec.form}")  # the grammar admits no other form


def layout_network(
    network: NetworkSpec, variant: Variant, in_shape: tuple[int, int, int], n_classes: int
) -> Layout:
    """Lay out ``variant`` on an input of ``in_shape``.

    Raises:
        PlanError: a feature map smaller than 1×1, or a kernel larger than its input under
            ``valid`` padding, naming the variant, the layer, the input size and the kernel.
    """
    cur = _Cursor(variant.name, network, in_shape)
    slots = {slot.name: slot for slot in list_slots(network)}
    stem = variant.kernels["stem"]
    stem_stride = stem.stride or network.stem.stride  # a plan's "11s4" overrides the network's
    blocks = [
        Block("stem", tuple(unit_layers(cur, "stem", stem, network.stem.out_ch, stem_stride)))
    ]
    for stage, stage_name in zip(network.stages, stage_names(network), strict=True):
        if stage.n_convs == 0 and stage.down not in ("maxpool", "avgpool"):
            raise PlanError(
                f"network stage {stage_name} has no convs (n_convs = 0), so it is a bare "
                f'pooling step and its `down` must be "maxpool" or "avgpool", but got '
                f'"{stage.down}"'
            )
        if stage.down in ("maxpool", "avgpool"):
            pool = cur.pool(f"{stage_name}.pool", stage.down[:3])
            blocks.append(Block(pool.name, (pool,)))
        for i in range(stage.n_convs):
            name = f"{stage_name}.{i}"
            assert name in slots
            stride = 2 if (stage.down == "stride" and i == 0) else 1
            in_ch, in_hw = cur.ch, cur.hw
            layers = unit_layers(cur, name, variant.kernels[name], stage.out_ch, stride)
            same_shape = (in_ch, in_hw) == (cur.ch, cur.hw)
            blocks.append(Block(name, tuple(layers), residual=stage.residual and same_shape))
    blocks.append(Block("head", cur.head(n_classes)))
    return Layout(
        variant=variant.name,
        in_shape=in_shape,
        n_classes=n_classes,
        blocks=tuple(blocks),
        norm=network.norm,
        norm_groups=network.norm_groups,
        act=network.act,
        dropout=network.dropout,
    )
