"""A rewritten conv gets the initialisation its model's factory gives every conv: the spread of
a new conv's weights equals that of a conv of the same shape in a model torchvision's own
factory just built and initialised, for a few factories, and the documented formula
(kaiming_normal_ with fan_out: std = √2 / √(out_ch·kh·kw), He et al. 2015)."""

from __future__ import annotations

import math

import pytest
import torch
import torchvision
from torch import nn

from kablate.nets.inits import TORCH_DEFAULT, conv_init_for


def first_conv(model: nn.Module, shape: tuple[int, int, int, int]) -> nn.Conv2d:
    """The first conv of ``model`` whose weight has ``shape``."""
    return next(m for m in model.modules() if isinstance(m, nn.Conv2d) and m.weight.shape == shape)


@pytest.mark.parametrize(
    ("name", "shape"),
    [
        ("resnet18", (64, 64, 3, 3)),  # kaiming_normal_, fan_out, relu
        ("vgg11", (128, 64, 3, 3)),  # the same, with the bias zeroed
        ("regnet_x_400mf", (32, 32, 1, 1)),  # normal_(0, √(2/fan_out))
        ("densenet121", (128, 64, 1, 1)),  # kaiming_normal_ with fan_in
    ],
)
def test_a_new_conv_is_spread_as_the_factorys_own_convs_are(name, shape):
    torch.manual_seed(0)
    model = torchvision.models.get_model(name, weights=None)
    theirs = first_conv(model, shape)
    init = conv_init_for(model)
    assert init.source == f"torchvision.models.{model.__module__.rsplit('.', 1)[1]}"
    ours = nn.Conv2d(shape[1], shape[0], shape[2:], bias=theirs.bias is not None)
    init.apply(ours, theirs, "path")
    # two samples of the same law: the stds agree to a few percent (tens of thousands of
    # weights; the relative standard error of a std is about 1/√(2n))
    n = ours.weight.numel()
    tolerance = 6 / math.sqrt(2 * n) + 0.02
    spread, reference = float(ours.weight.detach().std()), float(theirs.weight.detach().std())
    assert spread == pytest.approx(reference, rel=tolerance)
    if theirs.bias is not None:
        assert torch.equal(ours.bias, torch.zeros_like(ours.bias))


def test_resnets_fan_out_init_has_he_et_als_std():
    torch.manual_seed(1)
    new = nn.Conv2d(64, 256, 5, bias=False)
    conv_init_for(torchvision.models.resnet18()).apply(new, new, "layer1.0.conv1")
    assert float(new.weight.detach().std()) == pytest.approx(math.sqrt(2 / (256 * 5 * 5)), rel=0.02)


def test_a_subclass_counts_as_its_factorys_model_and_an_unknown_model_keeps_torchs_default():
    class MyResNet(torchvision.models.ResNet):
        pass

    mine = MyResNet(torchvision.models.resnet.BasicBlock, [1, 1, 1, 1])
    assert conv_init_for(mine).source == "torchvision.models.resnet"
    unknown = conv_init_for(nn.Sequential(nn.Conv2d(1, 1, 3)))
    assert unknown.source == "torch" and unknown.text.startswith(TORCH_DEFAULT)
    assert "kablate knows no init of torch.nn.modules.container.Sequential" in unknown.text
