"""Turn a `Layout` into a torch module, layer for layer."""

from __future__ import annotations

import torch
from torch import nn

from kablate.nets.layout import Block, Layer, Layout
from kablate.nets.model_variant import ModelVariant
from kablate.nets.padding import is_symmetric

# In place where torch supports it: the activation overwrites the norm's output, which
# autograd does not need, so a training step writes one map less per conv (about 5% faster
# on a CPU, measured with tests/bench/bench_trainer.py). GELU has no in-place form.
ACTIVATIONS = {
    "relu": lambda: nn.ReLU(inplace=True),
    "gelu": nn.GELU,
    "silu": lambda: nn.SiLU(inplace=True),
}


def norm_groups_for(channels: int, wanted: int) -> int:
    """The largest group count ≤ ``wanted`` that divides ``channels`` (GroupNorm needs one)."""
    return max(g for g in range(1, min(wanted, channels) + 1) if channels % g == 0)


def make_norm(layout: Layout, channels: int) -> nn.Module:
    if layout.norm == "batch":
        return nn.BatchNorm2d(channels)
    if layout.norm == "group":
        return nn.GroupNorm(norm_groups_for(channels, layout.norm_groups), channels)
    return nn.Identity()


def make_layer(layout: Layout, layer: Layer) -> list[nn.Module]:
    """The torch modules for one layer of the layout (plus its norm and activation)."""
    mods: list[nn.Module] = []
    pad = layer.padding
    symmetric = is_symmetric(pad)
    if not symmetric:
        mods.append(nn.ZeroPad2d((pad[2], pad[3], pad[0], pad[1])))  # torch order: l, r, t, b
    if layer.kind == "conv":
        mods.append(
            nn.Conv2d(
                layer.in_ch,
                layer.out_ch,
                layer.kernel,
                stride=layer.stride,
                padding=(pad[0], pad[2]) if symmetric else 0,
                dilation=layer.dilation,
                groups=layer.groups,
                bias=layer.bias,
            )
        )
        if layer.norm:
            mods.append(make_norm(layout, layer.out_ch))
        if layer.act:
            mods.append(ACTIVATIONS[layout.act]())
    elif layer.kind == "pool":
        pool = nn.MaxPool2d if layer.op == "max" else nn.AvgPool2d
        mods.append(pool(layer.kernel, layer.stride))
    elif layer.kind == "global_pool":
        mods += [nn.AdaptiveAvgPool2d(1), nn.Flatten()]
        if layout.dropout:
            mods.append(nn.Dropout(layout.dropout))
    elif layer.kind == "linear":
        mods.append(nn.Linear(layer.in_ch, layer.out_ch, bias=layer.bias))
    return mods


class BlockModule(nn.Module):
    """A slot's layers in sequence, with the input added back when the block is residual."""

    def __init__(self, layout: Layout, block: Block):
        super().__init__()
        self.residual = block.residual
        self.body = nn.Sequential(*[m for layer in block.layers for m in make_layer(layout, layer)])

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        y = self.body(x)
        return x + y if self.residual else y


class KernelNet(nn.Module):
    """The network of one variant. Module names follow the layout's block names."""

    def __init__(self, layout: Layout):
        super().__init__()
        self.layout = layout
        self.blocks = nn.Sequential(*[BlockModule(layout, block) for block in layout.blocks])

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.blocks(x)


def build_network(
    blueprint: Layout | ModelVariant, device: str | torch.device = "cpu"
) -> nn.Module:
    """Build the module of one variant on ``device`` (``"meta"`` works for shape and FLOP
    checks): kablate's own network from its layout, or the user's rewritten model."""
    if isinstance(blueprint, ModelVariant):
        return blueprint.build(device)
    with torch.device(device):
        return KernelNet(blueprint)
