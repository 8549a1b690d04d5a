"""Per-variant tables from synthetic trial rows: statistics, fronts and partial sweeps."""

from __future__ import annotations

import math

import numpy as np
import pytest

from kablate.analysis.summary import analyze as analyze_rows
from kablate.spec.schema import PickSpec
from tests.analysis.synthetic import VAL, data_json, plan, rows, with_predictions


def analyze(rows, curves, plan, grids, cost="macs"):
    """The analysis of synthetic rows, with predictions that reproduce their accuracies."""
    return analyze_rows(
        with_predictions(rows), curves, plan, grids, data_json(), PickSpec(cost=cost)
    )


def test_variant_statistics_match_scipy_and_missing_trials_are_counted():
    complete = dict(VAL, v2=[0.93, 0.94, 0.95])  # every started variant has all three seeds
    a = analyze(rows(complete), [], plan(), [])
    assert a.seeds is None  # nothing to balance
    v = a.variants.set_index("variant")
    x = np.array(VAL["v0"])
    assert v.loc["base", "val_acc_mean"] == pytest.approx(x.mean())
    assert v.loc["base", "val_acc_std"] == pytest.approx(x.std(ddof=1))
    assert v.loc["base", "n_correct"] == round(100 * x.sum())
    # Both intervals come from the evidence (bootstrap over seeds and images).
    assert v.loc["base", "val_acc_ci_low"] < x.mean() < v.loc["base", "val_acc_ci_high"]
    t = x.mean() - 0.01
    assert v.loc["base", "test_acc_ci_low"] < t < v.loc["base", "test_acc_ci_high"]
    assert v.loc["base", "test_acc_mean"] == pytest.approx(x.mean() - 0.01)
    assert v["n_seeds"].to_dict() == {"base": 3, "cheap": 3, "big": 3, "never": 0}
    assert v["n_missing"].to_dict() == {"base": 0, "cheap": 0, "big": 0, "never": 3}
    assert a.n_missing == 3
    assert sorted(map(tuple, a.missing[["variant", "seed"]].values.tolist())) == [
        ("never", 0),
        ("never", 1),
        ("never", 2),
    ]
    assert math.isnan(v.loc["never", "val_acc_mean"])


def test_a_partial_sweep_compares_every_variant_on_the_seeds_all_have_finished():
    # big has finished seeds 0 and 1 only (seed 2 is running): base and cheap are compared on
    # seeds 0 and 1 too, and their seed-2 results are held back. never has no result at all
    # and does not restrict the others.
    a = analyze(rows(), [], plan(), [])
    assert a.seeds == [0, 1]
    v = a.variants.set_index("variant")
    assert v["n_seeds"].to_dict() == {"base": 2, "cheap": 2, "big": 2, "never": 0}
    assert v["n_held_back"].to_dict() == {"base": 1, "cheap": 1, "big": 0, "never": 0}
    assert v["n_missing"].to_dict() == {"base": 0, "cheap": 0, "big": 1, "never": 3}
    assert a.n_missing == 4
    assert v.loc["base", "val_acc_mean"] == pytest.approx(np.mean(VAL["v0"][:2]))
    assert v.loc["cheap", "val_acc_mean"] == pytest.approx(np.mean(VAL["v1"][:2]))
    # The comparisons use the same seeds (the evidence is paired on seeds and images).
    assert a.evidence.seeds == (0, 1)
    assert set(a.decision.contrasts) == {"cheap", "big"}  # never has no result


def test_fronts_are_booleans_and_ignore_untrained_variants():
    a = analyze(rows(), [], plan(), [])
    v = a.variants.set_index("variant")
    # cheap (0.900, 400 MACs) and big (0.935, 5000) are on the MACs front; base (0.91 at
    # 1000 MACs) is not beaten by cheap (less accurate) nor by big (costlier): also on it.
    assert v["front_macs"].to_dict() == {"base": True, "cheap": True, "big": True, "never": False}
    assert v["front_macs"].dtype == bool and v["front_params"].dtype == bool
    assert v["front_latency"].isna().all()  # not measured: no latency front
    assert v.loc["never", "front_all"] == False  # noqa: E712 (numpy bool)
    assert int(v["recommended"].sum()) == 1


def test_latency_front_when_measured():
    a = analyze(rows(), [], plan(latency=True), [], cost="latency")
    v = a.variants.set_index("variant")
    # latency: base 1 ms, cheap 2 ms, big 3 ms; base dominates cheap on latency.
    assert v["front_latency"].to_dict() == {
        "base": True,
        "cheap": False,
        "big": True,
        "never": False,
    }
    assert a.decision.cost == "latency_ms"


def test_baseline_comparison_is_paired_on_seeds_and_images():
    a = analyze(rows(), [], plan(), [])
    big = a.decision.contrasts["big"]
    # seeds 0 and 1 only (big's seed 2 is still running): (0.93 + 0.94 − 0.90 − 0.91) / 2
    assert big.diff == pytest.approx(np.mean([0.93 - 0.90, 0.94 - 0.91]))
    assert big.low <= big.diff <= big.high
    v = a.variants.set_index("variant")
    assert v.loc["big", "diff"] == pytest.approx(big.diff)
    assert v.loc["big", "p_holm"] >= v.loc["big", "p_value"]


