"""Static costs of a layout, computed before anything trains.

Conventions (also in sweeps/README.md):
- MACs count the multiply-accumulates of conv and linear layers only; FLOPs = 2 × MACs.
  Norms, activations, pooling and residual adds are excluded (they are O(activations), not
  O(weights × activations)). This matches what ``torch.utils.flop_counter`` counts.
- Params include each conv's norm parameters (2 per channel for batch and group norm), which
  are folded into that conv's row. BatchNorm running statistics are buffers, not params.
- The receptive field follows the recurrence of Araujo, Norris & Sim 2019 (Distill):
  r ← r + (k_eff − 1)·j and j ← j·s per layer, with k_eff = d·(k − 1) + 1. Residual shortcuts
  never see further than the main path, so the main path gives the receptive field.
- Activation memory is what autograd keeps for backward in one training step; see
  `kablate.costs.memory`.
"""

from __future__ import annotations

from dataclasses import dataclass

from kablate.costs.memory import saved_activation_bytes
from kablate.nets.layout import Layer, Layout


@dataclass(frozen=True)
class LayerCost:
    layer: Layer
    params: int
    macs: int
    rf: tuple[int, int]  # receptive field of one output pixel of this layer, in input pixels
    jump: tuple[int, int]  # distance in input pixels between adjacent outputs (effective stride)


@dataclass(frozen=True)
class StaticCost:
    layout: Layout
    layers: tuple[LayerCost, ...]
    params: int
    macs: int
    rf: int  # at the input of the head's global pool (max over the two axes)
    rf_hw: tuple[int, int]
    jump: int
    out_hw: tuple[int, int]  # the feature map the head pools over
    act_mem_bytes: int  # saved for backward by one training step at ``batch_size``

    @property
    def flops(self) -> int:
        return 2 * self.macs


def count_params(layer: Layer, norm: str) -> int:
    if layer.kind == "conv":
        weights = layer.out_ch * (layer.in_ch // layer.groups) * layer.kernel[0] * layer.kernel[1]
        norm_params = 2 * layer.out_ch if layer.norm and norm != "none" else 0
        return weights + (layer.out_ch if layer.bias else 0) + norm_params
    if layer.kind == "linear":
        return layer.in_ch * layer.out_ch + (layer.out_ch if layer.bias else 0)
    return 0


def count_macs(layer: Layer) -> int:
    if layer.kind == "conv":
        per_output = (layer.in_ch // layer.groups) * layer.kernel[0] * layer.kernel[1]
        return layer.out_hw[0] * layer.out_hw[1] * layer.out_ch * per_output
    if layer.kind == "linear":
        return layer.in_ch * layer.out_ch
    return 0


def reach(layout: Layout) -> list[tuple[Layer, tuple[int, int], tuple[int, int]]]:
    """Receptive-field arithmetic (Araujo, Norris & Sim 2019), layer by layer: each layer with
    the receptive field and jump of one of its outputs. A conv or pool layer grows the field
    by (k_eff − 1)·jump, k_eff = d·(k − 1) + 1, and multiplies the jump by its stride; other
    layers leave both as they are. The one home of this recurrence: the effective receptive
    field's geometry reads it from here."""
    rf, jump = [1, 1], [1, 1]
    out = []
    for layer in layout.layers:
        if layer.kind in ("conv", "pool"):
            for axis in (0, 1):
                extent = layer.dilation[axis] * (layer.kernel[axis] - 1) + 1
                rf[axis] += (extent - 1) * jump[axis]
                jump[axis] *= layer.stride[axis]
        out.append((layer, (rf[0], rf[1]), (jump[0], jump[1])))
    return out


def static_cost(layout: Layout, batch_size: int) -> StaticCost:
    """Params, MACs, receptive field, shapes and activation memory of ``layout``."""
    rows, head_rf, head_jump, head_hw = [], (1, 1), (1, 1), layout.in_shape[1:]
    before_rf, before_jump = (1, 1), (1, 1)
    for layer, rf, jump in reach(layout):
        if layer.kind == "global_pool":
            head_rf, head_jump, head_hw = before_rf, before_jump, layer.in_hw
        before_rf, before_jump = rf, jump
        rows.append(LayerCost(layer, count_params(layer, layout.norm), count_macs(layer), rf, jump))
    return StaticCost(
        layout=layout,
        layers=tuple(rows),
        params=sum(r.params for r in rows),
        macs=sum(r.macs for r in rows),
        rf=max(head_rf),
        rf_hw=head_rf,
        jump=max(head_jump),
        out_hw=(head_hw[0], head_hw[1]),
        act_mem_bytes=saved_activation_bytes(layout, batch_size),
    )
