"""Kernel plans: the spec grammar, layer groups, grid expansion and filters."""

from kablate.plans.expand import Variant, expand_plans, pick_baseline
from kablate.plans.grammar import KernelSpec, KernelSpecError, parse_kernel
from kablate.plans.groups import list_slots, resolve_kernels

__all__ = [
    "KernelSpec",
    "KernelSpecError",
    "Variant",
    "expand_plans",
    "list_slots",
    "parse_kernel",
    "pick_baseline",
    "resolve_kernels",
]
