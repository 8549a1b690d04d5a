"""The one-standard-error rule (Breiman et al. 1984; Hastie, Tibshirani & Friedman, ESL
§7.10) on a hand-worked table."""

from __future__ import annotations

import pandas as pd
import pytest

from kablate.analysis.select import one_se_rule
from kablate.errors import UsageError


def table() -> pd.DataFrame:
    # Hand-worked: best is A (mean 0.900, s = 0.020, n = 4) → SE = 0.020 / √4 = 0.010,
    # threshold = 0.900 − 1 × 0.010 = 0.890. Within it: A, B (0.895), D (0.893); not C
    # (0.889) nor E (no seed). Cheapest by MACs among A, B, D: B and D tie at 40, B is more
    # accurate → B. Tolerance 0 → only A. Tolerance 2 → threshold 0.880 → C (10 MACs).
    return pd.DataFrame(
        {
            "variant": ["A", "B", "C", "D", "E"],
            "n_seeds": [4, 4, 4, 4, 0],
            "val_acc_mean": [0.900, 0.895, 0.889, 0.893, float("nan")],
            "val_acc_std": [0.020, 0.030, 0.010, 0.050, float("nan")],
            "macs": [100, 40, 10, 40, 1],
            "params": [5, 9, 8, 7, 1],
            "latency_ms": [float("nan")] * 5,
            # Test accuracy that would favour other picks: selection must not read it.
            "test_acc_mean": [0.1, 0.2, 0.99, 0.3, 0.5],
        }
    )


def test_hand_worked_one_se_rule():
    sel = one_se_rule(table(), "macs", 1.0)
    assert sel.best == "A"
    assert sel.best_se == pytest.approx(0.010)
    assert sel.threshold == pytest.approx(0.890)
    assert sel.recommended == "B"
    assert sel.candidates == ("B", "D", "A")
    assert "cheapest variant by MACs" in sel.reason


def test_tolerance_and_cost_are_configurable():
    assert one_se_rule(table(), "macs", 0.0).recommended == "A"
    assert one_se_rule(table(), "macs", 2.0).recommended == "C"
    # By params among A (5), B (9), D (7): A.
    assert one_se_rule(table(), "params", 1.0).recommended == "A"


def test_selection_never_looks_at_test_accuracy():
    t = table()
    picks = one_se_rule(t, "macs", 1.0)
    t["test_acc_mean"] = t["test_acc_mean"][::-1].to_numpy()
    assert one_se_rule(t, "macs", 1.0) == picks
    assert one_se_rule(t.drop(columns=["test_acc_mean"]), "macs", 1.0) == picks


def test_single_seed_best_is_recommended_without_a_standard_error():
    t = table()
    t.loc[0, "n_seeds"] = 1
    sel = one_se_rule(t, "macs", 1.0)
    assert sel.recommended == "A" and "fewer than 2 finished seeds" in sel.reason
    assert sel.threshold == pytest.approx(0.900) and sel.candidates == ("A",)


def test_without_a_standard_error_a_tie_on_the_best_mean_goes_to_the_cheaper():
    # One seed each (a sweep cut short after seed 0): A and D share the best mean, 0.900,
    # and D costs 40 MACs against A's 100, so D is picked; B (0.895) is not within a
    # tolerance of zero.
    t = table()
    t["n_seeds"] = [1, 1, 1, 1, 0]
    t.loc[3, "val_acc_mean"] = 0.900
    sel = one_se_rule(t, "macs", 1.0)
    assert sel.recommended == "D" and sel.candidates == ("D", "A")
    assert "the cheapest by MACs of the 2 that share it" in sel.reason


def test_unmeasured_latency_is_a_usage_error():
    with pytest.raises(UsageError, match="latency was not measured"):
        one_se_rule(table(), "latency_ms", 1.0)


def test_no_finished_variant_is_refused():
    t = table()
    t["n_seeds"] = 0
    with pytest.raises(ValueError, match="no variant"):
        one_se_rule(t, "macs", 1.0)
