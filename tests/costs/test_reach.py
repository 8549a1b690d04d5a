"""Receptive field and jump of every node of a traced graph, against the input gradient that
torch's autograd computes: the input pixels whose change reaches one output pixel span the
receptive field, and moving the output pixel by one moves that span by the jump.

The recurrence r ← r + d·(k − 1)·j, j ← j·s is that of Araujo, Norris & Sim 2019 (Distill,
"Computing receptive fields of convolutional neural networks"). The gradient reproduces it
exactly when no gradient cancels: weights positive, no activations, average pools.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F
from torch import nn

from kablate.costs.reach import walk_reach
from kablate.costs.trace import trace_model

IN_SHAPE = (1, 64, 64)


def positive(model: nn.Module) -> nn.Module:
    model = model.double().eval()
    with torch.no_grad():
        for p in model.parameters():
            p.copy_(p.abs() + 0.1)
    return model


def span(grad: torch.Tensor, dim: int) -> tuple[int, int]:
    """First and last input row (dim 0) or column (dim 1) with a nonzero gradient."""
    reached = grad.abs().sum(dim=1 - dim).nonzero()
    return int(reached.min()), int(reached.max())


def measured(prefix, out_hw) -> tuple[tuple[int, int], tuple[int, int]]:
    """(rf, jump) per axis of the map ``prefix`` computes, from input gradients at its centre
    pixel and at the pixel one step down and right."""
    spans = []
    for shift in (0, 1):
        x = torch.zeros(1, *IN_SHAPE, dtype=torch.double, requires_grad=True)
        out = prefix(x)
        out[0, :, out_hw[0] // 2 + shift, out_hw[1] // 2 + shift].sum().backward()
        spans.append([span(x.grad[0, 0], dim) for dim in (0, 1)])
    rf = tuple(hi - lo + 1 for lo, hi in spans[0])
    jump = tuple(spans[1][d][0] - spans[0][d][0] for d in (0, 1))
    return rf, jump


def reaches(model: nn.Module) -> dict:
    traced = trace_model(model.float(), IN_SHAPE)
    walk = walk_reach(traced.module, traced.shapes, traced.opaque)
    return {name: (r, traced.shapes[name]) for name, r in walk.reach.items()}, walk


def test_every_layer_of_a_chain_reaches_what_its_gradient_reaches():
    model = nn.Sequential(
        nn.Conv2d(1, 2, (3, 5), stride=(2, 1), padding=(1, 2)),
        nn.BatchNorm2d(2),
        nn.AvgPool2d(3, stride=2, padding=1),
        nn.Conv2d(2, 2, 3, dilation=(2, 1), padding=(2, 1)),
        nn.Conv2d(2, 2, (1, 5), stride=(1, 2), padding=(0, 2), groups=2),
        nn.AdaptiveAvgPool2d(1),
        nn.Flatten(),
        nn.Linear(2, 3),
    )
    found, walk = reaches(model)
    model = positive(model)
    for k in range(5):  # every layer before the global pool
        reach, shape = found[f"_{k}"]
        rf, jump = measured(model[: k + 1], shape[2:])
        assert (reach.rf, reach.jump) == (rf, jump), f"layer {k}: {model[k]}"
    assert walk.head.name == "_5" and walk.head_reach.rf == found["_4"][0].rf
    assert found["_4"][0].rf != found["_4"][0].rf[::-1]  # the axes were told apart


class Residual(nn.Module):
    """Functional convs and pools around a residual sum: the wider path sets the reach."""

    def __init__(self):
        super().__init__()
        self.w1 = nn.Parameter(torch.randn(2, 1, 3, 3))
        self.w2 = nn.Parameter(torch.randn(2, 2, 5, 5))

    def forward(self, x):
        x = F.conv2d(x, self.w1, padding=1, stride=2)
        wide = F.avg_pool2d(F.conv2d(x, self.w2, padding=4, dilation=2), 3, stride=1, padding=1)
        return x + wide


def test_a_residual_sum_of_functional_layers_reaches_as_far_as_its_widest_path():
    found, _ = reaches(Residual())
    out, shape = found["add"]
    rf, jump = measured(positive(Residual()), shape[2:])
    assert (out.rf, out.jump) == (rf, jump) == ((3 + 2 * 8 + 2 * 2, 3 + 2 * 8 + 2 * 2), (2, 2))


def test_an_upsampling_loses_the_reach_and_is_named():
    model = nn.Sequential(nn.Conv2d(1, 2, 3, padding=1), nn.Upsample(scale_factor=2))
    found, walk = reaches(model)
    assert found["_0"][0].rf == (3, 3)
    assert not found["_1"][0].known and walk.unknown == ["1 (Upsample)"]
