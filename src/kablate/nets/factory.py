"""The user's own network: find its factory, build it with keyword arguments.

A factory is named ``package.module:callable`` (e.g. ``torchvision.models:resnet18``), or
``timm:NAME`` for a timm model when timm is installed. Importing the module runs its code, as
any import does: name only modules you trust. Models are built without pretrained weights.
"""

from __future__ import annotations

import importlib
import json
import re
from collections.abc import Callable

from torch import nn

from kablate.errors import UsageError
from kablate.spec.schema import FACTORY_FORM

TIMM_PREFIX = "timm:"


def load_factory(text: str, where: str = "--model") -> Callable[..., nn.Module]:
    """The callable that ``text`` names; ``where`` names the setting in messages.

    Raises:
        UsageError: a malformed name, a module that does not import, a missing attribute.
    """
    if text.startswith(TIMM_PREFIX):
        return _timm_factory(text[len(TIMM_PREFIX) :], where)
    if not FACTORY_FORM.fullmatch(text):
        raise UsageError(
            f"{where} must name a factory as package.module:callable, e.g. "
            f"torchvision.models:resnet18 or timm:resnet18, but got {text!r}"
        )
    module_name, attr = text.split(":")
    try:
        target = importlib.import_module(module_name)
    except Exception as exc:  # the user's module: any error on import is theirs to fix
        raise UsageError(
            f"{where} {text}: the module {module_name} does not import ({type(exc).__name__}: "
            f"{exc}); check the spelling, and that it is on PYTHONPATH or installed"
        ) from None
    for part in attr.split("."):
        if not hasattr(target, part):
            raise UsageError(
                f"{where} {text}: {module_name} has no attribute {attr!r}; name a function or "
                "class in it that returns a torch.nn.Module"
            )
        target = getattr(target, part)
    if not callable(target):
        raise UsageError(f"{where} {text}: {attr} is a {type(target).__name__}, not callable")
    return target


def _timm_factory(name: str, where: str) -> Callable[..., nn.Module]:
    try:
        import timm
    except ImportError:
        raise UsageError(
            f'{where} timm:{name} needs timm, which is not installed; pip install "kablate[timm]"'
        ) from None
    if name not in timm.list_models():
        raise UsageError(
            f"{where} timm:{name}: timm has no model {name!r} (see timm.list_models())"
        )

    def build(**kwargs) -> nn.Module:
        return timm.create_model(name, pretrained=False, **kwargs)

    return build


def parse_kwargs(text: str | None) -> dict:
    """The factory's keyword arguments from a JSON object (``--kwargs``)."""
    if not text:
        return {}
    try:
        value = json.loads(text)
    except json.JSONDecodeError as exc:
        raise UsageError(
            f"--kwargs must be a JSON object such as '{{\"num_classes\": 10}}', but {text!r} "
            f"is not JSON ({exc.msg} at character {exc.pos})"
        ) from None
    if not isinstance(value, dict):
        raise UsageError(
            f"--kwargs must be a JSON object such as '{{\"num_classes\": 10}}', but got a "
            f"{type(value).__name__}"
        )
    return value


def build_model(
    text: str, kwargs: dict, where: str = "--model", args_where: str = "--kwargs"
) -> nn.Module:
    """Import the factory ``text`` names and call it with ``kwargs``. ``where`` and
    ``args_where`` name the two settings in messages (options, or a sweep file's keys).

    Raises:
        UsageError: the factory cannot be found, refuses the arguments or returns no module.
    """
    factory = load_factory(text, where)
    try:
        model = factory(**kwargs)
    except Exception as exc:  # the user's code: any error in it is theirs to fix
        raise UsageError(
            f"{where} {text} fails with {args_where} {kwargs}: {type(exc).__name__}: {exc}"
        ) from None
    if not isinstance(model, nn.Module):
        raise UsageError(f"{where} {text} returned a {type(model).__name__}, not a torch.nn.Module")
    return model


def parse_input_shape(text: str) -> tuple[int, int, int]:
    """'3x224x224' → (3, 224, 224)."""
    match = re.fullmatch(r"\s*(\d+)\s*[xX×]\s*(\d+)\s*[xX×]\s*(\d+)\s*", text or "")
    if not match or any(int(g) < 1 for g in match.groups()):
        raise UsageError(
            f"--input must be channels x height x width with positive integers, e.g. "
            f"3x224x224, but got {text!r}"
        )
    c, h, w = (int(g) for g in match.groups())
    return c, h, w
