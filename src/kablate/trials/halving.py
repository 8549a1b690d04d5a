"""Successive halving in the study: the rule's settings, each trial's rung scores and decisions.

The rule itself is `kablate.analysis.halving` (Jamieson & Talwalkar 2016; asynchronous, as in
Li et al. 2020 and Optuna's ``SuccessiveHalvingPruner``). Optuna's pruners cannot serve here:
they refuse a multi-objective study, and a pruner's rung records live in system attributes,
which we do not use. This module keeps everything in user attributes, so that every worker and
every machine sharing the study reads the same scores and decisions:

- ``halving`` (`RULE_ATTR`), a study user attribute, holds the settings (``first_epoch``,
  ``factor``, ``rungs``: the epochs compared after). The first run with ``[halving] enabled``
  writes it; a started study keeps it. A run with halving off sets it to None: trials then run
  to the end (the stopped ones stay stopped).
- At rung k a trial first records its validation accuracy (``halving-score-<k>``), then reads
  the scores that the other jobs of its seed recorded there (one per job: a resumed job's
  trials share theirs), then records the decision (``halving-rung-<k>``: ``epoch``, ``value``,
  ``kept``, ``n_compared``). Recording the score before reading lets two workers that reach a
  rung at once see each other.
- A decision is made once per job: a job resumed after a kill reads its earlier decision at
  that rung (from any of its trials) instead of deciding again, so a job that was stopped stays
  stopped and one that went on goes on.
- The baseline is never stopped: the report compares every variant with it on every seed, so
  its judge always promotes it. It still records its score, which the others compete with.
- A stopped trial ends with state PRUNED and ``outcome = "stopped"`` (lifecycle.STOPPED); its
  ``val_acc`` is the last epoch's validation accuracy, and it stores no predictions.
- A variant stopped on one seed gets no more seeds (`halted_variants`): the report never
  compares it (analysis/halving.py), so its other seeds would train for nothing. Its waiting
  trials are withdrawn and the runner enqueues none of its jobs (`trials.queue.withdraw_halted`,
  `trials.queue.enqueue_missing`); trials.csv lists those seeds as retired with
  ``retired_why = "stopped"``. A run with halving off trains them.

Only the trials of the same seed compete: they share their initialisation seed, data order and
augmentation (a paired comparison, as in the report). Which trials reached a rung first depends
on the workers' timing, so two runs with several workers can stop different trials (as with any
asynchronous successive halving).
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from dataclasses import dataclass

import optuna
from optuna.trial import FrozenTrial, TrialState

from kablate.lifecycle import STOPPED
from kablate.spec.schema import HalvingSpec

log = logging.getLogger("kablate")

RULE_ATTR = "halving"
SCORE_PREFIX = "halving-score-"
RUNG_PREFIX = "halving-rung-"


def halving_rule(spec: HalvingSpec, epochs: int) -> dict:
    """The settings stored in the study: first epoch, factor and the rungs' epochs."""
    from kablate.analysis.halving import rung_epochs  # with pandas and scipy: see `Judge`

    return {
        "first_epoch": spec.first_epoch,
        "factor": spec.factor,
        "rungs": rung_epochs(spec.first_epoch, spec.factor, epochs),
    }


def start_halving(study: optuna.Study, sweep) -> dict | None:
    """The halving rule of this run, or None: recorded on the first run with halving enabled
    (a started study keeps its rule), cleared by a run with halving off."""
    stored = study.user_attrs.get(RULE_ATTR)
    if not sweep.halving.enabled:
        if stored:
            study.set_user_attr(RULE_ATTR, None)
            log.info("halving is off: trials run to the end (stopped ones stay stopped)")
        return None
    rule = halving_rule(sweep.halving, sweep.recipe.epochs)
    if stored:
        if stored != rule:
            log.info("halving: this study keeps the rule it started with, %s", stored)
        return stored
    study.set_user_attr(RULE_ATTR, rule)
    return rule


