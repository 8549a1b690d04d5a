"""The effective receptive field (Luo et al. 2016) against known cases."""

from __future__ import annotations

import numpy as np
import torch
from torch import nn

from kablate.analysis.erf import centre_geometry, effective_rf, extent, input_gradient
from kablate.costs.catalog import build_catalog
from kablate.nets.build import build_network
from kablate.spec import load_sweep
from tests.conftest import write_sweep


def test_uniform_stacked_convs_give_the_convolved_kernel():
    # Luo et al. 2016, §2.2: with uniform weights and no nonlinearity, the input gradient of
    # the centre output is the n-fold convolution of the kernel. Reference: numpy.convolve.
    convs = [nn.Conv2d(1, 1, 3, padding=1, bias=False) for _ in range(2)]
    for conv in convs:
        nn.init.constant_(conv.weight, 1.0)
    grad = input_gradient(nn.Sequential(*convs).eval(), torch.randn(4, 1, 9, 9), (4, 4))
    line = np.convolve([1, 1, 1], [1, 1, 1])  # [1, 2, 3, 2, 1]
    expected = np.zeros((9, 9))
    expected[2:7, 2:7] = np.outer(line, line)
    np.testing.assert_allclose(grad, expected, atol=1e-6)


NETWORK = """
[sweep]
name = "erf"
seeds = [0]

[network]
norm = "none"

[network.stem]
out_ch = 4
kernel = "5"

[[network.stages]]
out_ch = 4
n_convs = 1
down = "stride"

[[network.stages]]
out_ch = 4
n_convs = 1
kernel = "3d2"

[[plan]]
name = "all-3"
body = "3"

[[plan]]
name = "wide"
stem = "7"
body = "5"
"""


def test_theoretical_box_matches_where_autograd_can_reach(tmp_path):
    # With positive weights, positive inputs and no norm, every ReLU passes, so the input
    # gradient of the centre output is non-zero exactly on the theoretical receptive field
    # (clipped to the image). Reference: torch autograd; the rf also matches costs/static.
    sweep = load_sweep(write_sweep(tmp_path, NETWORK, "erf"))
    catalog = build_catalog(sweep, in_shape=(1, 33, 33), n_classes=3)
    for cv in catalog.variants:
        layout = cv.cost.layout
        geo = centre_geometry(layout)
        assert geo.rf[0] == cv.cost.rf
        model = build_network(layout)
        for p in model.parameters():
            nn.init.constant_(p, 0.05)
        features = nn.Sequential(*list(model.blocks)[:-1]).eval()
        grad = input_gradient(features, torch.ones(1, 1, 33, 33), geo.out_index)
        rows, cols = np.nonzero(grad > 0)
        half = (geo.rf[0] - 1) / 2
        assert rows.min() == max(0, geo.centre[0] - half)
        assert rows.max() == min(32, geo.centre[0] + half)
        assert cols.min() == max(0, geo.centre[1] - half)
        assert cols.max() == min(32, geo.centre[1] + half)


def test_extent_of_a_known_map():
    grad = np.zeros((9, 9))
    grad[4, 4] = 0.6  # centre
    grad[3:6, 3:6] += 0.4 / 9 * (np.ones((3, 3)))  # spread over the 3×3 around it
    assert extent(grad, (4.0, 4.0), 0.5) == 1
    assert extent(grad, (4.0, 4.0), 0.95) == 3
    grad[0, 0] = 10.0  # far away mass dominates
    assert extent(grad, (4.0, 4.0), 0.5) == 9


def test_effective_rf_averages_seeds_and_scales_to_one(tmp_path):
    sweep = load_sweep(write_sweep(tmp_path, NETWORK, "erf"))
    layout = build_catalog(sweep, in_shape=(1, 16, 16), n_classes=3).variants[0].cost.layout
    states = {}
    for seed in (3, 1):
        torch.manual_seed(seed)
        states[seed] = build_network(layout).state_dict()
    erf = effective_rf("all-3", layout, states, torch.randn(8, 1, 16, 16), build_network)
    assert erf.seeds == (1, 3) and erf.n_images == 8
    assert erf.grad.shape == (16, 16) and erf.grad.max() == 1.0
    assert 1 <= erf.extent50 <= erf.extent95 <= 2 * 16
