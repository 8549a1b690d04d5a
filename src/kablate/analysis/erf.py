"""The effective receptive field of a trained variant (Luo, Li, Urtasun & Zemel 2016,
"Understanding the Effective Receptive Field in Deep Convolutional Neural Networks").

Put a gradient of 1 on the centre position of the last feature map (every channel, the input
of the head's global pool) and 0 elsewhere, back-propagate to the input, and average the
magnitude of the input gradient over validation images (and here also over seeds). The
theoretical receptive field bounds where that map can be non-zero; the effective one shows
how much of that extent the trained network really uses. We take absolute values before
averaging so that gradients of opposite sign from different images do not cancel.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch
from torch import nn

from kablate.costs.static import reach
from kablate.nets.layout import Layout

MAX_IMAGES = 512  # validation images per network: plenty for a stable average, fast on a CPU


@dataclass(frozen=True)
class Geometry:
    """Where the centre output of the head's input sits on the input, and what it can see."""

    centre: tuple[float, float]  # input coordinates (row, col) of its centre, pixel centres at ints
    rf: tuple[int, int]  # theoretical receptive field (rows, cols) in input pixels
    out_index: tuple[int, int]  # the centre position on the last feature map


@dataclass(frozen=True)
class ErfMap:
    variant: str
    grad: np.ndarray  # (H, W) mean |∂y_centre/∂x|, summed over input channels, max scaled to 1
    geometry: Geometry
    n_images: int
    seeds: tuple[int, ...]
    extent50: int  # side of the smallest centred square holding 50% of the gradient mass
    extent95: int  # … and 95% of it


def centre_geometry(layout: Layout) -> Geometry:
    """Where the centre output of the head's input sits: the receptive field and jumps come
    from the static costs' recurrence (`costs.static.reach`); the centre of output 0 moves by
    ((k_eff − 1)/2 − pad)·jump per layer (Araujo, Norris & Sim 2019), with k_eff = d·(k − 1) + 1,
    ``pad`` the padding before the first pixel and ``jump`` the one before the layer."""
    rf, jump, start = (1, 1), (1, 1), [0.0, 0.0]
    hw = layout.in_shape[1:]
    for layer, rf_after, jump_after in reach(layout):
        if layer.kind == "global_pool":
            hw = layer.in_hw
            break
        for axis in (0, 1):
            extent = layer.dilation[axis] * (layer.kernel[axis] - 1) + 1
            before = layer.padding[2 * axis]  # top for rows, left for columns
            start[axis] += ((extent - 1) / 2 - before) * jump[axis]
        rf, jump = rf_after, jump_after
    idx = ((hw[0] - 1) // 2, (hw[1] - 1) // 2)
    centre = (start[0] + idx[0] * jump[0], start[1] + idx[1] * jump[1])
    return Geometry(centre, rf, idx)


def input_gradient(features: nn.Module, images: torch.Tensor, at: tuple[int, int]) -> np.ndarray:
    """Mean over images of |∂(Σ_c features[c, at])/∂input|, summed over input channels.

    ``features`` must be in eval mode (so images do not interact through batch statistics);
    one backward pass then gives every image's own gradient.
    """
    x = images.detach().clone().requires_grad_(True)
    out = features(x)
    out[:, :, at[0], at[1]].sum().backward()
    grad = x.grad.abs().sum(dim=1)  # (N, H, W)
    return grad.mean(dim=0).numpy().astype(np.float64)


def feature_extractor(model: nn.Module) -> nn.Module:
    """The variant's network up to the input of the head (global pool and linear layer)."""
    blocks = list(model.blocks)
    return nn.Sequential(*blocks[:-1]).eval()


def extent(grad: np.ndarray, centre: tuple[float, float], share: float) -> int:
    """Side of the smallest square centred on ``centre`` that holds ``share`` of the mass.

    Squares are measured in the Chebyshev distance from ``centre``; a radius r covers a side
    of 2r + 1 pixels (r may be a half-integer when the centre falls between pixels).
    """
    total = grad.sum()
    if total <= 0:
        return 0
    rows, cols = np.indices(grad.shape)
    dist = np.maximum(np.abs(rows - centre[0]), np.abs(cols - centre[1])).ravel()
    order = np.argsort(dist, kind="stable")
    mass = np.cumsum(grad.ravel()[order]) / total
    radius = dist[order][int(np.searchsorted(mass, share - 1e-12))]
    return int(round(2 * radius + 1))


def effective_rf(
    variant: str,
    layout: Layout,
    states: dict[int, dict],
    images: torch.Tensor,
    build: callable,
) -> ErfMap:
    """The effective receptive field of ``layout`` with the trained weights of each seed.

    Args:
        states: seed → the trial's ``best_state`` (a state dict).
        images: normalised validation images (N, C, H, W); the first MAX_IMAGES are used.
        build: ``kablate.nets.build_network`` (passed in, so tests can give a tiny module).
    """
    geometry = centre_geometry(layout)
    images = images[:MAX_IMAGES].float()
    maps = []
    with torch.enable_grad():
        for seed in sorted(states):
            model = build(layout)
            model.load_state_dict(states[seed])
            maps.append(input_gradient(feature_extractor(model), images, geometry.out_index))
    grad = np.mean(maps, axis=0)
    peak = grad.max()
    grad = grad / peak if peak > 0 else grad
    return ErfMap(
        variant,
        grad,
        geometry,
        len(images),
        tuple(sorted(states)),
        extent(grad, geometry.centre, 0.5),
        extent(grad, geometry.centre, 0.95),
    )
