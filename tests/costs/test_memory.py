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


def test_inference_peak_matches_a_hand_worked_chain_and_a_residual_block():
    """Input 1×8×8, stem conv to 4×8×8, stage1 conv 4→4, max-pool to 4×4, stage2 conv 4→8;
    ReLU in place, no norm; fp32. Bytes: input 256, each 4×8×8 map 1,024, 4×4×4 256, 8×4×4
    512. Worst moment, stage1's conv: the input (held by the caller) 256 + the stem's output
    1,024 (its input) + its own output 1,024 = 2,304; the stem: 256 + 1,024; the pool:
    256 + 1,024 + 256; stage2's conv: 256 + 256 + 512."""
    from kablate.costs.memory import inference_peak_bytes

    chain = tiny_layout({}, tiny_network(norm="none"))
    assert inference_peak_bytes(build_network(chain), chain.in_shape) == 256 + 1024 + 1024
    # Residual stages: stage1 holds its input for the skip while its conv's output and the
    # sum (a new tensor) exist: 256 + 1,024 (skip) + 1,024 (conv) + 1,024 (x + y).
    res = tiny_layout({}, tiny_network(norm="none", residual=True))
    assert inference_peak_bytes(build_network(res), res.in_shape) == 256 + 3 * 1024
    # Batch norm in eval makes a new tensor after each conv: stage1 then holds its input
    # (1,024), the conv's output and the norm's output: 256 + 3 × 1,024 again.
    bn = tiny_layout({}, tiny_network())
    model = build_network(bn).train()
    assert inference_peak_bytes(model, bn.in_shape) == 256 + 3 * 1024
    assert model.training  # the mode is given back
