"""Successive halving's rule and its rank agreement (analysis/halving.py), on hand-worked
numbers with their sources named."""

from __future__ import annotations

import math

import pandas as pd
import pytest
from scipy import stats

from kablate.analysis.halving import (
    halving_account,
    promoted,
    put_stopped,
    rank_agreement,
    rung_epochs,
    stopped_variants,
)
from kablate.analysis.summary import analyze as analyze_rows
from kablate.spec.schema import PickSpec
from tests.analysis.synthetic import VAL, data_json, plan, rows, with_predictions


def analyze(trial_rows, curves, plan_json, grids):
    """The analysis of synthetic rows, with predictions that reproduce their accuracies."""
    return analyze_rows(
        with_predictions(trial_rows), curves, plan_json, grids, data_json(), PickSpec()
    )


def test_rungs_lie_at_first_epoch_times_factor_powers_before_the_last_epoch():
    # Rung k at r·η^k (Li et al. 2020, ASHA, Algorithm 2 with s = 0; Optuna 5.0's
    # SuccessiveHalvingPruner: min_resource * reduction_factor ** rung).
    assert rung_epochs(1, 3, 20) == [1, 3, 9]
    assert rung_epochs(2, 2, 16) == [2, 4, 8]  # 16 is the last epoch: nothing left to stop
    assert rung_epochs(5, 2, 5) == []


def test_promotion_keeps_the_best_third_as_they_arrive():
    # Hand-worked with η = 3 on values arriving in this order at one rung. A value goes on when
    # it is at least the (n // η)-th best of the n values so far, and, while n < η, when it is
    # the best (Li et al. 2020, ASHA: the top 1/η of the rung; Optuna 5.0's
    # _is_trial_promotable_to_next_rung for the first arrivals).
    arrivals = [0.5, 0.4, 0.7, 0.6, 0.9, 0.8]
    # n=1: alone; n=2 < η: 0.4 is not the best (0.5); n=3: 3 // 3 = 1, 0.7 is the best;
    # n=4: 0.6 < best 0.7; n=5: 0.9 is the best; n=6: 6 // 3 = 2, the 2nd best of
    # [0.9, 0.8, 0.7, 0.6, 0.5, 0.4] is 0.8, and 0.8 ≥ 0.8.
    kept = [promoted(v, arrivals[:i], 3) for i, v in enumerate(arrivals)]
    assert kept == [True, False, True, False, True, True]
    assert promoted(0.7, [0.7], 3)  # a tie with the cut goes on (Optuna compares with >=)
    assert not promoted(math.nan, [], 3)  # a NaN score never goes on


def test_rank_agreement_equals_scipy_and_the_textbook_formulas():
    # Early scores x and final scores y of five trials, no ties. Spearman's ρ = 1 − 6Σd²/(n(n²−1))
    # with rank differences d = (−1, 1, −1, 1, 0): 1 − 24/120 = 0.8 (Spearman 1904). Kendall's
    # τ = (C − D)/(n(n−1)/2) with the discordant pairs (1,2) and (3,4): (8 − 2)/10 = 0.6
    # (Kendall 1938).
    x, y = [0.1, 0.2, 0.3, 0.4, 0.5], [0.62, 0.61, 0.74, 0.73, 0.9]
    names = list("abcde")
    trials = pd.DataFrame(
        {"variant": names, "seed": 0, "status": "done", "val_acc": y, "variant_id": names}
    )
    curves = pd.DataFrame({"variant": names, "seed": 0, "epoch": 2, "val_acc": x})
    (found,) = rank_agreement(trials, curves, [2])
    assert found.epoch == 2 and found.n_trials == 5
    assert found.spearman == pytest.approx(0.8) and found.kendall == pytest.approx(0.6)
    rho, p_rho = stats.spearmanr(x, y)
    tau, p_tau = stats.kendalltau(x, y)
    assert (found.spearman, found.spearman_p) == pytest.approx((rho, p_rho))
    assert (found.kendall, found.kendall_p) == pytest.approx((tau, p_tau))


def test_rank_agreement_uses_only_the_trials_that_ran_to_the_end():
    names = list("abcd")
    trials = pd.DataFrame(
        {
            "variant": names,
            "variant_id": names,
            "seed": 0,
            "status": ["done", "done", "done", "stopped"],
            "val_acc": [0.9, 0.8, 0.7, 0.2],
        }
    )
    curves = pd.DataFrame(
        {"variant": names, "seed": 0, "epoch": 1, "val_acc": [0.3, 0.2, 0.1, 0.2]}
    )
    (found,) = rank_agreement(trials, curves, [1])
    assert found.n_trials == 3 and found.spearman == pytest.approx(1.0)
    # Fewer than three trials: no figure rather than a meaningless ±1.
    (few,) = rank_agreement(trials.iloc[:2], curves, [1])
    assert few.n_trials == 2 and math.isnan(few.spearman)


def test_a_stopped_variant_is_set_apart_with_its_last_score():
    trials = pd.DataFrame(
        {
            "variant": ["a", "a", "b", "b"],
            "variant_id": ["va", "va", "vb", "vb"],
            "seed": [0, 1, 0, 1],
            "status": ["done", "done", "stopped", "done"],
            "val_acc": [0.9, 0.8, 0.3, 0.7],
            "score_epoch": [4, 4, 1, 4],
        }
    )
    assert stopped_variants(trials).tolist() == [False, False, True, True]
    variants = pd.DataFrame({"variant": ["a", "b"], "variant_id": ["va", "vb"]})
    put_stopped(variants, trials)
    assert variants["n_stopped"].tolist() == [0, 1]
    assert variants["stopped_epoch"].tolist() == [pd.NA, 1]
    assert variants["stopped_val_acc"].iloc[1] == pytest.approx(0.3)
    account = halving_account(
        {"first_epoch": 1, "factor": 2, "rungs": [1, 2]},
        trials,
        pd.DataFrame(columns=["variant", "seed", "epoch", "val_acc"]),
    )
    assert account.n_done == 3 and account.stopped["variant"].tolist() == ["b"]
    assert halving_account(None, trials, pd.DataFrame()) is None


def test_a_variant_with_a_stopped_trial_is_never_recommended_even_when_it_leads():
    leading = dict(VAL, v1=[0.99, 0.99, 0.99], v2=[0.93, 0.94, 0.95])
    assert analyze(rows(leading), [], plan(), []).recommended == "cheap"  # fully trained
    halved = rows(leading)
    (cut,) = [r for r in halved if r["variant"] == "cheap" and r["seed"] == 2]
    cut.update(status="stopped", val_acc=0.3, test_acc=None, score_epoch=1)
    a = analyze(halved, [], plan(), [])
    assert a.recommended == "base"
    v = a.variants.set_index("variant")
    assert math.isnan(v.loc["cheap", "val_acc_mean"]) and not v.loc["cheap", "recommended"]
    assert (v.loc["cheap", "n_stopped"], v.loc["cheap", "stopped_epoch"]) == (1, 1)
    assert v.loc["cheap", "stopped_val_acc"] == pytest.approx(0.3)
    assert a.seeds is None  # the others are compared on all three seeds
