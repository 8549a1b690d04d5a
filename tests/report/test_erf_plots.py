"""The effective-receptive-field plot: its legend says which squares are drawn."""

from __future__ import annotations

import numpy as np

from kablate.analysis.erf import ErfMap, Geometry
from kablate.report.erf_plots import (
    ERF_SQUARES,
    erf_legend,
    erf_view,
    plot_effective_rf,
    square_shown,
)
from kablate.report.plot_style import rendering

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def test_effective_rf_renders_png_and_svg(tmp_path):
    grad = np.exp(-((np.indices((9, 9)) - 4.0) ** 2).sum(axis=0) / 4.0)
    erf = ErfMap("base", grad / grad.max(), Geometry((4.0, 4.0), (7, 7), (1, 1)), 8, (0, 1), 3, 5)
    with rendering():
        paths = plot_effective_rf([erf], ["baseline"], tmp_path, "sub")
    assert [p.name for p in paths] == ["effective_rf.png", "effective_rf.svg"]
    assert paths[0].read_bytes()[:8] == PNG_SIGNATURE
    assert b"<svg" in paths[1].read_bytes()[:2000]


def _map(name, centre, rf, e95, e50, shape=(8, 8)):
    return ErfMap(name, np.ones(shape), Geometry(centre, (rf, rf), (1, 1)), 4, (0,), e50, e95)


def test_effective_rf_legend_says_which_squares_are_drawn():
    inside = _map("small", (4.0, 4.0), 7, 5, 3, shape=(9, 9))
    assert [label for label, _, _ in erf_legend([inside])] == [
        "theoretical receptive field",
        "square holding 95% of the gradient mass",
        "square holding 50% of the gradient mass",
    ]
    # An 8×8 input whose centre output sits at (2.5, 2.5), as with an even-sized last map:
    # the 95% square (side 10) reaches 2 px past the top-left of the input, so the view
    # widens to show it; a 28 px theoretical square is far larger and is said not drawn.
    big = _map("body-5", (2.5, 2.5), 28, 10, 6)
    mid = _map("all-3", (2.5, 2.5), 7, 10, 6)
    view = erf_view([big, mid])
    assert view == (-3.0, 8.0, -3.0, 8.0)
    assert square_shown(big, 10, view) and not square_shown(big, 28, view)
    labels = [label for label, _, _ in erf_legend([big, mid])]
    assert labels[0] == "theoretical receptive field (larger than the view for body-5)"
    assert labels[1:] == [
        "square holding 95% of the gradient mass",
        "square holding 50% of the gradient mass",
    ]
    assert erf_legend([big])[0][0].endswith("(larger than the view: not drawn)")
    # The legend's colours and styles are the ones the squares are drawn with.
    assert [(c, d) for _, c, d in erf_legend([big])] == [(c, d) for _, c, d in ERF_SQUARES]
