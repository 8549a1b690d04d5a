"""The card's successive-halving section: the rule as run, a row per stopped trial, and the
rank agreement at each rung, with correlations computed here by scipy.stats."""

from __future__ import annotations

from types import SimpleNamespace

import pandas as pd
from scipy.stats import kendalltau, spearmanr

from kablate.analysis.halving import HalvingAccount, RungAgreement
from kablate.report.halving import halving_section
from tests.report.markdown import md_table

EARLY, FINAL = [0.30, 0.50, 0.45, 0.70, 0.60], [0.60, 0.80, 0.85, 0.90, 0.88]


def account() -> HalvingAccount:
    rho, rho_p = spearmanr(EARLY, FINAL)
    tau, tau_p = kendalltau(EARLY, FINAL)
    stopped = pd.DataFrame(
        {
            "variant": ["b", "a", "b"],
            "seed": [1, 0, 0],
            "score_epoch": [2, 1, 1],
            "val_acc": [0.4, 0.25, 0.333],
        }  # fmt: skip
    )
    return HalvingAccount(
        {"first_epoch": 1, "factor": 3, "rungs": [1, 3]},
        stopped,
        5,
        # b was stopped on seed 0: its seed 2 was never run
        pd.DataFrame({"variant": ["b"], "seed": [2], "retired_after": [0]}),
        [
            RungAgreement(1, 5, rho, rho_p, tau, tau_p),
            RungAgreement(3, 2, float("nan"), float("nan"), float("nan"), float("nan")),
        ],
    )


def section() -> list[str]:
    return halving_section(SimpleNamespace(halving=account()))


def test_the_rule_and_the_counts_are_said_as_run():
    text = "\n".join(section())
    assert "After epoch(s) 1, 3 (first rung 1, factor 3)" in text
    assert "best 1/3 of them stopped there" in text
    assert "3 trial(s) stopped early; 5 ran to the end." in text


def test_each_stopped_trial_has_a_row_in_variant_then_seed_order():
    assert md_table(section(), "| variant | seed | stopped after epoch") == [
        ["a", "0", "1", "25.00%"],
        ["b", "0", "1", "33.30%"],
        ["b", "1", "2", "40.00%"],
    ]


def test_the_agreement_rows_give_scipys_correlations_and_n_a_where_there_are_none():
    rows = md_table(section(), "| after epoch | trials")
    rho, rho_p = spearmanr(EARLY, FINAL)  # ρ = 0.9 on these five pairs
    tau, tau_p = kendalltau(EARLY, FINAL)  # τ-b = 0.8
    assert rows[0] == ["1", "5", f"{rho:.2f}", f"{rho_p:.3f}", f"{tau:.2f}", f"{tau_p:.3f}"]
    assert rows[0][2:5:2] == ["0.90", "0.80"]
    assert rows[1] == ["3", "2", "n/a", "n/a", "n/a", "n/a"]


def test_the_seeds_not_run_after_a_stop_have_a_row_each():
    text = "\n".join(section())
    assert "1 trial(s) not run: their variant was stopped on another seed." in text
    assert md_table(section(), "| variant | seed not run") == [["b", "2", "0"]]


def test_no_section_when_the_sweep_did_not_halve():
    assert halving_section(SimpleNamespace(halving=None)) == []
