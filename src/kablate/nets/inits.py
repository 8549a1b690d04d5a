"""How a model's own factory initialises its Conv2d layers, so that rewritten convs match.

When a rewrite replaces a conv, the new convs get the initialisation that the model's factory
gives every Conv2d, where kablate knows it: the table below is keyed by the module that
defines the model's class (or one of its base classes, so a subclass of torchvision's ResNet
counts as a ResNet). Each entry was read in torchvision 0.29's source; the file and lines are
named beside it. Any other model keeps torch's own Conv2d initialisation (`TORCH_DEFAULT`),
and the rewrite report says so.

VGG, GoogLeNet and Inception v3 run their init only when built with ``init_weights`` true (the
default for VGG; GoogLeNet and Inception v3 warn and then run it); a built model does not
record the flag, so the table assumes it was.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

from torch import nn

TORCH_DEFAULT = (
    "torch's Conv2d default: kaiming_uniform_(a=√5) on the weight, uniform(±1/√fan_in) on "
    "the bias (Conv2d.reset_parameters)"
)


@dataclass(frozen=True)
class ConvInit:
    """One factory's conv initialisation: where it comes from and what it does."""

    source: str  # the module that defines it, e.g. "torchvision.models.resnet"
    text: str  # what it does, as the report shows it
    apply: Callable[[nn.Conv2d, nn.Conv2d, str], None]  # (new conv, replaced conv, its path)

    @property
    def label(self) -> str:
        return f"{self.source}: {self.text}"


def _zero_bias(conv: nn.Conv2d) -> None:
    if conv.bias is not None:
        nn.init.zeros_(conv.bias)


def _fan_out_relu(new: nn.Conv2d, old: nn.Conv2d, path: str, zero_bias: bool = False) -> None:
    nn.init.kaiming_normal_(new.weight, mode="fan_out", nonlinearity="relu")
    if zero_bias:
        _zero_bias(new)


def _fan_out_zero_bias(new: nn.Conv2d, old: nn.Conv2d, path: str) -> None:
    # kaiming_normal_(mode="fan_out") with its default nonlinearity, leaky_relu at a = 0,
    # whose gain √2 equals relu's
    nn.init.kaiming_normal_(new.weight, mode="fan_out")
    _zero_bias(new)


def _regnet(new: nn.Conv2d, old: nn.Conv2d, path: str) -> None:
    fan_out = new.kernel_size[0] * new.kernel_size[1] * new.out_channels
    nn.init.normal_(new.weight, mean=0.0, std=math.sqrt(2.0 / fan_out))


def _squeezenet(new: nn.Conv2d, old: nn.Conv2d, path: str) -> None:
    if path == "classifier.1":  # the final conv, which squeezenet.py names final_conv
        nn.init.normal_(new.weight, mean=0.0, std=0.01)
    else:
        nn.init.kaiming_uniform_(new.weight)
    _zero_bias(new)


def _keep_torch_default(new: nn.Conv2d, old: nn.Conv2d, path: str) -> None:
    """The factory sets no conv init of its own: torch's, which Conv2d() already ran."""


def _trunc_normal(std: float) -> Callable[[nn.Conv2d, nn.Conv2d, str], None]:
    def apply(new: nn.Conv2d, old: nn.Conv2d, path: str) -> None:
        nn.init.trunc_normal_(new.weight, mean=0.0, std=std, a=-2, b=2)

    return apply


def _inception(new: nn.Conv2d, old: nn.Conv2d, path: str) -> None:
    # inception.py reads a `stddev` attribute off the Conv2d itself, else 0.1
    stddev = float(getattr(old, "stddev", 0.1))
    nn.init.trunc_normal_(new.weight, mean=0.0, std=stddev, a=-2, b=2)


def _convnext(new: nn.Conv2d, old: nn.Conv2d, path: str) -> None:
    nn.init.trunc_normal_(new.weight, std=0.02)
    _zero_bias(new)


