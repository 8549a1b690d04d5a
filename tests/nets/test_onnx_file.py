"""The ONNX export against its reference: ``onnxruntime.InferenceSession`` runs the exported
file and must give torch's logits within 1e-4 for every form a kernel plan can take, on
kablate's own networks and on a rewritten torchvision ResNet-18. Needs the ``onnx`` extra."""

from __future__ import annotations

import numpy as np
import pytest
import torch

pytest.importorskip("onnx")
pytest.importorskip("onnxruntime")

from kablate.nets.build import build_network  # noqa: E402
from kablate.nets.model_variant import model_variant  # noqa: E402
from kablate.nets.onnx_file import (  # noqa: E402
    export_onnx,
    onnx_missing,
    onnx_session,
    run_session,
)
from kablate.plans.grammar import parse_kernel  # noqa: E402
from tests.nets.tiny import tiny_layout, tiny_network  # noqa: E402

TOLERANCE = 1e-4  # the bound the ONNX export must keep (absolute, on logits)

# One plan per form of the kernel grammar, each on the stem and both stages; "4" and "2x4"
# are even kernels, padded asymmetrically under same padding (an explicit ZeroPad2d).
FORMS = {
    "dense": "5",
    "stack": "7:stack",
    "split": "5:split",
    "depthwise": "3:depthwise",
    "bottleneck": "3:bottleneck/2",
    "dilated": "3d2",
    "even": "4",
    "even-rect": "2x4",
}


def ort_logits(model: torch.nn.Module, in_shape, x: torch.Tensor) -> np.ndarray:
    return run_session(onnx_session(export_onnx(model, in_shape), threads=1), x.numpy())


def max_difference(model: torch.nn.Module, in_shape, batch: int = 3) -> float:
    """Largest |ONNX Runtime − torch| over the logits of a random batch (seeded)."""
    torch.manual_seed(1)
    model.eval()
    x = torch.randn(batch, *in_shape)
    with torch.no_grad():
        want = model(x).numpy()
    got = ort_logits(model, in_shape, x)
    assert got.shape == want.shape
    return float(np.abs(got - want).max())


@pytest.mark.parametrize("form", list(FORMS))
@pytest.mark.parametrize("residual", [False, True])
def test_onnx_runtime_gives_torchs_logits_for_every_form(form, residual):
    spec = FORMS[form]
    net = tiny_network(stem_ch=8, stages=((8, 2, "none"), (16, 1, "maxpool")), residual=residual)
    layout = tiny_layout({"stem": spec, "stage1": spec, "stage2": spec}, net, in_shape=(3, 12, 12))
    torch.manual_seed(0)
    model = build_network(layout)
    # trained-looking batch norm statistics, so that folding them into the convs is exercised
    for m in model.modules():
        if isinstance(m, torch.nn.BatchNorm2d):
            m.running_mean.uniform_(-0.5, 0.5)
            m.running_var.uniform_(0.5, 2.0)
    assert max_difference(model, layout.in_shape) <= TOLERANCE


@pytest.mark.slow
def test_onnx_runtime_gives_torchs_logits_for_a_rewritten_resnet18():
    """A [model] variant: torchvision's ResNet-18 at 3×32×32 with its stem stacked, a stage-1
    conv widened to 5×5 and a stage-4 conv made depthwise (as in sweeps/resnet-stages.toml)."""
    changes = {
        "conv1": parse_kernel("7:stack"),
        "layer1.0.conv1": parse_kernel("5"),
        "layer4.0.conv2": parse_kernel("3:depthwise"),
    }
    variant = model_variant(
        "mixed", "torchvision.models:resnet18", {"num_classes": 10}, (3, 32, 32), 10, changes
    )
    model = build_network(variant)
    assert max_difference(model, variant.in_shape, batch=2) <= TOLERANCE


def test_the_extra_is_reported_present():
    assert onnx_missing() is None
