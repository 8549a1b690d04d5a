"""Receptive field and jump through any traced graph: what each feature map can see.

Every node's output gets a `Reach`: its receptive field and jump (effective stride) per axis,
in input pixels, and where its spatial axes are. The rules:

- a Conv2d, MaxPool2d or AvgPool2d (module or functional form) applies the recurrence of
  Araujo, Norris & Sim 2019 (Distill): r ← r + d·(k − 1)·j and j ← j·s per axis;
- a node with several data inputs (add, mul, cat, ...) takes the maximum over its inputs, so
  the widest branch or residual path wins (the same paper's rule for multi-path networks);
- activations, norms, dropout, padding, per-position linear layers and layout ops (view, reshape,
  permute, transpose, chunk) pass the reach through, as long as the spatial axes stay whole;
- a global reduction (an adaptive pool to 1×1, a mean over both spatial axes, a flatten of a
  map larger than 1×1) ends the map. Where its result is multiplied back into a feature map
  (a squeeze-and-excitation gate), it is a gate: it sees the whole map, and it is left out of
  the receptive field, which counts the conv paths (see `Walk.gates`);
- anything else that touches a spatial map (an opaque module, an upsampling, an unknown
  function) makes the reach unknown from there on. Unknown is never guessed.
"""

from __future__ import annotations

import operator
import sys
from dataclasses import dataclass, field, replace

import torch
import torch.nn.functional as F
from torch import fx, nn

Pair = tuple[int, int]


@dataclass(frozen=True)
class Reach:
    rf: Pair | None  # None: unknown from here on
    jump: Pair | None
    axes: Pair | None  # the dims holding H and W; None once the map is reduced to a vector

    @property
    def known(self) -> bool:
        return self.rf is not None

    def through(self, kernel: Pair, stride: Pair, dilation: Pair) -> Reach:
        if self.rf is None or self.jump is None:
            return Reach(None, None, (2, 3))
        rf = tuple(self.rf[i] + dilation[i] * (kernel[i] - 1) * self.jump[i] for i in (0, 1))
        jump = tuple(self.jump[i] * stride[i] for i in (0, 1))
        return Reach(rf, jump, (2, 3))  # type: ignore[arg-type]

    def lost(self, axes: Pair | None = None) -> Reach:
        return Reach(None, None, axes)


CONSTANT = "constant"  # no input pixels reach this node (parameters, shapes, gates)

POINTWISE_MODULES = (
    nn.ReLU,
    nn.ReLU6,
    nn.LeakyReLU,
    nn.PReLU,
    nn.ELU,
    nn.SELU,
    nn.CELU,
    nn.GELU,
    nn.SiLU,
    nn.Mish,
    nn.Hardswish,
    nn.Hardsigmoid,
    nn.Hardtanh,
    nn.Sigmoid,
    nn.Tanh,
    nn.modules.batchnorm._BatchNorm,
    nn.GroupNorm,
    nn.LocalResponseNorm,  # across channels, at each position
    nn.Dropout,
    nn.Dropout2d,
    nn.AlphaDropout,
    nn.Identity,
    nn.Linear,  # acts on the last dim; checked below to be a channel dim
    nn.ZeroPad2d,  # padding adds no input pixels: rf and jump stay (the paper's convention)
    nn.ConstantPad2d,
    nn.ReflectionPad2d,
    nn.ReplicationPad2d,
)
POINTWISE_FUNCTIONS = {
    operator.add,
    operator.sub,
    operator.mul,
    operator.truediv,
    operator.neg,
    torch.add,
    torch.sub,
    torch.mul,
    torch.div,
    torch.sigmoid,
    torch.relu,
    torch.tanh,
    torch.cat,
    F.relu,
    F.relu6,
    F.gelu,
    F.silu,
    F.hardswish,
    F.hardsigmoid,
    F.sigmoid,
    F.dropout,
    F.linear,
    F.pad,
    F.batch_norm,  # traced in eval mode: running statistics, so per position
    F.group_norm,  # norms are rf-neutral by the project's convention, as nn.GroupNorm above
}
POINTWISE_METHODS = {
    "add",
    "sub",
    "mul",
    "div",
    "sigmoid",
    "relu",
    "tanh",
    "clamp",
    "contiguous",
    "add_",
    "mul_",
    "relu_",
}
LAYOUT_OPS = {"view", "reshape", torch.reshape, "flatten", torch.flatten, nn.Flatten}
REDUCE_OPS = {"mean", torch.mean, "amax", torch.amax, "sum", torch.sum}


