"""Training-step activation memory: the bytes autograd keeps from the forward pass for backward.

The estimate walks the layout and, op by op, adds the tensors that PyTorch's autograd formulas
save (``tools/autograd/derivatives.yaml`` in the PyTorch sources), each tensor once:

- a conv saves its input; an asymmetric (even-kernel) pad makes a padded copy, which it saves
  instead (the pad itself saves nothing);
- batch norm saves its input plus a mean and an inverse std per channel (once per batch);
  group norm saves its input plus a mean and an inverse std per sample and group;
- ReLU saves its output; GELU and SiLU save their input;
- max-pool saves its input and int64 indices of its output; avg-pool saves its input;
- the head's global average pool is a mean, which saves nothing; dropout (on CPU) saves its
  fp32 noise; the linear layer saves its input;
- residual additions save nothing.

Parameters, buffers, gradients and optimiser state are not activations and are not counted.
Tests compare the estimate with what ``torch.autograd.graph.saved_tensors_hooks`` sees.

Inference memory (`inference_peak_bytes`) is a different figure: with no autograd nothing is
saved, and what counts is how many activation bytes are alive *at once*. It is measured, not
estimated: one eager forward pass at batch 1 under ``torch.no_grad``, watched at the ATen
operator level (a ``TorchDispatchMode``), taking after every operator the bytes of the distinct
tensor storages that are still referenced, the input included, and keeping the largest. For a
plain chain this is the input plus the largest (layer input + layer output) pair; a residual
block adds the skip tensor it holds. The same definition, peak of live activations with the
input and output of the running layer, is the one used in the design of networks for
microcontrollers (common practice; e.g. Lin et al. 2020, MCUNet, from memory). Buffers that an
operator allocates inside itself (oneDNN's scratch space) are not visible and not counted.
"""

from __future__ import annotations

import weakref
from dataclasses import dataclass

import torch
from torch.utils._python_dispatch import TorchDispatchMode
from torch.utils._pytree import tree_flatten

from kablate.nets.build import norm_groups_for
from kablate.nets.layout import Layer, Layout
from kablate.nets.padding import is_symmetric

FLOAT_BYTES = 4  # fp32 activations
INDEX_BYTES = 8  # int64 max-pool indices
NOISE_BYTES = 4  # on CPU, dropout multiplies by a saved fp32 noise tensor
# Bytes per stored weight: fp32 as trained, int8 after quantization (whose per-tensor or
# per-channel scales and zero points, and int32 biases, are not counted).
WEIGHT_BYTES = {"fp32": 4, "int8": 1}


def weight_bytes(params: int, dtype: str) -> int:
    """Bytes of ``params`` weights stored as ``dtype`` (a key of `WEIGHT_BYTES`)."""
    return params * WEIGHT_BYTES[dtype]


@dataclass
class _Tally:
    """Bytes saved so far, and whether the tensor flowing forward is already among them."""

    per_sample: int
    per_batch: int = 0
    current: int = 0  # bytes per sample of the tensor flowing forward
    current_saved: bool = False

    def flow(self, n_bytes: int) -> None:
        """A new tensor comes out of an op (not saved yet)."""
        self.current, self.current_saved = n_bytes, False

    def save_current(self) -> None:
        if not self.current_saved:
            self.per_sample += self.current
            self.current_saved = True


def _map_bytes(ch: int, hw: tuple[int, int]) -> int:
    return ch * hw[0] * hw[1] * FLOAT_BYTES


def _conv(tally: _Tally, layout: Layout, layer: Layer) -> None:
    top, bottom, left, right = layer.padding
    if not is_symmetric(layer.padding):
        padded = (layer.in_hw[0] + top + bottom, layer.in_hw[1] + left + right)
        tally.flow(_map_bytes(layer.in_ch, padded))
    tally.save_current()  # the conv's input, for the weight gradient
    out = _map_bytes(layer.out_ch, layer.out_hw)
    tally.flow(out)
    if layer.norm and layout.norm == "batch":
        tally.save_current()
        tally.per_batch += 2 * layer.out_ch * FLOAT_BYTES
        tally.flow(out)
    elif layer.norm and layout.norm == "group":
        tally.save_current()
        tally.per_sample += 2 * norm_groups_for(layer.out_ch, layout.norm_groups) * FLOAT_BYTES
        tally.flow(out)
    if layer.act and layout.act == "relu":
        tally.flow(out)
        tally.save_current()  # ReLU's backward needs only its output
    elif layer.act:
        tally.save_current()  # GELU and SiLU need their input
        tally.flow(out)


