"""Successive halving inside trials: the rungs, the promotion rule, and how well the early
score ranked the trials that ran to the end.

Successive halving (Jamieson & Talwalkar 2016, "Non-stochastic best arm identification and
hyperparameter optimization") trains many candidates briefly, keeps the best 1/η of them, trains
those longer, and so on. Its asynchronous form (Li et al. 2020, "A system for massively
parallel hyperparameter tuning", ASHA), which Optuna's ``SuccessiveHalvingPruner`` implements,
decides each trial as it reaches a rung, against the trials that reached that rung before it.
Here the resource is the epoch and η is ``[halving] factor``:

- the rungs lie after ``first_epoch`` × η^k epochs, k = 0, 1, ..., before the recipe's last
  epoch (`rung_epochs`);
- at a rung a trial's validation accuracy joins the values that the other trials of its seed
  recorded there; it goes on when it is at least the (n // η)-th best of those n values (the
  best, while n < η), else it stops (`promoted`: Optuna 5.0's
  ``_is_trial_promotable_to_next_rung`` for a maximised value, with ``bootstrap_count = 0``).

Its known bias: the score after a few epochs is a proxy of the final one, and a variant that
starts slowly (a larger kernel, a deeper stack) can be stopped although it would have ended
ahead. `rank_agreement` measures the proxy on the trials that ran to the end: Spearman's ρ and
Kendall's τ between their score at each rung and their final score (``scipy.stats``).

A variant with a stopped trial is never compared with fully trained ones: the report lists it
as stopped early with its last score (`stopped_variants`, `put_stopped`), outside the
recommendation. It gets no more seeds: its unrun seeds read ``retired`` with
``retired_why = "stopped"`` in trials.csv (trials/halving.py), and the card lists them.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import pandas as pd
from scipy import stats

from kablate.lifecycle import DONE, RETIRED, STOPPED
from kablate.results.columns import STOPPED_COLUMNS


def rung_epochs(first_epoch: int, factor: int, epochs: int) -> list[int]:
    """The epochs (counted from 1) after which trials are compared: first_epoch × factor^k,
    for k = 0, 1, ..., below ``epochs`` (a comparison after the last epoch stops nothing)."""
    out, epoch = [], first_epoch
    while epoch < epochs:
        out.append(epoch)
        epoch *= factor
    return out


def promoted(value: float, competing: list[float], factor: int) -> bool:
    """Whether a trial whose score at a rung is ``value`` goes on to the next rung.

    Args:
        competing: the scores that the other trials recorded at this rung before it.
        factor: η; the best 1/η of the n = len(competing) + 1 scores go on.

    Returns:
        True when ``value`` is at least the (n // η)-th largest score; while n < η, when it is
        the largest (asynchronous successive halving cannot hold a trial back until more
        arrive, so the first ones go on only by leading). NaN never goes on.
    """
    if math.isnan(value):
        return False
    ranked = sorted([*competing, value], reverse=True)
    position = max(len(ranked) // factor, 1) - 1
    return value >= ranked[position]


@dataclass(frozen=True)
class RungAgreement:
    """How the score at one rung ranked the trials that ran to the end."""

    epoch: int  # the rung, after this many epochs
    n_trials: int
    spearman: float  # ρ between the score at the rung and the final score
    spearman_p: float  # scipy's two-sided p-value for ρ = 0
    kendall: float  # τ-b, likewise
    kendall_p: float


def rank_agreement(
    trials: pd.DataFrame, curves: pd.DataFrame, epochs: list[int]
) -> list[RungAgreement]:
    """Spearman's ρ and Kendall's τ-b (``scipy.stats.spearmanr``, ``scipy.stats.kendalltau``)
    between each done trial's validation accuracy after each rung's epoch (``curves``, epochs
    counted from 1) and its final validation accuracy (``trials``' ``val_acc``). NaN where
    fewer than 3 trials, or all scores tie."""
    done = trials[trials["status"] == DONE]
    final = {(str(r.variant), int(r.seed)): float(r.val_acc) for r in done.itertuples()}
    out = []
    for epoch in epochs:
        at = curves[curves["epoch"].astype(int) == epoch] if len(curves) else curves
        early = {(str(r.variant), int(r.seed)): float(r.val_acc) for r in at.itertuples()}
        keys = [k for k in final if k in early]
        x, y = [early[k] for k in keys], [final[k] for k in keys]
        rho = p_rho = tau = p_tau = math.nan
        if len(keys) >= 3 and len(set(x)) > 1 and len(set(y)) > 1:
            rho, p_rho = stats.spearmanr(x, y)
            tau, p_tau = stats.kendalltau(x, y)
        out.append(
            RungAgreement(epoch, len(keys), float(rho), float(p_rho), float(tau), float(p_tau))
        )
    return out


def stopped_variants(trials: pd.DataFrame) -> pd.Series:
    """Mask of the trial rows whose variant has a stopped trial: those variants are left out
    of the comparison (their evidence is not a full training's) and shown on their own."""
    out = set(trials.loc[trials["status"] == STOPPED, "variant_id"])
    return trials["variant_id"].isin(out)


def put_stopped(variants: pd.DataFrame, trials: pd.DataFrame) -> None:
    """The `STOPPED_COLUMNS` of every variant (in place): 0 and empty for one never stopped.
    ``score_epoch`` of a stopped trial is its last epoch, ``val_acc`` its last score."""
    stopped = trials[trials["status"] == STOPPED]
    groups = dict(tuple(stopped.groupby("variant_id"))) if len(stopped) else {}
    n, epoch, acc = [], [], []
    for vid in variants["variant_id"]:
        mine = groups.get(vid)
        n.append(0 if mine is None else len(mine))
        epoch.append(None if mine is None else int(pd.to_numeric(mine["score_epoch"]).max()))
        acc.append(math.nan if mine is None else float(mine["val_acc"].mean()))
    n_col, epoch_col, acc_col = STOPPED_COLUMNS
    variants[n_col] = n
    variants[epoch_col] = pd.array(epoch, dtype="Int64")
    variants[acc_col] = acc


@dataclass
class HalvingAccount:
    """What the card says of successive halving: the rule, the stopped trials, the seeds not
    run because their variant was stopped, and the proxy's rank agreement on the trials that
    ran to the end."""

    rule: dict  # `trials.halving.halving_rule`: first_epoch, factor, rungs
    stopped: pd.DataFrame  # variant, seed, score_epoch (the last epoch), val_acc (its score)
    n_done: int
    not_run: pd.DataFrame  # variant, seed, retired_after: seeds withdrawn after a stop
    agreement: list[RungAgreement]


def halving_account(rule: dict | None, trials: pd.DataFrame, curves: pd.DataFrame):
    """The `HalvingAccount` of a sweep that halved (``rule`` from the study), else None."""
    if not rule:
        return None
    stopped = trials.loc[trials["status"] == STOPPED, ["variant", "seed", "score_epoch", "val_acc"]]
    n_done = int((trials["status"] == DONE).sum())
    why = trials["retired_why"] if "retired_why" in trials else pd.Series(None, trials.index)
    not_run = trials.loc[(trials["status"] == RETIRED) & (why == STOPPED)].reindex(
        columns=["variant", "seed", "retired_after"]
    )
    agreement = rank_agreement(trials, curves, rule["rungs"])
    return HalvingAccount(rule, stopped, n_done, not_run, agreement)