def is_pointwise_function(target) -> bool:
    """Whether ``target`` (a call_function node's) is one of `POINTWISE_FUNCTIONS` or
    torchvision's ``stochastic_depth`` (it drops whole samples).

    That one is looked up only where torchvision is already imported: a traced graph can only
    hold it if its model imported it. Importing torchvision pulls in torch._dynamo, about
    2 CPU-s in all, which a command that trains nothing (`kablate plan`) saves; a process that
    trains imports torch._dynamo at its first optimizer step anyway (torch 2.14's
    ``torch._disable_dynamo``), so there only torchvision's own 0.15 CPU-s is saved.
    """
    if target in POINTWISE_FUNCTIONS:
        return True
    ops = sys.modules.get("torchvision.ops")
    return ops is not None and target is getattr(ops, "stochastic_depth", None)


ADAPTIVE_POOLS = (nn.AdaptiveAvgPool2d, nn.AdaptiveMaxPool2d)
ADAPTIVE_FUNCTIONS = {F.adaptive_avg_pool2d, F.adaptive_max_pool2d}
SIZE_OPS = {"size", "dim", getattr, operator.floordiv, len}


@dataclass
class Walk:
    """The reach of every node, and what the walk found on the way."""

    reach: dict[str, Reach | str] = field(default_factory=dict)
    head: fx.Node | None = None  # the first global reduction that is not a gate
    head_reach: Reach | None = None  # the reach of the map it reduces
    head_hw: Pair | None = None  # that map's size
    unknown: list[str] = field(default_factory=list)  # nodes where the reach was lost
    gates: list[str] = field(default_factory=list)  # reductions multiplied back into a map


def pool_window(target, args: tuple, kwargs: dict) -> tuple[Pair, Pair, Pair]:
    """Kernel, stride and dilation of a functional max- or avg-pool call (PyTorch's argument
    order: input, kernel_size, stride, padding, then dilation for max-pool only)."""
    names = ["input", "kernel_size", "stride", "padding"]
    if target is F.max_pool2d:
        names.append("dilation")
    bound = dict(zip(names, args, strict=False)) | kwargs
    kernel = pair(bound["kernel_size"])
    stride = pair(bound.get("stride") or kernel)
    return kernel, stride, pair(bound.get("dilation", 1))


def pair(value) -> Pair:
    return (value, value) if isinstance(value, int) else (value[0], value[1])


def _reshaped_axes(src: tuple[int, ...], axes: Pair, out: tuple[int, ...]) -> Pair | None:
    """Where H and W land after a reshape that keeps them whole, or None.

    A row-major reshape keeps H and W intact iff the output holds H, W side by side with the
    same number of elements before them as the input had.
    """
    if axes[1] != axes[0] + 1:
        return None
    before = _prod(src[: axes[0]])
    for i in range(len(out) - 1):
        if _prod(out[:i]) == before and out[i : i + 2] == src[axes[0] : axes[0] + 2]:
            return (i, i + 1)
    return None


def _prod(values) -> int:
    n = 1
    for v in values:
        n *= v
    return n


def _data_inputs(node: fx.Node, walk: Walk) -> list[Reach]:
    reaches = (walk.reach.get(a.name, CONSTANT) for a in node.all_input_nodes)
    return [r for r in reaches if isinstance(r, Reach)]


def merge(inputs: list[Reach], axes: Pair | None) -> Reach | str:
    """The widest input wins; an unknown input makes the result unknown."""
    if not inputs:
        return CONSTANT
    if not all(r.known for r in inputs):
        return Reach(None, None, axes)
    rf = tuple(max(r.rf[i] for r in inputs) for i in (0, 1))  # type: ignore[union-attr]
    jump = tuple(max(r.jump[i] for r in inputs) for i in (0, 1))  # type: ignore[union-attr]
    return Reach(rf, jump, axes)  # type: ignore[arg-type]


def _is_gate(node: fx.Node, data: set[str]) -> bool:
    """True when the reduction's result flows back into a map through a node that also takes
    data bypassing the reduction (x · gate(x)): a squeeze-and-excitation gate, not the head."""
    below, todo = {node.name}, list(node.users)
    while todo:
        user = todo.pop()
        if user.name in below:
            continue
        below.add(user.name)
        todo.extend(user.users)
    for name in below - {node.name}:
        user = next(n for n in node.graph.nodes if n.name == name)
        if any(a.name in data and a.name not in below for a in user.all_input_nodes):
            return True
    return False