_FAN_OUT_RELU = 'kaiming_normal_(mode="fan_out", nonlinearity="relu")'
_FAN_OUT = 'kaiming_normal_(mode="fan_out"), bias zeros_'
_TV = "torchvision.models."
FACTORY_INITS: dict[str, ConvInit] = {
    # resnet.py lines 208-210 (ResNet, ResNeXt and Wide ResNet share the class)
    f"{_TV}resnet": ConvInit(f"{_TV}resnet", _FAN_OUT_RELU, _fan_out_relu),
    # vgg.py lines 52-57
    f"{_TV}vgg": ConvInit(
        f"{_TV}vgg",
        f"{_FAN_OUT_RELU}, bias constant_ 0",
        lambda new, old, path: _fan_out_relu(new, old, path, zero_bias=True),
    ),
    # mnasnet.py lines 146-150
    f"{_TV}mnasnet": ConvInit(
        f"{_TV}mnasnet",
        f"{_FAN_OUT_RELU}, bias zeros_",
        lambda new, old, path: _fan_out_relu(new, old, path, zero_bias=True),
    ),
    # mobilenetv2.py lines 151-155, mobilenetv3.py lines 198-202, efficientnet.py lines 320-324
    f"{_TV}mobilenetv2": ConvInit(f"{_TV}mobilenetv2", _FAN_OUT, _fan_out_zero_bias),
    f"{_TV}mobilenetv3": ConvInit(f"{_TV}mobilenetv3", _FAN_OUT, _fan_out_zero_bias),
    f"{_TV}efficientnet": ConvInit(f"{_TV}efficientnet", _FAN_OUT, _fan_out_zero_bias),
    # regnet.py lines 363-368
    f"{_TV}regnet": ConvInit(
        f"{_TV}regnet", "normal_(0, √(2/fan_out)), fan_out = kh·kw·out_ch", _regnet
    ),
    # densenet.py lines 203-205: the default mode (fan_in) and nonlinearity
    f"{_TV}densenet": ConvInit(
        f"{_TV}densenet",
        "kaiming_normal_()",
        lambda new, old, path: nn.init.kaiming_normal_(new.weight),
    ),
    # squeezenet.py lines 85-92
    f"{_TV}squeezenet": ConvInit(
        f"{_TV}squeezenet",
        "kaiming_uniform_() (the final conv classifier.1: normal_(0, 0.01)), bias constant_ 0",
        _squeezenet,
    ),
    # googlenet.py lines 94-97
    f"{_TV}googlenet": ConvInit(
        f"{_TV}googlenet", "trunc_normal_(0, 0.01, a=-2, b=2)", _trunc_normal(0.01)
    ),
    # inception.py lines 86-90
    f"{_TV}inception": ConvInit(
        f"{_TV}inception", "trunc_normal_(0, the conv's stddev else 0.1, a=-2, b=2)", _inception
    ),
    # convnext.py lines 164-168
    f"{_TV}convnext": ConvInit(f"{_TV}convnext", "trunc_normal_(std=0.02), bias zeros_", _convnext),
    # alexnet.py and shufflenetv2.py have no init of their own
    f"{_TV}alexnet": ConvInit(f"{_TV}alexnet", TORCH_DEFAULT, _keep_torch_default),
    f"{_TV}shufflenetv2": ConvInit(f"{_TV}shufflenetv2", TORCH_DEFAULT, _keep_torch_default),
}


def conv_init_for(model: nn.Module) -> ConvInit:
    """The conv initialisation of ``model``'s factory, or torch's default when unknown."""
    for cls in type(model).__mro__:
        if cls.__module__ in FACTORY_INITS:
            return FACTORY_INITS[cls.__module__]
    name = f"{type(model).__module__}.{type(model).__qualname__}"
    return ConvInit(
        "torch", f"{TORCH_DEFAULT}; kablate knows no init of {name}", _keep_torch_default
    )
