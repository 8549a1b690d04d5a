"""The user's own model in a sweep (``[model]``): its convs, and the costs of each variant.

The factory is imported and called once to find the model's Conv2d layers (the sites plans
address) and to check that it answers the data's classes; each variant is then rebuilt from
its `ModelVariant`, rewritten, and costed from its traced graph (`kablate.costs.graph`), the
same way `kablate plan --model` costs a single model.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import torch

from kablate.costs.graph import GraphCost, graph_cost
from kablate.errors import PlanError
from kablate.nets.model_variant import ARGUMENTS_KEY, ModelVariant, model_variant
from kablate.nets.rewrite import check_rewrite
from kablate.nets.sites import ConvSite, find_convs
from kablate.plans.expand import Variant
from kablate.spec.schema import SweepSpec


@dataclass
class UserModel:
    sweep: SweepSpec
    in_shape: tuple[int, int, int]
    n_classes: int
    sites: list[ConvSite]
    warnings: list[str] = field(default_factory=list)

    @classmethod
    def load(cls, sweep: SweepSpec, in_shape: tuple[int, int, int], n_classes: int) -> UserModel:
        """Build the unchanged model once: find its convs, check its output.

        Raises:
            UsageError: the factory cannot be imported or called.
            PlanError: the model has no Conv2d, fails on the data's input, or does not
                answer one score per class of the data.
        """
        assert sweep.model is not None
        unchanged = model_variant(
            "", sweep.model.factory, sweep.model.arguments, in_shape, n_classes, {}
        )
        model = unchanged.build_unchanged()
        check_output(model, sweep.model.factory, in_shape, n_classes)
        sites = find_convs(model)
        if not sites:
            raise PlanError(
                f"{sweep.model.factory} has no torch.nn.Conv2d layer, so no kernel plan can "
                "change it"
            )
        return cls(sweep, in_shape, n_classes, sites)

    def cost(self, variant: Variant, batch_size: int) -> tuple[GraphCost, ModelVariant]:
        """The costs of ``variant`` and what builds it.

        Raises:
            PlanError: a rewrite that would change a shape, naming the module path.
        """
        spec = self.sweep.model
        assert spec is not None
        for warning in check_rewrite(self.sites, variant.kernels):
            if warning not in self.warnings:
                self.warnings.append(warning)
        own = {site.path: site.spec for site in self.sites}
        changes = {path: k for path, k in variant.kernels.items() if k != own[path]}
        blueprint = model_variant(
            variant.name, spec.factory, spec.arguments, self.in_shape, self.n_classes, changes
        )
        model, blueprint = blueprint.build_and_describe()
        restrided = [path for path, k in changes.items() if k.stride]
        if restrided:  # a new stride changes the shapes after it: the model must still answer
            check_output(model, spec.factory, self.in_shape, self.n_classes, variant.name)
        return graph_cost(model, self.in_shape, batch_size), blueprint


def check_output(
    model: torch.nn.Module, factory: str, in_shape, n_classes: int, variant: str = ""
) -> None:
    """The model must give one score per class of the data, for a batch of the data's input.
    ``variant``: the name of a variant whose new stem stride changed the shapes after it."""
    c, h, w = in_shape
    who = factory
    if variant:
        who += (
            f", rewritten as variant {variant} (its new stem stride changes every feature-map "
            "size after it),"
        )
    try:
        with torch.no_grad():
            out = model.eval()(torch.zeros(2, c, h, w))
    except Exception as exc:  # the user's code: say where it failed, without a traceback
        raise PlanError(
            f"{who} fails on the data's {c}x{h}x{w} input: {type(exc).__name__}: {exc}"
        ) from None
    shape = tuple(out.shape) if isinstance(out, torch.Tensor) else None
    if shape != (2, n_classes):
        raise PlanError(
            f"{who} answers {shape if shape else type(out).__name__} for a batch "
            f"of 2, but the data has {n_classes} classes, so it must answer (2, {n_classes}): "
            f"set the factory's class count in `{ARGUMENTS_KEY}` (e.g. num_classes = "
            f"{n_classes})"
        )


def check_rf_known(sweep: SweepSpec) -> None:
    """Receptive-field filters need the model's receptive field, which is unknown when a step
    of its graph could not be followed (`kablate.costs.reach`)."""
    f = sweep.filters
    if f.min_rf or f.max_rf or f.equal_rf:
        raise PlanError(
            f"{sweep.model.factory if sweep.model else 'the model'}: its receptive field cannot "
            "be derived (`kablate plan` lists the layers it could not follow), so the [filter] "
            "keys min_rf, max_rf and equal_rf cannot be applied: remove them"
        )
