"""The plots' shared look: palette, markers, numbers and the dodge of equal values."""

from __future__ import annotations

import math

import pandas as pd
import pytest

from kablate.report.plot_style import (
    MARKERS,
    N_DISTINCT,
    PALETTE,
    dodge,
    numbered,
    style,
    variant_label,
)

# The Okabe–Ito palette (Okabe & Ito 2008, "Color Universal Design"), as its hex codes are
# usually given (from memory): every colour of ours is one of these, and the yellow is left
# out because it is hard to see on white (common practice).
OKABE_ITO = {"#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7", "#000000"}


def test_the_palette_is_okabe_ito_without_its_yellow():
    assert set(PALETTE) == OKABE_ITO - {"#F0E442"} and len(PALETTE) == 7


def test_the_first_70_variants_each_get_their_own_colour_and_marker():
    # 7 colours and 10 markers cycle with co-prime periods: lcm(7, 10) = 70 distinct pairs.
    assert N_DISTINCT == 70 == math.lcm(len(PALETTE), len(MARKERS))
    pairs = [style(i) for i in range(N_DISTINCT)]
    assert len(set(pairs)) == N_DISTINCT
    assert style(N_DISTINCT) == style(0)  # then they repeat, so the points get numbers
    assert not numbered(70) and numbered(71)
    assert variant_label("all-3", 70, 71, 3) == "[71] all-3 (n=3)"
    assert variant_label("all-3", 69, 70, 3) == "all-3 (n=3)"


def test_equal_values_are_spread_symmetrically_about_the_true_value():
    values = pd.Series([10.0, 20.0, 10.0, 10.0, 30.0, 30.0])
    linear = dodge(values, 0.25)
    assert linear.tolist() == [9.75, 20.0, 10.0, 10.25, 29.875, 30.125]
    logged = dodge(values, 0.1, log=True)
    # On a log axis: factors 10^−0.1, 1, 10^0.1 (plan order, left to right); the pair ±0.05.
    expected = [10 * 10**-0.1, 20.0, 10.0, 10 * 10**0.1, 30 * 10**-0.05, 30 * 10**0.05]
    assert logged.tolist() == pytest.approx(expected)