def saved_activation_bytes(layout: Layout, batch_size: int) -> int:
    """Bytes of the tensors one training step's forward pass keeps for backward."""
    c, h, w = layout.in_shape
    tally = _Tally(per_sample=0)
    tally.flow(_map_bytes(c, (h, w)))
    for block in layout.blocks:
        for layer in block.layers:
            out = _map_bytes(layer.out_ch, layer.out_hw)
            if layer.kind == "conv":
                _conv(tally, layout, layer)
            elif layer.kind == "pool":
                tally.save_current()
                if layer.op == "max":
                    tally.per_sample += out // FLOAT_BYTES * INDEX_BYTES
                tally.flow(out)
            elif layer.kind == "global_pool":
                tally.flow(out)  # a mean over H and W saves only the shape
                if layout.dropout:
                    tally.per_sample += layer.out_ch * NOISE_BYTES
                    tally.flow(out)
            elif layer.kind == "linear":
                tally.save_current()
                tally.flow(out)
        if block.residual:
            tally.flow(tally.current)  # x + y: a new tensor; the addition saves nothing
    return tally.per_sample * batch_size + tally.per_batch


def measure_saved_bytes(
    model: torch.nn.Module, in_shape: tuple[int, int, int], batch_size: int
) -> int:
    """Bytes of the distinct tensors autograd saves in one training forward pass of ``model``
    at ``batch_size``, seen through ``torch.autograd.graph.saved_tensors_hooks`` (parameters
    and buffers left out): the measured counterpart of `saved_activation_bytes`.

    Two passes, at batch 2 and 3, give the bytes per sample and per batch (batch norm's
    statistics), so a large batch is never run. Batch norm's running statistics are restored.
    """
    device = next(iter(model.parameters()), torch.empty(0)).device
    was_training = model.training
    kept = {name: b.clone() for name, b in model.named_buffers()}
    try:
        model.train()
        two, three = (
            saved_bytes_of(model, torch.zeros(n, *in_shape, device=device)) for n in (2, 3)
        )
    finally:
        model.train(was_training)
        with torch.no_grad():
            for name, b in model.named_buffers():
                b.copy_(kept[name])
    per_sample = three - two
    return two - 2 * per_sample + batch_size * per_sample


def saved_bytes_of(model: torch.nn.Module, x: torch.Tensor) -> int:
    """Bytes of the distinct tensors autograd saves while ``model(x)`` runs."""
    state = {t.untyped_storage().data_ptr() for t in [*model.parameters(), *model.buffers()]}
    saved: dict[int, int] = {}

    def pack(tensor: torch.Tensor) -> torch.Tensor:
        storage = tensor.untyped_storage()
        if storage.data_ptr() not in state:
            saved[storage.data_ptr()] = storage.nbytes()
        return tensor

    with torch.autograd.graph.saved_tensors_hooks(pack, lambda tensor: tensor):
        model(x)
    return sum(saved.values())


class _LiveBytes(TorchDispatchMode):
    """After every ATen operator: the bytes of the distinct storages still referenced by a
    tensor that an operator produced (or the input), and the largest such sum."""

    def __init__(self, x: torch.Tensor):
        super().__init__()
        self.tensors: dict[int, tuple[int, list[weakref.ref]]] = {}  # storage → bytes, refs
        self.peak = 0
        self._track([x])

    def _track(self, tensors: list) -> None:
        dead = [k for k, (_, refs) in self.tensors.items() if all(r() is None for r in refs)]
        for key in dead:  # before adding: a freed address may be reused by a new output
            del self.tensors[key]
        for t in tensors:
            if isinstance(t, torch.Tensor):
                storage = t.untyped_storage()
                entry = self.tensors.setdefault(storage.data_ptr(), (storage.nbytes(), []))
                entry[1].append(weakref.ref(t))
        self.peak = max(self.peak, sum(n for n, _ in self.tensors.values()))

    def __torch_dispatch__(self, func, types, args=(), kwargs=None):
        out = func(*args, **(kwargs or {}))
        self._track(tree_flatten(out)[0])
        return out


def inference_peak_bytes(model: torch.nn.Module, in_shape: tuple[int, int, int]) -> int:
    """Peak bytes of live activations in one eval-mode forward pass of ``model`` at batch 1,
    the input included (see the module docstring)."""
    was_training = model.training
    model.eval()
    x = torch.zeros(1, *in_shape)
    try:
        with torch.no_grad(), _LiveBytes(x) as watch:
            model(x)
    finally:
        model.train(was_training)
    return watch.peak
