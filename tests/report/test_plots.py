"""One smoke test per plot: each renders from analysis data and writes PNG and SVG."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from kablate.analysis.erf import ErfMap, Geometry
from kablate.analysis.summary import analyze
from kablate.report import plots
from kablate.report.build import draw_plots
from kablate.report.card import CardContext, render_card
from kablate.report.plots import (
    ERF_SQUARES,
    erf_legend,
    erf_view,
    heatmap_limits,
    plot_accuracy_vs_cost,
    plot_confusion,
    plot_effective_rf,
    plot_grid_heatmap,
    plot_learning_curves,
    plot_rf_vs_accuracy,
    rendering,
    square_shown,
)
from kablate.spec.schema import PickSpec
from tests.analysis.synthetic import data_json, with_predictions
from tests.analysis.test_tables import plan, rows

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def analysis():
    p = plan(latency=True)
    for v, axes in zip(
        p["variants"], [("3", "3"), ("3", "5"), ("5", "3"), ("5", "5")], strict=True
    ):
        v["grid"], v["axes"] = 0, [["stem", axes[0]], ["body", axes[1]]]
    curves = [
        {
            "variant": name,
            "seed": s,
            "epoch": e,
            "train_loss": 1.0 / (e + 1),
            "val_loss": 1.0 / (e + 1),
            "val_acc": 0.5 + 0.1 * e + 0.01 * s,
            "seconds": 1.0,
        }
        for name in ("base", "cheap", "big")
        for s in (0, 1)
        for e in range(1, 5)  # epochs count from 1 in curves.csv (train.record.shown_epoch)
    ]
    grids = [{"stem": ["3", "5"], "body": ["3", "5"]}]
    a = analyze(with_predictions(rows()), curves, p, grids, data_json(), PickSpec(margin=2.0))
    grad = np.exp(-((np.indices((9, 9)) - 4.0) ** 2).sum(axis=0) / 4.0)
    a.erf = [
        ErfMap("base", grad / grad.max(), Geometry((4.0, 4.0), (7, 7), (1, 1)), 8, (0, 1), 3, 5)
    ]
    return a


def check(paths, stem):
    assert [p.name for p in paths] == [f"{stem}.png", f"{stem}.svg"]
    assert paths[0].read_bytes()[:8] == PNG_SIGNATURE
    assert b"<svg" in paths[1].read_bytes()[:2000]


@pytest.mark.parametrize(
    ("cost", "label", "stem"),
    [
        ("params", "parameters", "accuracy_vs_params"),
        ("macs", "MACs", "accuracy_vs_macs"),
        ("latency_ms", "latency (ms)", "accuracy_vs_latency"),
        ("act_mem_bytes", "activation memory", "accuracy_vs_memory"),
    ],
)
def test_accuracy_vs_cost(analysis, tmp_path, cost, label, stem):
    with rendering():
        check(plot_accuracy_vs_cost(analysis, cost, label, tmp_path, "sub"), stem)


def drawn(monkeypatch, draw):
    """Call ``draw`` and return the figure it made, before it is saved and closed."""
    figures = []
    save = plots._save
    monkeypatch.setattr(
        plots, "_save", lambda fig, out, stem: figures.append(fig) or save(fig, out, stem)
    )
    draw()
    return figures[0]


def test_accuracy_vs_cost_draws_the_margin_band_and_hollow_markers(analysis, tmp_path, monkeypatch):
    with rendering():
        fig = drawn(
            monkeypatch, lambda: plot_accuracy_vs_cost(analysis, "macs", "MACs", tmp_path, "s")
        )
    ax = fig.axes[0]
    base = analysis.variants.set_index("variant").loc["base", "val_acc_mean"]
    bands = [p for p in ax.patches if p.get_label().startswith("baseline − margin")]
    assert len(bands) == 1
    y0, y1 = sorted((bands[0].get_y(), bands[0].get_y() + bands[0].get_height()))
    assert (y0, y1) == pytest.approx((base - 0.02, base))  # margin 2 pp
    # No Pareto staircase: no stepped line through the points.
    assert not [line for line in ax.get_lines() if line.get_drawstyle().startswith("steps")]
    # cheap (0.5 pp below on 100 images) cannot be told apart: hollow; base: filled.
    faces = {
        c.get_label().split(" (n=")[0]: c.lines[0].get_markerfacecolor() for c in ax.containers
    }
    assert faces["cheap"] == "white" and faces["base"] != "white"


def test_the_memory_plot_puts_each_variant_at_its_activation_memory(tmp_path, monkeypatch):
    p = plan()
    for v, mem in zip(p["variants"], (4000, 6000, 2000, 100), strict=True):
        v["act_mem_bytes"] = mem
    a = analyze(with_predictions(rows()), [], p, [], data_json(), PickSpec())
    with rendering():
        paths = draw_plots(a, tmp_path, "s")
        fig = drawn(
            monkeypatch,
            lambda: plot_accuracy_vs_cost(a, "act_mem_bytes", "memory", tmp_path, "s"),
        )
    assert tmp_path / "accuracy_vs_memory.png" in paths
    x = {c.get_label().split(" (n=")[0]: c.lines[0].get_xdata()[0] for c in fig.axes[0].containers}
    assert x == {"base": 4000, "cheap": 6000, "big": 2000}  # never has no result: not drawn


def test_confusion_matrices_show_the_pooled_counts(analysis, tmp_path, monkeypatch):
    with rendering():
        fig = drawn(monkeypatch, lambda: plot_confusion(analysis, tmp_path, "s"))
    d = analysis.decision
    names = list(dict.fromkeys([d.recommended, d.baseline]))
    panels = [ax for ax in fig.axes if ax.get_title()]
    assert [ax.get_title().split(": ")[1] for ax in panels] == names
    # The cells' annotations add up to seeds × images (2 seeds × 100 validation images).
    total = sum(int(t.get_text()) for t in panels[0].texts)
    assert total == 2 * 100
    assert (tmp_path / "confusion.png").read_bytes()[:8] == PNG_SIGNATURE


def test_rf_vs_accuracy(analysis, tmp_path):
    with rendering():
        check(plot_rf_vs_accuracy(analysis, tmp_path, "sub"), "rf_vs_accuracy")


def test_learning_curves(analysis, tmp_path):
    with rendering():
        check(plot_learning_curves(analysis, tmp_path, "sub"), "learning_curves")


def test_learning_curves_put_each_epoch_where_curves_csv_numbers_it(
    analysis, tmp_path, monkeypatch
):
    with rendering():
        fig = drawn(monkeypatch, lambda: plot_learning_curves(analysis, tmp_path, "sub"))
        full = fig.axes[0]
        assert [list(line.get_xdata()) for line in full.get_lines()] == [[1, 2, 3, 4]] * 3
        assert full.get_lines()[0].get_ydata()[0] == pytest.approx(0.605)  # epoch 1, 2 seeds


def test_grid_heatmap(analysis, tmp_path):
    assert isinstance(analysis.grid, pd.DataFrame)
    with rendering():
        check(plot_grid_heatmap(analysis, tmp_path, "sub"), "grid_heatmap")


def test_heatmap_colours_span_at_least_a_typical_interval_inside_0_to_1():
    nan = float("nan")
    means = np.array([[0.990, 0.995], [0.993, nan]])
    # Cells 0.5 pp apart, CIs ±2 pp wide: the scale spans one full CI (4 pp), capped at 100%.
    low, high = heatmap_limits(means, np.array([[0.02, 0.02], [0.02, nan]]))
    assert high == pytest.approx(1.0) and high - low == pytest.approx(0.04)
    # Cells far apart compared with their CIs: the scale is just their range.
    low, high = heatmap_limits(np.array([[0.5, 0.9]]), np.array([[0.01, 0.01]]))
    assert (low, high) == pytest.approx((0.5, 0.9))
    # No interval (one seed): the range of the means.
    low, high = heatmap_limits(np.array([[0.5, 0.7]]), np.array([[nan, nan]]))
    assert (low, high) == pytest.approx((0.5, 0.7))


def test_effective_rf(analysis, tmp_path):
    with rendering():
        check(plot_effective_rf(analysis.erf, ["baseline"], tmp_path, "sub"), "effective_rf")


def test_svg_is_deterministic(analysis, tmp_path):
    with rendering():
        a = (
            plot_rf_vs_accuracy(analysis, tmp_path / "a", "sub")
            if (tmp_path / "a").mkdir() is None
            else None
        )
        b = (
            plot_rf_vs_accuracy(analysis, tmp_path / "b", "sub")
            if (tmp_path / "b").mkdir() is None
            else None
        )
    assert a[1].read_bytes() == b[1].read_bytes() and a[0].read_bytes() == b[0].read_bytes()


def card_context(plots=("a.png",)) -> CardContext:
    """A results folder's sweep.json and data.json, as the card reads them."""
    meta = {
        "name": "synthetic",
        "source": "sweeps/synthetic.toml",
        "fingerprint": "abc",
        "seeds": [0, 1, 2],
        "resolved": {"recipe": {"epochs": 4}},
        "command": "kablate run x",
        "environment": {"cpu": "a CPU", "cores": 2, "packages": {"torch": "2"}},
        "workers": 1,
        "threads": 2,
        "storage": "study.journal",
    }
    data = {
        "source": "digits",
        "sizes": {"train": 10, "val": 5, "test": 5},
        "in_shape": [1, 8, 8],
        "n_classes": 10,
        "test_pool": "held out",
        "indices_sha1": {"train": "t", "val": "v", "test": "s"},
    }
    return CardContext(meta, data, "0", tuple(plots), "MACs")


def test_card_of_a_partial_sweep_lists_the_missing_trials(analysis):
    text = render_card(analysis, card_context())
    assert "#### Trials without a result" in text
    assert "Partial sweep: 4 of 12 trials have no result yet" in text
    assert "| never | 0 | waiting |" in text and "| big | 2 | running |" in text
    never = next(x for x in text.splitlines() if x.startswith("| never |"))
    assert "not compared yet" in never
    assert "![" in text and "(a.png)" in text


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
