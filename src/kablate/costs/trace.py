"""Trace any module into a `torch.fx` graph and record every node's output shape.

This is how kablate sees a network it did not build (the user's own model, a torchvision or
timm one). `kablate.costs.graph` counts costs from what this module records.

Contract of `trace_model`:
- The graph is traced in eval mode (auxiliary training heads and dropout do not run) and the
  module's own training flag is restored afterwards.
- A submodule whose forward cannot be traced symbolically (data-dependent control flow, calls
  that `torch.fx` refuses) is kept whole, as one opaque node, and named in ``opaque``. Its
  conv and linear MACs are counted by `torch.utils.flop_counter.FlopCounterMode` while shapes
  are propagated; what happens inside it is otherwise unknown.
- Shapes come from one forward pass at batch 1 on the module's own device. On the ``meta``
  device that pass computes nothing, so a large model is measured in moments.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import torch
from torch import fx, nn
from torch.utils.flop_counter import FlopCounterMode

from kablate.errors import UsageError

MAX_OPAQUE = 50  # give up when this many submodules refuse to trace: the model is not traceable


@dataclass
class TracedModel:
    """A traced module, the output shape of every node, and what could not be traced."""

    module: fx.GraphModule
    shapes: dict[str, tuple[int, ...] | None]  # node name → tensor shape (None: not a tensor)
    opaque: list[str] = field(default_factory=list)  # module paths kept whole
    opaque_macs: dict[str, int] = field(default_factory=dict)  # module path → MACs inside


class _Tracer(fx.Tracer):
    """torch.fx's tracer, told to keep some submodules whole, and remembering where it was
    when tracing failed (the innermost module being traced)."""

    def __init__(self, opaque: set[str]):
        super().__init__()
        self.opaque = opaque
        self.stack: list[str] = []
        self.failed_in: str | None = None

    def is_leaf_module(self, m: nn.Module, module_qualified_name: str) -> bool:
        return module_qualified_name in self.opaque or super().is_leaf_module(
            m, module_qualified_name
        )

    def call_module(self, m, forward, args, kwargs):
        path = self.path_of_module(m)
        self.stack.append(path)
        try:
            return super().call_module(m, forward, args, kwargs)
        except Exception:
            if self.failed_in is None:
                self.failed_in = path  # the innermost frame sees the error first
            raise
        finally:
            self.stack.pop()


def _symbolic_graph(model: nn.Module) -> tuple[fx.GraphModule, list[str]]:
    opaque: set[str] = set()
    while True:
        tracer = _Tracer(opaque)
        try:
            graph = tracer.trace(model)
            return fx.GraphModule(tracer.root, graph), sorted(opaque)
        except Exception as exc:
            where = tracer.failed_in
            if not where or where in opaque or len(opaque) >= MAX_OPAQUE:
                name = type(model).__name__
                raise UsageError(
                    f"torch.fx cannot trace the model {name} ({type(exc).__name__}: "
                    f"{str(exc).splitlines()[0] if str(exc) else 'no message'}); its costs "
                    "cannot be measured. Make its forward traceable (no branching on tensor "
                    "values) or measure a traceable part of it"
                ) from None
            opaque.add(where)


class _ShapeRecorder(fx.Interpreter):
    def __init__(self, module: fx.GraphModule, opaque: list[str]):
        super().__init__(module)
        self.opaque = set(opaque)
        self.shapes: dict[str, tuple[int, ...] | None] = {}
        self.opaque_macs: dict[str, int] = {}

    def run_node(self, n: fx.Node):
        result = super().run_node(n)
        self.shapes[n.name] = tuple(result.shape) if isinstance(result, torch.Tensor) else None
        return result

    def call_module(self, target, args, kwargs):
        if target not in self.opaque:
            return super().call_module(target, args, kwargs)
        counter = FlopCounterMode(display=False)
        with counter:
            out = super().call_module(target, args, kwargs)
        self.opaque_macs[target] = counter.get_total_flops() // 2
        return out


def model_device(model: nn.Module) -> torch.device:
    first = next(iter(model.parameters()), None)
    return first.device if first is not None else torch.device("cpu")


def trace_model(model: nn.Module, in_shape: tuple[int, int, int]) -> TracedModel:
    """Trace ``model`` and propagate an input of shape ``in_shape`` (C, H, W) at batch 1.

    Raises:
        UsageError: the model cannot be traced at all, or it refuses the input shape.
    """
    was_training = model.training
    model.eval()
    try:
        module, opaque = _symbolic_graph(model)
        recorder = _ShapeRecorder(module, opaque)
        x = torch.zeros(1, *in_shape, device=model_device(model))
        try:
            with torch.no_grad():
                recorder.run(x)
        except Exception as exc:
            c, h, w = in_shape
            raise UsageError(
                f"the model {type(model).__name__} fails on an input of {c}x{h}x{w} "
                f"({type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''}); "
                "check --input: the channels must match its first layer and the size must "
                "be large enough for its downsampling"
            ) from None
    finally:
        model.train(was_training)
    return TracedModel(module, recorder.shapes, opaque, recorder.opaque_macs)
