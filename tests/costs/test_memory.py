"""Activation memory against what autograd really saves for backward."""

from __future__ import annotations

import itertools

import torch

from kablate.costs.memory import saved_activation_bytes, saved_bytes_of, weight_bytes
from kablate.costs.static import static_cost
from kablate.nets.build import build_network
from tests.nets.tiny import tiny_layout, tiny_network

CASES = [
    # (norm, act, down, residual, dropout, plan)
    ("batch", "relu", "maxpool", False, 0.0, {}),
    ("batch", "relu", "avgpool", True, 0.0, {"body": "4"}),
    ("batch", "gelu", "stride", True, 0.2, {"stem": "4x2", "body": "3:depthwise"}),
    ("group", "relu", "maxpool", True, 0.0, {"body": "5:stack"}),
    ("group", "silu", "stride", False, 0.0, {"body": "3:bottleneck/2"}),
    ("none", "relu", "avgpool", False, 0.3, {"body": "4:split"}),
    ("none", "gelu", "maxpool", True, 0.0, {"stem": "3d2", "stage2": "3:depthwise"}),
]


def case_layout(norm, act, down, residual, dropout, plan):
    net = tiny_network(
        stages=((8, 2, "none"), (16, 1, down)),
        residual=residual,
        norm=norm,
        act=act,
        norm_groups=4,
        dropout=dropout,
    )
    return tiny_layout(plan, net)


def test_the_estimate_equals_what_autograd_saves():
    for (norm, act, down, residual, dropout, plan), batch in itertools.product(CASES, (1, 5)):
        layout = case_layout(norm, act, down, residual, dropout, plan)
        model = build_network(layout).train()
        measured = saved_bytes_of(model, torch.randn(batch, 1, 8, 8))
        assert saved_activation_bytes(layout, batch) == measured, (norm, act, down, plan, batch)


def test_static_cost_reports_it_at_the_recipes_batch_size():
    layout = tiny_layout({})
    assert static_cost(layout, 64).act_mem_bytes == saved_activation_bytes(layout, 64)
    one, two = saved_activation_bytes(layout, 1), saved_activation_bytes(layout, 2)
    # batch norm's per-channel mean and inverse std are kept once per batch, not per sample
    per_channel = 2 * 4 * (4 + 4 + 8)  # two fp32 values per channel of the three convs
    assert two - one == one - per_channel


def test_weight_bytes_are_the_parameters_times_their_element_size_in_torch():
    for case in CASES:
        layout, plan = case_layout(*case), case[-1]
        params = static_cost(layout, 1).params
        model = build_network(layout)
        # the reference: torch's own byte count of the trained (fp32) parameters, and of the
        # same tensors stored as int8 (running statistics are buffers, not weights)
        fp32 = sum(p.numel() * p.element_size() for p in model.parameters())
        int8 = sum(p.numel() * p.detach().to(torch.int8).element_size() for p in model.parameters())
        assert weight_bytes(params, "fp32") == fp32 == 4 * params, plan
        assert weight_bytes(params, "int8") == int8 == params, plan
