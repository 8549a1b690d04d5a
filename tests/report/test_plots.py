"""One smoke test per plot: each renders from analysis data and writes PNG and SVG."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from kablate.analysis.erf import ErfMap, Geometry
from kablate.analysis.summary import analyze
from kablate.report.card import CardContext, render_card
from kablate.report.plots import (
    plot_accuracy_vs_cost,
    plot_effective_rf,
    plot_grid_heatmap,
    plot_learning_curves,
    plot_rf_vs_accuracy,
    rendering,
)
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
        for e in range(4)
    ]
    a = analyze(rows(), curves, p, [{"stem": ["3", "5"], "body": ["3", "5"]}])
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
    ],
)
def test_accuracy_vs_cost(analysis, tmp_path, cost, label, stem):
    with rendering():
        check(plot_accuracy_vs_cost(analysis, cost, label, tmp_path, "sub"), stem)


def test_rf_vs_accuracy(analysis, tmp_path):
    with rendering():
        check(plot_rf_vs_accuracy(analysis, tmp_path, "sub"), "rf_vs_accuracy")


def test_learning_curves(analysis, tmp_path):
    with rendering():
        check(plot_learning_curves(analysis, tmp_path, "sub"), "learning_curves")


def test_grid_heatmap(analysis, tmp_path):
    assert isinstance(analysis.grid, pd.DataFrame)
    with rendering():
        check(plot_grid_heatmap(analysis, tmp_path, "sub"), "grid_heatmap")


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


def test_card_of_a_partial_sweep_lists_the_missing_trials(analysis):
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
    text = render_card(analysis, CardContext(meta, data, "0", ("a.png",), "MACs"))
    assert "#### Trials without a result" in text
    assert "Partial sweep: 4 of 12 trials have no result yet" in text
    assert "| never | 0 | waiting |" in text and "| big | 2 | running |" in text
    assert "0/3" in text  # the untrained variant's seeds are shown as 0 of 3
    assert "![" in text and "(a.png)" in text