class _Walker:
    """One pass over the graph in order, giving each node its reach."""

    def __init__(self, gm: fx.GraphModule, shapes: dict, opaque: list[str]):
        self.gm, self.shapes, self.opaque = gm, shapes, set(opaque)
        self.modules = dict(gm.named_modules())
        self.walk = Walk()
        self.data: set[str] = set()

    def run(self) -> Walk:
        for node in self.gm.graph.nodes:
            is_input = node.op == "placeholder" and not self.data
            if is_input or any(a.name in self.data for a in node.all_input_nodes):
                self.data.add(node.name)
            reach = self.step(node)
            inputs = _data_inputs(node, self.walk) if node.op != "placeholder" else []
            if isinstance(reach, Reach) and not reach.known and all(r.known for r in inputs):
                self.walk.unknown.append(self.describe(node))
            self.walk.reach[node.name] = reach
        return self.walk

    def describe(self, node: fx.Node) -> str:
        if node.op == "call_module":
            return f"{node.target} ({type(self.modules[node.target]).__name__})"
        target = getattr(node.target, "__name__", str(node.target))
        return f"{node.name} ({target})"

    def step(self, node: fx.Node) -> Reach | str:
        if node.op == "placeholder":
            shape = self.shapes.get(node.name)
            first = node.name in self.data
            if first and shape is not None and len(shape) == 4:
                return Reach((1, 1), (1, 1), (2, 3))
            return CONSTANT
        if node.op in ("get_attr", "output"):
            return merge(_data_inputs(node, self.walk), None) if node.op == "output" else CONSTANT
        inputs = _data_inputs(node, self.walk)
        if not inputs:
            return CONSTANT
        first = inputs[0]
        if node.op == "call_module":
            return self.module_step(node, self.modules[node.target], first, inputs)
        return self.function_step(node, first, inputs)

    def in_shape(self, node: fx.Node) -> tuple[int, ...] | None:
        return self.shapes.get(node.all_input_nodes[0].name)

    def out_shape(self, node: fx.Node) -> tuple[int, ...] | None:
        return self.shapes.get(node.name)

    def module_step(self, node, m: nn.Module, first: Reach, inputs) -> Reach | str:
        if node.target in self.opaque:
            return self.lost(node, first)
        if isinstance(m, nn.Conv2d):
            if not first.axes:
                return self.lost(node, first)
            return first.through(m.kernel_size, m.stride, m.dilation)
        if isinstance(m, nn.MaxPool2d | nn.AvgPool2d):
            kernel = pair(m.kernel_size)
            stride = pair(m.stride or kernel)
            dilation = pair(m.dilation) if isinstance(m, nn.MaxPool2d) else (1, 1)
            return first.through(kernel, stride, dilation) if first.axes else self.lost(node, first)
        if isinstance(m, ADAPTIVE_POOLS):
            return self.adaptive(node, first)
        if isinstance(m, nn.Flatten):
            return self.reshape(node, first)
        if isinstance(m, nn.LayerNorm):
            return self.normalized_over(node, first, len(m.normalized_shape))
        if isinstance(m, nn.Linear):
            return self.normalized_over(node, first, 1)
        if isinstance(m, POINTWISE_MODULES):
            return merge(inputs, first.axes)
        return self.lost(node, first)

    def function_step(self, node, first: Reach, inputs) -> Reach | str:
        target, args = node.target, node.args
        if target is operator.getitem and self.in_shape(node) is None:
            return first  # one tensor out of a chunk or split
        if target in SIZE_OPS:
            return CONSTANT  # shapes carry no pixels
        if target in (F.conv2d, torch.conv2d):
            weight = self.shapes[args[1].name]
            rest = dict(zip(("stride", "padding", "dilation"), args[3:6], strict=False))
            rest |= {k: v for k, v in node.kwargs.items() if k in ("stride", "dilation")}
            stride, dilation = pair(rest.get("stride", 1)), pair(rest.get("dilation", 1))
            return first.through((weight[2], weight[3]), stride, dilation)
        if target in (F.max_pool2d, F.avg_pool2d):
            if not first.axes:
                return self.lost(node, first)
            return first.through(*pool_window(target, args, node.kwargs))
        if target in ADAPTIVE_FUNCTIONS:
            return self.adaptive(node, first)
        if target in REDUCE_OPS:
            return self.reduce(node, first)
        if target in LAYOUT_OPS:
            return self.reshape(node, first)
        if target in ("permute", torch.permute):
            dims = args[1] if len(args) == 2 and not isinstance(args[1], int) else args[1:]
            if first.axes is None:
                return first
            dims = [d % len(dims) for d in dims]
            return replace(first, axes=(dims.index(first.axes[0]), dims.index(first.axes[1])))
        if target in ("transpose", torch.transpose):
            if first.axes is None:
                return first
            ndim = len(self.in_shape(node))
            a, b = (d % ndim for d in args[1:3])
            swap = {a: b, b: a}
            return replace(first, axes=tuple(swap.get(x, x) for x in first.axes))
        if target in ("chunk", "split", torch.chunk, torch.split):
            dim = node.kwargs.get("dim", args[2] if len(args) > 2 else 0)
            if first.axes is None or dim % 4 not in first.axes:
                return first
            return self.lost(node, first)
        if target is F.layer_norm:
            return self.normalized_over(node, first, len(args[1]))
        if is_pointwise_function(target) or target in POINTWISE_METHODS:
            if target is torch.cat and first.axes:
                dim = node.kwargs.get("dim", args[1] if len(args) > 1 else 0)
                if dim % 4 in first.axes:
                    return self.lost(node, first)
            out = self.out_shape(node)
            for a in node.all_input_nodes:
                reach = self.walk.reach[a.name]
                if isinstance(reach, Reach) and self.shapes.get(a.name) == out:
                    return merge(inputs, reach.axes)
            return merge(inputs, first.axes)
        return self.lost(node, first)

    def normalized_over(self, node, first: Reach, n_last: int) -> Reach | str:
        """Ops acting on the last ``n_last`` dims: pointwise unless those hold H or W."""
        if first.axes is None:
            return first
        ndim = len(self.in_shape(node))
        return self.lost(node, first) if max(first.axes) >= ndim - n_last else first

    def adaptive(self, node, first: Reach) -> Reach | str:
        src, out = self.in_shape(node), self.out_shape(node)
        if first.axes is None:
            return first
        if out[-2:] == (1, 1):  # also on a map already 1×1 (a small input): still the head
            return self.end_of_map(node, first)
        if out[-2:] == src[-2:]:
            return first  # a window of one pixel
        return self.lost(node, first)  # windows of varying size: no single kernel and stride

    def reduce(self, node, first: Reach) -> Reach | str:
        if first.axes is None:
            return first
        ndim = len(self.in_shape(node))
        dims = node.kwargs.get("dim", node.args[1] if len(node.args) > 1 else None)
        dims = range(ndim) if dims is None else [dims] if isinstance(dims, int) else dims
        dims = {d % ndim for d in dims}
        if set(first.axes) <= dims:
            return self.end_of_map(node, first)
        if dims & set(first.axes):
            return self.lost(node, first)  # pooled along one axis only
        keep = node.kwargs.get("keepdim", node.args[2] if len(node.args) > 2 else False)
        shift = 0 if keep else sum(d < first.axes[0] for d in dims)
        return replace(first, axes=(first.axes[0] - shift, first.axes[1] - shift))

    def reshape(self, node, first: Reach) -> Reach | str:
        if first.axes is None:
            return first
        src, out = self.in_shape(node), self.out_shape(node)
        axes = _reshaped_axes(src, first.axes, out)
        if axes is not None:
            return replace(first, axes=axes)
        h, w = src[first.axes[0]], src[first.axes[1]]
        if len(out) == 2:  # (N, features): the map is flattened for a classifier
            return self.end_of_map(node, first) if h * w > 1 else replace(first, axes=None)
        return self.lost(node, first)

    def lost(self, node, first: Reach) -> Reach:
        """The reach is unknown from this node on; a 4-d output keeps NCHW axes for later
        steps to find the head, if it is one."""
        if first.axes is None:
            return first
        out = self.out_shape(node)
        return first.lost((2, 3) if out is not None and len(out) == 4 else None)

    def end_of_map(self, node, first: Reach) -> Reach | str:
        """A global reduction: the head's pool, or a gate inside the network."""
        if _is_gate(node, self.data):
            self.walk.gates.append(self.describe(node))
            return CONSTANT
        if self.walk.head is None:
            src = self.in_shape(node)
            self.walk.head, self.walk.head_reach = node, first
            self.walk.head_hw = (src[first.axes[0]], src[first.axes[1]])
        return replace(first, axes=None)


def walk_reach(gm: fx.GraphModule, shapes: dict, opaque: list[str]) -> Walk:
    """The reach of every node of a traced graph (see the module docstring for the rules)."""
    return _Walker(gm, shapes, opaque).run()
