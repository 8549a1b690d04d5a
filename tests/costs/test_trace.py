"""Tracing a model kablate did not build: the shapes it records are those an eager forward
pass produces (torch's forward hooks), a part torch.fx cannot trace is kept whole and named
with its MACs counted, and the model's training flag survives."""

from __future__ import annotations

import pytest
import torch
from torch import nn

from kablate.costs.trace import trace_model
from kablate.errors import UsageError


class Gated(nn.Module):
    """Branches on a tensor's value: torch.fx cannot trace it symbolically."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(4, 6, 3, padding=1)

    def forward(self, x):
        if x.sum() > 0:  # data-dependent control flow
            return self.conv(x)
        return self.conv(-x)


class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 4, 5, stride=2, padding=2)
        self.gated = Gated()
        self.pool = nn.AdaptiveAvgPool2d(1)
        self.aux = nn.Linear(4, 2)  # an auxiliary head, run only in training
        self.fc = nn.Linear(6, 10)

    def forward(self, x):
        x = torch.relu(self.stem(x))
        y = self.fc(torch.flatten(self.pool(self.gated(x)), 1))
        if self.training:
            return y, self.aux(torch.flatten(self.pool(x), 1))
        return y


def eager_shapes(model: nn.Module, x: torch.Tensor) -> dict[str, tuple[int, ...]]:
    """Each named submodule's output shape in an eager eval-mode pass, by forward hooks."""
    shapes = {}

    def record(name: str):
        def hook(module, inputs, out) -> None:  # returns None: the output is left as it is
            shapes[name] = tuple(out.shape)

        return hook

    hooks = [m.register_forward_hook(record(name)) for name, m in model.named_children()]
    model.eval()
    with torch.no_grad():
        model(x)
    for h in hooks:
        h.remove()
    return shapes


def test_the_recorded_shapes_are_those_of_an_eager_pass():
    model = Net()
    traced = trace_model(model, (3, 20, 24))
    eager = eager_shapes(Net(), torch.zeros(1, 3, 20, 24))
    nodes = {n.target: n.name for n in traced.module.graph.nodes if n.op == "call_module"}
    assert set(nodes) == {"stem", "gated", "pool", "fc"}  # eval mode: no auxiliary head
    for target, name in nodes.items():
        assert traced.shapes[name] == eager[target], target


def test_an_untraceable_part_is_kept_whole_named_and_its_macs_counted():
    traced = trace_model(Net(), (3, 20, 24))
    assert traced.opaque == ["gated"]
    # a conv's MACs: out_h · out_w · out_ch · in_ch · k_h · k_w (a 3×3 conv, 4 → 6, on 10×12)
    assert traced.opaque_macs == {"gated": 10 * 12 * 6 * 4 * 3 * 3}


@pytest.mark.parametrize("training", [True, False])
def test_the_models_training_flag_is_restored(training):
    model = Net().train(training)
    trace_model(model, (3, 16, 16))
    assert all(m.training == training for m in model.modules())


def test_an_input_the_model_refuses_is_a_usage_error_about_the_input():
    with pytest.raises(UsageError, match="fails on an input of 1x16x16.*check --input"):
        trace_model(Net(), (1, 16, 16))


def test_a_model_untraceable_at_its_top_is_a_usage_error():
    with pytest.raises(UsageError, match="torch.fx cannot trace the model Gated"):
        trace_model(Gated(), (4, 8, 8))
