"""A variant of the user's own model is plain data: it pickles, prints as JSON, and builds the
factory's model (torchvision's ResNet-18 here) with only the named convs rewritten, reporting
how the new convs were initialised."""

from __future__ import annotations

import pickle

import torch
import torchvision
from torch import nn

from kablate.nets.model_variant import model_variant
from kablate.plans.grammar import parse_kernel

FACTORY = "torchvision.models:resnet18"


def variant(arguments: dict | None = None):
    return model_variant(
        "l1-5",
        FACTORY,
        arguments or {"num_classes": 10, "zero_init_residual": False},
        (3, 32, 32),
        10,
        {"layer1.0.conv1": parse_kernel("5")},
    )


def test_it_builds_the_factorys_model_with_only_the_named_conv_rewritten():
    torch.manual_seed(0)
    built, described = variant().build_and_describe()
    reference = torchvision.models.resnet18(num_classes=10)
    conv = built.get_submodule("layer1.0.conv1")
    assert isinstance(conv, nn.Conv2d) and conv.kernel_size == (5, 5) and conv.padding == (2, 2)
    for name, module in reference.named_modules():
        if isinstance(module, nn.Conv2d) and name != "layer1.0.conv1":
            assert built.get_submodule(name).kernel_size == module.kernel_size, name
    assert built.eval()(torch.zeros(1, 3, 32, 32)).shape == (1, 10)
    assert dict(described.inits)["layer1.0.conv1"].startswith("torchvision.models.resnet")


def test_it_is_plain_data_whose_signature_ignores_argument_order():
    v = variant()
    assert pickle.loads(pickle.dumps(v)) == v
    assert v.arguments == {"num_classes": 10, "zero_init_residual": False}
    swapped = variant({"zero_init_residual": False, "num_classes": 10})
    assert swapped.signature == v.signature
    assert variant({"num_classes": 5}).signature != v.signature
    assert v.changes == (("layer1.0.conv1", str(parse_kernel("5"))),)
