"""The catalog's warnings: one per even-kernel layer padded asymmetrically, naming its variants."""

from __future__ import annotations

from kablate.costs.catalog import CostedVariant, padding_warnings
from kablate.costs.static import static_cost
from kablate.plans.expand import Variant
from tests.nets.tiny import tiny_layout


def costed(plan: dict[str, str], name: str) -> CostedVariant:
    layout = tiny_layout(plan, name=name)
    return CostedVariant(Variant(name, plan, {}), static_cost(layout, 1), layout)


def test_an_even_kernel_is_warned_once_per_layer_with_every_variant_it_is_in():
    # The padding itself is checked against torch in tests/nets/test_padding.py; the warning
    # and its grouping by layer are kablate's own (the plan table prints it, test_plan_output).
    items = [costed({"stem": "4"}, "even-a"), costed({"stem": "4"}, "even-b")]
    items.append(costed({"stem": "5"}, "odd"))
    (warning,) = padding_warnings(items)
    assert warning.startswith("layer stem: the even 4×4 kernel is padded (1, 2, 1, 2)")
    assert "half a pixel" in warning and warning.endswith("(in even-a, even-b)")


def test_odd_kernels_earn_no_warning_and_long_lists_are_cut():
    assert padding_warnings([costed({"stem": "3"}, "odd")]) == []
    items = [costed({"stage2": "2"}, f"v{i}") for i in range(6)]
    (warning,) = padding_warnings(items, n_named=4)
    assert warning.startswith("layer stage2.0: the even 2×2 kernel")
    assert warning.endswith("(in v0, v1, v2, v3 and 2 more)")