def halted_variants(study: optuna.Study) -> dict[str, int]:
    """Variant id → the seed after which successive halving stopped it (its lowest seed with a
    stopped trial), for the variants that get no more seeds; empty while the study does not
    halve (a run with halving off trains their other seeds)."""
    if not study.user_attrs.get(RULE_ATTR):
        return {}
    out: dict[str, int] = {}
    for trial in study.get_trials(deepcopy=False, states=(TrialState.PRUNED,)):
        attrs = trial.user_attrs
        if attrs.get("outcome") == STOPPED and attrs.get("variant_id"):
            vid = attrs["variant_id"]
            out[vid] = min(out.get(vid, int(attrs["seed"])), int(attrs["seed"]))
    return out


def halving_summary(study: optuna.Study) -> dict | None:
    """The rule the card states, or None when the study does not halve."""
    return study.user_attrs.get(RULE_ATTR) or None


@dataclass
class Judge:
    """Decides one job's trial at each rung; `train.loop.train_trial` calls it after every epoch
    with the epochs done (from 1) and the validation accuracy. True: stop training."""

    study: optuna.Study
    trial_id: int
    job: str
    seed: int
    rule: dict
    baseline: bool = False  # the baseline always goes on (module docstring)

    def __call__(self, epochs_done: int, val_acc: float) -> bool:
        rungs = self.rule["rungs"]
        if epochs_done not in rungs:
            return False
        k = rungs.index(epochs_done)
        trials = self.study.get_trials(deepcopy=False)
        earlier = job_decision(trials, self.job, k)
        if earlier is not None:
            return not earlier["kept"]
        storage = self.study._storage  # noqa: SLF001 (a claimed trial's attributes)
        storage.set_trial_user_attr(self.trial_id, f"{SCORE_PREFIX}{k}", val_acc)
        competing = rung_scores(self.study.get_trials(deepcopy=False), self.seed, k, self.job)
        # Imported here, with the pandas and scipy of the rule's module: a worker of a sweep
        # without halving never needs them, and their import costs it a second of its start.
        from kablate.analysis.halving import promoted

        kept = self.baseline or promoted(val_acc, competing, int(self.rule["factor"]))
        decision = {
            "epoch": epochs_done,
            "value": val_acc,
            "kept": kept,
            "n_compared": len(competing) + 1,
        }
        storage.set_trial_user_attr(self.trial_id, f"{RUNG_PREFIX}{k}", decision)
        if not kept:
            log.info(
                "halving: %s stops after epoch %d (val acc %.4f, not among the best 1/%d of %d)",
                self.job,
                epochs_done,
                val_acc,
                self.rule["factor"],
                len(competing) + 1,
            )
        return not kept


def job_decision(trials: list[FrozenTrial], job: str, k: int) -> dict | None:
    """The decision any trial of ``job`` recorded at rung ``k``, or None."""
    for trial in trials:
        if trial.user_attrs.get("job") == job and f"{RUNG_PREFIX}{k}" in trial.user_attrs:
            return trial.user_attrs[f"{RUNG_PREFIX}{k}"]
    return None


def rung_scores(trials: list[FrozenTrial], seed: int, k: int, job: str) -> list[float]:
    """The scores that the other jobs of ``seed`` recorded at rung ``k``, one per job."""
    found: dict[str, float] = {}
    for trial in trials:
        attrs = trial.user_attrs
        other = attrs.get("job")
        if other and other != job and attrs.get("seed") == seed and f"{SCORE_PREFIX}{k}" in attrs:
            found.setdefault(other, float(attrs[f"{SCORE_PREFIX}{k}"]))
    return list(found.values())


def judge_for(
    study: optuna.Study, trial: optuna.Trial, baseline_id: str | None = None
) -> Callable[[int, float], bool] | None:
    """A worker's judge for its claimed ``trial``, or None when the study does not halve.
    ``baseline_id``: the sweep's baseline variant, which the judge always promotes."""
    rule = study.user_attrs.get(RULE_ATTR)
    if not rule or not rule.get("rungs"):
        return None
    attrs = trial.user_attrs
    is_baseline = baseline_id is not None and attrs.get("variant_id") == baseline_id
    return Judge(study, trial._trial_id, attrs["job"], int(attrs["seed"]), rule, is_baseline)