def test_grid_table_for_a_two_axis_grid():
    p = plan()
    for v, axes in zip(
        p["variants"], [("3", "3"), ("3", "5"), ("5", "3"), ("5", "5")], strict=True
    ):
        v["grid"], v["axes"] = 0, [["stem", axes[0]], ["body", axes[1]]]
    a = analyze(rows(), [], p, [{"stem": ["3", "5"], "body": ["3", "5"]}])
    assert a.seeds == [0, 1]  # big has two seeds: every cell is compared on those
    assert a.grid.loc["3", "3"] == pytest.approx(0.905)
    assert a.grid.loc["5", "3"] == pytest.approx(0.935)
    assert math.isnan(a.grid.loc["5", "5"])
    assert analyze(rows(), [], p, [{"stem": ["3", "5"]}]).grid is None
    # Each cell's half-width is its variant's 95% interval's.
    v = a.variants.set_index("variant")
    for cell, name in ((("3", "3"), "base"), (("5", "3"), "big")):
        expected = (v.loc[name, "val_acc_ci_high"] - v.loc[name, "val_acc_ci_low"]) / 2
        assert a.grid_ci_half.loc[cell] == pytest.approx(expected)
    assert math.isnan(a.grid_ci_half.loc["5", "5"])  # never trained
    # The heatmap outlines the baseline's and the recommended plan's cells, found by their axes.
    cell = {v["name"]: tuple(dict(v["axes"]).values()) for v in p["variants"]}
    for role, name in (("baseline", "base"), ("recommended", a.recommended)):
        [(r, c)] = a.grid_marks[role]
        assert (a.grid.index[r], a.grid.columns[c]) == cell[name]


def test_grid_cell_kept_under_an_earlier_plan_name_is_found_by_its_alias():
    p = plan()
    # "base" is an explicit plan; the grid cell stem=3+body=3 built the same network.
    p["variants"][0]["aliases"] = ["stem=3+body=3"]
    for v, axes in zip(p["variants"][1:3], [("3", "5"), ("5", "3")], strict=True):
        v["grid"], v["axes"] = 0, [["stem", axes[0]], ["body", axes[1]]]
    a = analyze(rows(), [], p, [{"stem": ["3", "5"], "body": ["3", "5"]}])
    assert a.grid.loc["3", "3"] == pytest.approx(0.905)  # seeds 0 and 1 (see above)
    assert a.grid.loc["3", "5"] == pytest.approx(0.90)
    assert a.grid_marks["baseline"] == [(0, 0)]  # found by its alias too


def test_without_a_finished_baseline_the_intervals_still_come_from_the_evidence():
    from kablate.analysis.bootstrap import resample_accuracies
    from kablate.analysis.decide import accuracies

    trials = [
        dict(r, status="waiting", val_acc=None, test_acc=None) if r["variant"] == "base" else r
        for r in rows()
    ]
    a = analyze(trials, [], plan(), [])
    assert a.decision is None  # nothing to compare with
    expected = accuracies(a.evidence, resample_accuracies(a.evidence.correct))["cheap"]
    v = a.variants.set_index("variant")
    assert (v.loc["cheap", "val_acc_ci_low"], v.loc["cheap", "val_acc_ci_high"]) == (
        expected.low,
        expected.high,
    )


def with_memory(p: dict, act_mem: tuple[int, ...] = (4000, 6000, 2000, 100)) -> dict:
    for v, mem in zip(p["variants"], act_mem, strict=True):
        v["act_mem_bytes"] = mem
    return p


def test_memory_is_a_cost_the_pick_and_the_fronts_use():
    def pick(cost):  # a 10 pp margin: the synthetic evidence is too thin for the default
        p = with_memory(plan())
        return analyze_rows(
            with_predictions(rows()), [], p, [], data_json(), PickSpec(cost=cost, margin=10.0)
        )

    a = pick("memory")
    v = a.variants.set_index("variant")
    # activation memory: base 4000 B, cheap 6000 B, big 2000 B (and 0.935 against base's
    # 0.905): big is the one plan that needs less than the baseline, and it is better.
    assert v["front_memory"].to_dict() == {
        "base": False,
        "cheap": False,
        "big": True,
        "never": False,
    }
    assert a.decision.cost == "act_mem_bytes" and a.decision.recommended == "big"
    assert pick("macs").decision.recommended == "cheap"  # by MACs big is the costliest
    assert v.loc["big", "cost_ratio"] == 0.5


def test_weight_bytes_are_params_times_4_and_1():
    v = analyze(rows(), [], plan(), []).variants.set_index("variant")
    params = {"base": 100, "cheap": 50, "big": 300, "never": 10}
    assert v["weight_bytes_fp32"].to_dict() == {n: 4 * p for n, p in params.items()}
    assert v["weight_bytes_int8"].to_dict() == params


def test_a_plan_without_activation_memory_has_no_memory_front():
    p = plan()
    for v in p["variants"]:
        del v["act_mem_bytes"]
    a = analyze(rows(), [], p, [])
    assert a.variants["front_memory"].isna().all()
