"""Kernels whose extra cost buys nothing on this input: the warning of `kablate plan`.

A variant is warned about when three things hold:

1. it costs more MACs than the baseline;
2. the baseline's receptive field at the head already covers the whole input on both axes,
   so every unit of the baseline's last map already sees every input pixel;
3. at some conv layer the variant's receptive field (in input pixels, the recurrence of
   Araujo, Norris & Sim 2019) reaches `RF_FACTOR` times the input size on both axes.

Past the input's size a larger theoretical receptive field only reaches further into the
padding; on this input the variant's extra MACs cannot let a unit see more of the image. The
factor 3 is our own choice of "a wide margin": the receptive field of a plain 3x3 network
grows past the input size (often 1 to 2 times it) without any plan being pointless, so
the warning waits until it is three times the input. It is given for kablate's own networks
only: a deep model's theoretical receptive field passes small inputs many times over by design.
"""

from __future__ import annotations

from kablate.costs.catalog import Catalog, CostedVariant
from kablate.costs.static import StaticCost

RF_FACTOR = 3  # receptive field / input size at which a larger kernel is called pointless


def first_overreach(item: CostedVariant, in_hw: tuple[int, int]) -> tuple[str, tuple] | None:
    """The first conv layer whose receptive field is `RF_FACTOR` times ``in_hw`` on both axes,
    with that receptive field; None when there is none."""
    for row in item.cost.layers:
        if row.layer.kind != "conv" or row.rf is None:
            continue
        if all(r >= RF_FACTOR * n for r, n in zip(row.rf, in_hw, strict=True)):
            return row.layer.name, row.rf
    return None


def pointless_kernels(catalog: Catalog) -> list[str]:
    """One warning per variant whose kernels exceed the input by a wide margin (see above)."""
    in_hw = catalog.in_shape[1:]
    base = catalog.baseline.cost
    if not isinstance(base, StaticCost):
        return []  # a [model] sweep: the rule is checked on kablate's own networks only
    if any(r < n for r, n in zip(base.rf_hw, in_hw, strict=True)):
        return []  # the baseline does not see the whole input: a wider view may help
    warnings = []
    for item in catalog.variants:
        found = first_overreach(item, in_hw)
        if item is catalog.baseline or item.cost.macs <= base.macs or found is None:
            continue
        layer, rf = found
        warnings.append(
            f"{item.name}: its receptive field is already {rf[0]}x{rf[1]} at layer {layer}, "
            f"{min(r / n for r, n in zip(rf, in_hw, strict=True)):.1f}x the "
            f"{in_hw[0]}x{in_hw[1]} input (warned from {RF_FACTOR}x), and the baseline's "
            f"{base.rf_hw[0]}x{base.rf_hw[1]} already covers it; its "
            f"{item.cost.macs / base.macs:.2f}x the baseline's MACs buy no wider view here"
        )
    return warnings
