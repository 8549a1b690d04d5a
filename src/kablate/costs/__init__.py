"""Costs before training: params, MACs, receptive field, shapes, memory, latency."""

from kablate.costs.catalog import Catalog, CostedVariant, build_catalog
from kablate.costs.latency import Latency, measure_latency
from kablate.costs.static import LayerCost, StaticCost, static_cost

__all__ = [
    "Catalog",
    "CostedVariant",
    "LayerCost",
    "Latency",
    "StaticCost",
    "build_catalog",
    "measure_latency",
    "static_cost",
]
