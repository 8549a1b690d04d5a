"""One smoke test per plot: each renders from analysis data and writes PNG and SVG."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from kablate.analysis.erf import ErfMap, Geometry
from kablate.analysis.summary import Analysis, analyze
from kablate.report import plots
from kablate.report.card import render_card
from kablate.report.compose import draw_plots
from kablate.report.plot_style import PALETTE, rendering, style
from kablate.report.plots import (
    heatmap_limits,
    plot_accuracy_vs_cost,
    plot_confusion,
    plot_grid_heatmap,
    plot_learning_curves,
    plot_rf_vs_accuracy,
)
from kablate.spec.schema import PickSpec
from tests.analysis.synthetic import data_json, plan, rows, with_predictions

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def sweep_analysis(n_images: int = 100, margin: float = 2.0) -> Analysis:
    """The synthetic partial sweep of `tests.analysis.test_tables` on a 2×2 grid, with
    learning curves and one effective-receptive-field map."""
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
    a = analyze(
        with_predictions(rows(), n_images),
        curves,
        p,
        grids,
        data_json(n_images),
        PickSpec(margin=margin),
    )
    grad = np.exp(-((np.indices((9, 9)) - 4.0) ** 2).sum(axis=0) / 4.0)
    a.erf = [
        ErfMap("base", grad / grad.max(), Geometry((4.0, 4.0), (7, 7), (1, 1)), 8, (0, 1), 3, 5)
    ]
    return a


@pytest.fixture(scope="module")
def analysis():
    """The baseline is kept: on 100 images cheap is not shown within the 2 pp margin."""
    return sweep_analysis()


@pytest.fixture(scope="module")
def chosen():
    """A cheaper plan is recommended: on 1000 images cheap (0.5 pp below the baseline) is
    shown within a 3 pp margin, so the baseline and the recommended plan differ."""
    a = sweep_analysis(n_images=1000, margin=3.0)
    assert (a.baseline, a.recommended) == ("base", "cheap")
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
    save = plots.save_figure
    monkeypatch.setattr(
        plots, "save_figure", lambda fig, out, stem: figures.append(fig) or save(fig, out, stem)
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


def test_card_of_a_partial_sweep_lists_the_missing_trials(analysis, card_context):
    text = render_card(analysis, card_context)
    assert "#### Trials without a result" in text
    assert "Partial sweep: 4 of 12 trials have no result yet" in text
    assert "| never | 0 | waiting |" in text and "| big | 2 | running |" in text
    never = next(x for x in text.splitlines() if x.startswith("| never |"))
    assert "not compared yet" in never
    assert "![" in text and "(a.png)" in text


# --- Drawn content: each check reads matplotlib's artists and compares them with the analysis.


def points(ax):
    """variant → (x, y, colour, marker) of its error-bar marker, as drawn."""
    out = {}
    for c in ax.containers:
        line = c.lines[0]
        assert line.get_visible() and line.get_markersize() > 0  # drawn, not hidden
        name = c.get_label().split(" (n=")[0].split("] ")[-1]
        out[name] = (line.get_xdata()[0], line.get_ydata()[0], line.get_color(), line.get_marker())
    return out


def offsets(ax, label):
    [marks] = [c for c in ax.collections if c.get_label() == label]
    return [tuple(p) for p in marks.get_offsets()]


@pytest.mark.parametrize("cost", ["macs", "params"])
def test_points_marks_and_colours_are_the_analysis_data(chosen, tmp_path, monkeypatch, cost):
    with rendering():
        fig = drawn(monkeypatch, lambda: plot_accuracy_vs_cost(chosen, cost, "c", tmp_path, "s"))
    ax = fig.axes[0]
    drawn_points = points(ax)
    v = chosen.variants.reset_index(drop=True)
    trained = v[v["n_seeds"] > 0]
    assert set(drawn_points) == set(trained["variant"])  # "never" has no result: not drawn
    assert len(set(trained[cost])) == len(trained)  # no equal costs here: nothing dodged
    for i, row in trained.iterrows():
        x, y, colour, marker = drawn_points[row["variant"]]
        assert (x, y) == (row[cost], row["val_acc_mean"])
        assert (colour, marker) == style(i)  # the palette's, by plan order
    colours = [drawn_points[name][2] for name in trained["variant"]]
    assert len(set(colours)) == len(colours) and set(colours) <= set(PALETTE)  # not all black
    # The intervals drawn are the analysis's 95% bootstrap intervals.
    bars = {c.get_label().split(" (n=")[0]: c.lines[2][0].get_segments()[0] for c in ax.containers}
    for _, row in trained.iterrows():
        (_, low), (_, high) = bars[row["variant"]]
        assert (low, high) == pytest.approx((row["val_acc_ci_low"], row["val_acc_ci_high"]))
    for label, name in (("recommended", chosen.recommended), ("baseline", chosen.baseline)):
        row = v.set_index("variant").loc[name]
        assert offsets(ax, label) == [(row[cost], row["val_acc_mean"])]


def test_rf_plot_marks_the_baseline_and_the_recommended_plan(chosen, tmp_path, monkeypatch):
    with rendering():
        fig = drawn(monkeypatch, lambda: plot_rf_vs_accuracy(chosen, tmp_path, "s"))
    ax = fig.axes[0]
    drawn_points = points(ax)
    v = chosen.variants.set_index("variant")
    for label, name in (("recommended", chosen.recommended), ("baseline", chosen.baseline)):
        x, y, _, _ = drawn_points[name]
        assert offsets(ax, label) == [(x, y)] and y == v.loc[name, "val_acc_mean"]
        assert abs(x - v.loc[name, "rf"]) <= 0.25  # its rf, dodged by a quarter pixel at most


def crowd(n: int, cost=lambda i: 1000.0 * (i + 1)) -> Analysis:
    """A drawn-only analysis of ``n`` variants with 40-character names (invented numbers: the
    plots' layout is under test, not the statistics)."""
    names = [f"stem=7x7+stage1=5x5+stage2=3x3+head-{i:04d}" for i in range(n)]
    assert {len(name) for name in names} == {40}
    acc = np.linspace(0.80, 0.90, n)
    variants = pd.DataFrame(
        {
            "variant": names,
            "variant_id": [f"v{i}" for i in range(n)],
            "n_seeds": 3,
            "val_acc_mean": acc,
            "val_acc_ci_low": acc - 0.01,
            "val_acc_ci_high": acc + 0.01,
            "p_holm": 0.01,
            "macs": [cost(i) for i in range(n)],
            "rf": 9 + 2 * (np.arange(n) % 5),
            "recommended": [i == min(3, n - 1) for i in range(n)],
        }
    )
    curves = pd.DataFrame(
        [
            {"variant": name, "seed": 0, "epoch": e, "val_acc": acc[i] * e / 3}
            for i, name in enumerate(names)
            for e in (1, 2, 3)
        ]
    )
    return Analysis(pd.DataFrame(), variants, curves, names[0], PickSpec(), None)


def axes_height(fig) -> float:
    return fig.axes[0].get_window_extent().height / fig.dpi


@pytest.mark.parametrize("kind", ["cost", "curves"])
def test_legends_of_50_variants_with_long_names_fit_in_the_figure(tmp_path, monkeypatch, kind):
    def draw(a):
        if kind == "cost":
            return lambda: plot_accuracy_vs_cost(a, "macs", "MACs", tmp_path, "s")
        return lambda: plot_learning_curves(a, tmp_path, "s")

    with rendering():
        fig = drawn(monkeypatch, draw(crowd(50)))
        fig.canvas.draw()
        small = drawn(monkeypatch, draw(crowd(4)))
        small.canvas.draw()
    [legend] = fig.legends
    texts = [t.get_text() for t in legend.get_texts()]
    keys = ["hollow: not told apart from\nthe baseline (Holm p ≥ 0.05)", "recommended", "baseline"]
    names = [n for n in texts if n.startswith("stem=7x7")]
    assert len(names) == 50 and len(texts) == 50 + (len(keys) if kind == "cost" else 0)
    if kind == "cost":
        assert sorted(set(texts) - set(names)) == sorted(keys)
    box = fig.bbox
    for text in legend.get_texts():
        extent = text.get_window_extent()
        assert box.x0 <= extent.x0 and extent.x1 <= box.x1, text.get_text()
        assert box.y0 <= extent.y0 and extent.y1 <= box.y1, text.get_text()
    # The subtitle stays above the axes however tall the figure grows.
    [subtitle] = [t for t in fig.texts if t.get_text() == "s"]
    assert subtitle.get_window_extent().y0 >= fig.axes[0].get_window_extent().y1
    # The figure grew with the legend, so the axes kept their size (within 3%).
    assert axes_height(fig) == pytest.approx(axes_height(small), rel=0.03)


def test_beyond_70_variants_every_point_carries_its_number(tmp_path, monkeypatch):
    a = crowd(75)
    with rendering():
        fig = drawn(monkeypatch, lambda: plot_accuracy_vs_cost(a, "macs", "MACs", tmp_path, "s"))
    ax = fig.axes[0]
    numbers = {t.get_text(): t.xy for t in ax.texts}
    labels = [c.get_label() for c in ax.containers]
    for i, row in a.variants.iterrows():
        assert numbers[str(i + 1)] == (row["macs"], row["val_acc_mean"])
        assert labels[i].startswith(f"[{i + 1}] {row['variant']}")


def test_variants_of_equal_cost_are_drawn_side_by_side_about_it(tmp_path, monkeypatch):
    # Three plans at 2000 MACs and two at 5000, as all-3, stem-5 and stem-7 can be.
    macs = [1000.0, 2000.0, 2000.0, 2000.0, 5000.0, 5000.0]
    a = crowd(len(macs), cost=lambda i: macs[i])
    with rendering():
        fig = drawn(monkeypatch, lambda: plot_accuracy_vs_cost(a, "macs", "MACs", tmp_path, "s"))
    ax = fig.axes[0]
    x = np.array([c.lines[0].get_xdata()[0] for c in ax.containers])  # in plan order
    assert len(set(x)) == len(x)  # no two points share an x position
    assert x[0] == 1000.0
    for group in ([1, 2, 3], [4, 5]):
        shift = np.log10(x[group] / np.array(macs)[group])
        assert np.all(np.diff(shift) > 0)  # plan order, left to right
        assert shift == pytest.approx(-shift[::-1])  # symmetric about the true cost
        assert np.diff(shift) == pytest.approx(np.full(len(group) - 1, np.diff(shift)[0]))
    assert "equal values side by side" in ax.get_xlabel()


def test_learning_curves_mark_the_baseline_and_the_recommended_plan(chosen, tmp_path, monkeypatch):
    with rendering():
        fig = drawn(monkeypatch, lambda: plot_learning_curves(chosen, tmp_path, "s"))
    full = fig.axes[0]
    c = chosen.curves
    marked = {}
    for line in full.get_lines():
        name, _, role = line.get_label().partition(" (n=2)")
        expected = c[c["variant"] == name].groupby("epoch")["val_acc"].mean().to_numpy()
        assert line.get_ydata() == pytest.approx(expected)
        thick = line.get_linewidth() > 2 * min(x.get_linewidth() for x in full.get_lines())
        assert thick == bool(role), line.get_label()  # exactly the marked lines are thick
        if role:
            marked[role.strip(" ()")] = name
    assert marked == {"baseline": "base", "recommended": "cheap"}


def test_the_heatmap_outlines_the_baseline_and_the_recommended_cells(chosen, tmp_path, monkeypatch):
    with rendering():
        fig = drawn(monkeypatch, lambda: plot_grid_heatmap(chosen, tmp_path, "s"))
    ax = fig.axes[0]
    # The fixture's axes per variant (see `chosen` above), not the chosen's own lookup.
    axes = {"base": ("3", "3"), "cheap": ("3", "5"), "big": ("5", "3"), "never": ("5", "5")}
    outlined = {
        p.get_label().removesuffix(" (outlined)"): (
            ax.get_yticklabels()[round(p.get_y() + p.get_height() / 2)].get_text(),
            ax.get_xticklabels()[round(p.get_x() + p.get_width() / 2)].get_text(),
        )
        for p in ax.patches
        if p.get_label().endswith("(outlined)")
    }
    assert outlined == {"baseline": axes["base"], "recommended": axes["cheap"]}
    labels = [t.get_text() for t in fig.legends[0].get_texts()]
    assert labels == ["baseline (outlined)", "recommended (outlined)"]


@pytest.mark.parametrize(
    ("cost", "values"),
    [
        ("latency", [0.21, 0.34, 0.36, 0.8]),
        ("latency", [0.03, 0.04, 0.09, 0.12]),
        ("macs", [35_000.0, 1.2e6, 1.8e6, 2.6e6]),
    ],
)
def test_each_cost_tick_label_reads_as_the_value_at_its_tick(tmp_path, monkeypatch, cost, values):
    # A latency axis in ms spans values under 1: a tick at 0.5 once read "0".
    a = crowd(len(values), cost=lambda i: values[i])
    with rendering():
        fig = drawn(monkeypatch, lambda: plot_accuracy_vs_cost(a, "macs", cost, tmp_path, "s"))
    ax = fig.axes[0]
    fig.canvas.draw()
    low, high = ax.get_xlim()
    shown = [
        (tick.get_loc(), tick.label1.get_text())
        for tick in ax.xaxis.get_major_ticks()
        if low <= tick.get_loc() <= high
    ]
    assert len(shown) >= 2
    units = {"k": 1e3, "M": 1e6, "G": 1e9}
    for loc, text in shown:
        read = float(text[:-1]) * units[text[-1]] if text[-1] in units else float(text)
        assert read == pytest.approx(loc, rel=0.01), (loc, text)
