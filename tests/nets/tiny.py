"""Tiny networks for the nets and costs tests: a spec, a variant and its layout in one call."""

from __future__ import annotations

from kablate.nets.layout import Layout, layout_network
from kablate.plans.expand import Variant
from kablate.plans.groups import resolve_kernels
from kablate.spec.schema import NetworkSpec, StageSpec, StemSpec


def tiny_network(
    *,
    stem_ch: int = 4,
    stem_stride: int = 1,
    stages: tuple[tuple[int, int, str], ...] = ((4, 1, "none"), (8, 1, "maxpool")),
    residual: bool = False,
    **network: object,
) -> NetworkSpec:
    """A network with stages given as (out_ch, n_convs, down)."""
    return NetworkSpec(
        stem=StemSpec(out_ch=stem_ch, stride=stem_stride),
        stages=tuple(
            StageSpec(out_ch=ch, n_convs=n, down=down, residual=residual)  # type: ignore[arg-type]
            for ch, n, down in stages
        ),
        **network,  # type: ignore[arg-type]
    )


def tiny_layout(
    plan: dict[str, str] | None = None,
    network: NetworkSpec | None = None,
    in_shape: tuple[int, int, int] = (1, 8, 8),
    n_classes: int = 3,
    name: str = "v",
) -> Layout:
    network = network or tiny_network()
    plan = plan or {}
    return layout_network(
        network, Variant(name, plan, resolve_kernels(network, plan)), in_shape, n_classes
    )
