"""Static costs of any model that `torch.fx` can trace: the user's own, torchvision's, timm's.

The same costs and conventions as `kablate.costs.static` gives our own networks (sweeps/README.md,
"Cost conventions"), taken from the traced graph instead of a layout:

- params: every parameter of the model, counted once (``sum(p.numel())``), including those of
  modules the traced forward does not use (auxiliary heads);
- MACs: conv and linear layers, module or functional form, per sample; FLOPs = 2 × MACs;
- rf and jump: at the map the head reduces (its global pool or flatten), from
  `kablate.costs.reach`; ``None`` when a step on the way cannot be derived;
- act_mem_bytes: measured, as `kablate.costs.memory.measure_saved_bytes` sees autograd save,
  for one training step at ``batch_size``.

``layers`` lists the conv, linear and pooling layers, and the opaque modules (kind
``opaque``, their MACs from torch's flop counter, kernel and stride 0 as unknown). Norms and
other parameters are in ``params`` but not in ``layers``.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import torch
import torch.nn.functional as F
from torch import fx, nn

from kablate.costs.memory import measure_saved_bytes
from kablate.costs.reach import Reach, Walk, pair, pool_window, walk_reach
from kablate.costs.static import LayerCost
from kablate.costs.trace import TracedModel, model_device, trace_model
from kablate.nets.layout import Layer
from kablate.nets.padding import Quad, get_padding

NO_REACH = None  # rf and jump of a layer row whose reach is unknown (null in JSON)


@dataclass(frozen=True)
class GraphCost:
    """The costs of one traced model; field names and meanings as in `StaticCost`."""

    layers: tuple[LayerCost, ...]
    params: int
    macs: int
    rf: int | None
    jump: int | None
    out_hw: tuple[int, int] | None
    act_mem_bytes: int | None  # None when not measured (a model on the meta device)
    notes: tuple[str, ...] = field(default=())

    @property
    def flops(self) -> int:
        return 2 * self.macs


def _quad(padding, kernel, dilation) -> Quad:
    if isinstance(padding, str):
        return get_padding(kernel, dilation, padding)
    ph, pw = (padding, padding) if isinstance(padding, int) else padding
    return (ph, ph, pw, pw)


def _hw(shape: tuple[int, ...] | None) -> tuple[int, int]:
    return (shape[2], shape[3]) if shape is not None and len(shape) == 4 else (1, 1)


def _own_params(m: nn.Module) -> int:
    return sum(p.numel() for p in m.parameters())


def _per_sample(shape: tuple[int, ...]) -> int:
    n = 1
    for size in shape[1:]:
        n *= size
    return n


class _Rows:
    """Turns graph nodes into layer rows (conv, linear, pool, global_pool, opaque)."""

    def __init__(self, traced: TracedModel, walk: Walk):
        self.traced, self.walk = traced, walk
        self.shapes = traced.shapes
        self.modules = dict(traced.module.named_modules())

    def reach_of(self, node: fx.Node) -> tuple[tuple[int, int], tuple[int, int]]:
        reach = self.walk.reach.get(node.name)
        if isinstance(reach, Reach) and reach.known and reach.axes is not None:
            return reach.rf, reach.jump  # type: ignore[return-value]
        return NO_REACH, NO_REACH

    def row(self, node: fx.Node, kind: str, window, channels, params: int, macs: int, **extra):
        kernel, stride, padding, dilation, groups = window
        src, out = self.shapes[node.all_input_nodes[0].name], self.shapes[node.name]
        layer = Layer(
            name=str(node.target) if node.op == "call_module" else node.name,
            kind=kind,
            in_ch=channels[0],
            out_ch=channels[1],
            kernel=kernel,
            stride=stride,
            padding=padding,
            dilation=dilation,
            groups=groups,
            in_hw=_hw(src),
            out_hw=_hw(out),
            **extra,
        )
        rf, jump = self.reach_of(node)
        return LayerCost(layer, params, macs, rf, jump)

    def conv(self, node, m: nn.Conv2d) -> LayerCost:
        out = self.shapes[node.name]
        per_output = (m.in_channels // m.groups) * m.kernel_size[0] * m.kernel_size[1]
        padding = _quad(m.padding, m.kernel_size, m.dilation)
        window = (m.kernel_size, m.stride, padding, m.dilation, m.groups)
        channels = (m.in_channels, m.out_channels)
        macs = _per_sample(out) * per_output
        return self.row(
            node, "conv", window, channels, _own_params(m), macs, bias=m.bias is not None
        )

    def functional_conv(self, node) -> LayerCost:
        weight = self.shapes[node.args[1].name]
        named = dict(zip(("stride", "padding", "dilation", "groups"), node.args[3:], strict=False))
        named |= node.kwargs
        kernel, dilation = (weight[2], weight[3]), pair(named.get("dilation", 1))
        groups = named.get("groups", 1)
        window = (
            kernel,
            pair(named.get("stride", 1)),
            _quad(named.get("padding", 0), kernel, dilation),
            dilation,
            groups,
        )
        macs = _per_sample(self.shapes[node.name]) * weight[1] * kernel[0] * kernel[1]
        return self.row(node, "conv", window, (weight[1] * groups, weight[0]), 0, macs)

    def linear(self, node, in_features: int, out_features: int, params: int) -> LayerCost:
        macs = _per_sample(self.shapes[node.name]) * in_features
        window = ((1, 1), (1, 1), (0, 0, 0, 0), (1, 1), 1)
        return self.row(node, "linear", window, (in_features, out_features), params, macs)

    def pool(self, node, kind: str, kernel, stride, dilation, padding, op: str) -> LayerCost:
        ch = self.shapes[node.name][1]
        window = (kernel, stride, _quad(padding, kernel, dilation), dilation, 1)
        return self.row(node, kind, window, (ch, ch), 0, 0, op=op)

    def opaque(self, node) -> LayerCost:
        src, out = self.shapes[node.all_input_nodes[0].name], self.shapes[node.name]
        channels = (src[1] if src else 0, out[1] if out and len(out) > 1 else 0)
        window = ((0, 0), (0, 0), (0, 0, 0, 0), (0, 0), 1)
        m = self.modules[node.target]
        macs = self.traced.opaque_macs.get(node.target, 0)
        return self.row(node, "opaque", window, channels, _own_params(m), macs)

    def of(self, node: fx.Node) -> LayerCost | None:
        if node.op == "call_module":
            m = self.modules[node.target]
            if node.target in self.traced.opaque:
                return self.opaque(node)
            if isinstance(m, nn.Conv2d):
                return self.conv(node, m)
            if isinstance(m, nn.Linear):
                return self.linear(node, m.in_features, m.out_features, _own_params(m))
            if isinstance(m, nn.MaxPool2d | nn.AvgPool2d):
                op = "max" if isinstance(m, nn.MaxPool2d) else "avg"
                kernel = pair(m.kernel_size)
                dilation = pair(m.dilation) if op == "max" else (1, 1)
                return self.pool(
                    node, "pool", kernel, pair(m.stride or kernel), dilation, m.padding, op
                )
            if isinstance(m, nn.AdaptiveAvgPool2d | nn.AdaptiveMaxPool2d):
                return self.global_pool(
                    node, "avg" if isinstance(m, nn.AdaptiveAvgPool2d) else "max"
                )
            return None
        if node.op != "call_function":
            return None
        if node.target in (F.conv2d, torch.conv2d):
            return self.functional_conv(node)
        if node.target is F.linear:
            weight = self.shapes[node.args[1].name]
            return self.linear(node, weight[1], weight[0], 0)
        if node.target in (F.max_pool2d, F.avg_pool2d):
            kernel, stride, dilation = pool_window(node.target, node.args, node.kwargs)
            op = "max" if node.target is F.max_pool2d else "avg"
            padding = node.kwargs.get("padding", node.args[3] if len(node.args) > 3 else 0)
            return self.pool(node, "pool", kernel, stride, dilation, padding, op)
        if node.target in (F.adaptive_avg_pool2d, F.adaptive_max_pool2d):
            return self.global_pool(node, "avg" if node.target is F.adaptive_avg_pool2d else "max")
        return None

    def global_pool(self, node, op: str) -> LayerCost:
        """An adaptive pool: a global pool when it ends the map, a plain one otherwise."""
        src = _hw(self.shapes[node.all_input_nodes[0].name])
        out = _hw(self.shapes[node.name])
        kind = "global_pool" if out == (1, 1) else "pool"
        stride = (src[0] // out[0], src[1] // out[1])
        return self.pool(
            node, kind, src if kind == "global_pool" else stride, stride, (1, 1), 0, op
        )


def graph_cost(
    model: nn.Module, in_shape: tuple[int, int, int], batch_size: int | None = 1
) -> GraphCost:
    """Params, MACs, receptive field and activation memory of ``model`` on ``in_shape``.

    Args:
        model: any module; on the ``meta`` device nothing is computed (and memory is not
            measured).
        in_shape: the input (C, H, W).
        batch_size: the batch that activation memory is given for; None to skip measuring it.

    Raises:
        UsageError: the model cannot be traced, or it fails on ``in_shape``.
    """
    traced = trace_model(model, in_shape)
    walk = walk_reach(traced.module, traced.shapes, traced.opaque)
    rows_of = _Rows(traced, walk)
    rows = tuple(r for r in map(rows_of.of, traced.module.graph.nodes) if r is not None)
    head = walk.head_reach
    rf = max(head.rf) if head is not None and head.rf is not None else None
    jump = max(head.jump) if head is not None and head.jump is not None else None
    memory = None
    if batch_size is not None and model_device(model).type != "meta":
        memory = measure_saved_bytes(model, in_shape, batch_size)
    return GraphCost(
        layers=rows,
        params=sum(p.numel() for p in model.parameters()),
        macs=sum(r.macs for r in rows),
        rf=rf,
        jump=jump,
        out_hw=walk.head_hw,
        act_mem_bytes=memory,
        notes=tuple(_notes(traced, walk)),
    )


def _notes(traced: TracedModel, walk: Walk) -> list[str]:
    notes = [f"{path}: torch.fx cannot trace it; its insides are unknown" for path in traced.opaque]
    notes += [
        f"rf unknown after {where}: its receptive field is not derived" for where in walk.unknown
    ]
    if walk.gates:
        notes.append(
            f"{len(walk.gates)} gates ({walk.gates[0]}, ...) reduce a whole map and scale it "
            "back (squeeze-and-excitation); rf counts the conv paths, not the gates"
        )
    if walk.head is None:
        notes.append("no global pool or flatten ends the feature maps: rf and out_hw unknown")
    return notes
