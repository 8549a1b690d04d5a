"""One variant of the user's own model (a ``[model]`` sweep): what to build, as plain data.

It plays the part `kablate.nets.layout.Layout` plays for kablate's own networks: the catalog
costs it, workers train it and the report reloads it, each by calling `build`. It holds only
names and strings (the factory, its arguments as JSON, the rewritten convs' module paths and
kernel specs), so it pickles into worker processes and prints into ``plan.json``; the model
itself is rebuilt wherever it is needed, by importing and calling the factory.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field, replace
from typing import Self

import torch
from torch import nn

from kablate.nets.factory import build_model
from kablate.plans.grammar import KernelSpec, parse_kernel

FACTORY_KEY = "model.factory"  # the sweep keys named in messages
ARGUMENTS_KEY = "model.arguments"


@dataclass(frozen=True)
class ModelVariant:
    variant: str
    factory: str
    arguments_json: str  # the factory's keyword arguments, JSON with sorted keys
    in_shape: tuple[int, int, int]  # C, H, W
    n_classes: int
    changes: tuple[tuple[str, str], ...]  # (module path, kernel spec) of each rewritten conv
    # (module path, how its new convs were initialised), once built (`kablate.nets.inits`)
    inits: tuple[tuple[str, str], ...] = field(default=(), compare=False)

    @property
    def arguments(self) -> dict:
        return json.loads(self.arguments_json)

    @property
    def signature(self) -> tuple:
        """Equal signatures build equal modules (as `Layout.signature`)."""
        return (self.factory, self.arguments_json, self.changes)

    def build_unchanged(self, device: str | torch.device = "cpu") -> nn.Module:
        """The model as its factory builds it (this imports and runs the factory's code)."""
        with torch.device(device):
            return build_model(self.factory, self.arguments, FACTORY_KEY, ARGUMENTS_KEY)

    def build(self, device: str | torch.device = "cpu") -> nn.Module:
        """The factory's model with this variant's convs rewritten."""
        return self.build_and_describe(device)[0]

    def build_and_describe(self, device: str | torch.device = "cpu") -> tuple[nn.Module, Self]:
        """The built model, and this variant with the initialisation of each rewritten conv."""
        from kablate.nets.rewrite import rewrite_model

        model = self.build_unchanged(device)
        if not self.changes:
            return model, self
        report = rewrite_model(model, {path: parse_kernel(spec) for path, spec in self.changes})
        return model, replace(self, inits=tuple(report.inits.items()))


def model_variant(
    name: str,
    factory: str,
    arguments: dict,
    in_shape: tuple[int, int, int],
    n_classes: int,
    changes: dict[str, KernelSpec],
) -> ModelVariant:
    """The variant that rewrites the convs of ``changes`` (module path → kernel spec)."""
    listed = tuple((path, str(spec)) for path, spec in changes.items())
    return ModelVariant(
        name, factory, json.dumps(arguments, sort_keys=True), in_shape, n_classes, listed
    )
