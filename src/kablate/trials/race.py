"""Racing in the study: the seed rounds decided so far, and the jobs still worth enqueueing.

The rule itself is `kablate.analysis.race` (Maron & Moore 1994; Birattari et al. 2002). This
module runs it on the study, so that every worker and every machine sharing the study agrees:

- ``race`` (`RULE_ATTR`), a study user attribute, holds the race's settings (margin in pp,
  cost, baseline variant id, and ``futility``: whether it tests the margin rule's family,
  futility and inferiority, `kablate.analysis.race`).
  The first runner that races writes it; a started race keeps it.
  Without it (or with it set to None by a run with ``racing = "off"``) nothing is raced.
- Round r is the r-th seed of the sweep. It can be decided once every variant still in the
  race has finished (done or diverged) the seeds of rounds 0..r; it is decided on the
  evidence of those seeds alone, with the bootstrap's fixed seed, so two runners that decide
  it at once reach the same decision. Each decided round is one study user attribute,
  ``race-seed-<seed>`` (`ROUND_PREFIX`): the seeds compared, the variants compared, and each
  retired variant with its dominator and figures. A stored round is never decided again.
- The jobs to enqueue are those of the variants still in the race, for the seeds up to the
  first undecided round. Seeds therefore still run in rounds, and a run cut short by its
  budget holds a complete comparison of the variants that remain. A retired variant's
  waiting trials (enqueued by an earlier run without racing) are withdrawn: claimed with the
  storage's compare-and-set and told FAIL with ``outcome = "retired"`` (lifecycle.RETIRED;
  `trials.queue.withdraw`).
- A variant that successive halving stopped on a seed is out of the race: it gets no more
  seeds either (trials/halving.py), and rounds are decided without it.
- A variant added to the sweep after a round was decided joins the race at the first
  undecided round.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass

import numpy as np
import optuna
from optuna.trial import FrozenTrial, TrialState

from kablate.lifecycle import JobKey, is_finished
from kablate.spec.costs import COSTS
from kablate.trials.halving import halted_variants
from kablate.trials.jobs import Job
from kablate.trials.queue import enqueue_missing, job_status, tagged_trials, withdraw

log = logging.getLogger("kablate")

RULE_ATTR = "race"
ROUND_PREFIX = "race-seed-"
# A timed cost (CPU or ONNX Runtime latency) differs from machine to machine and run to run, so
# runners sharing a study could disagree on who costs no more: the race then compares by MACs.
RACE_FALLBACK_COST = "macs"


def racing_wanted(setting: str, budget_seconds: float, study: optuna.Study) -> bool:
    """Whether this run races: ``on``; or ``auto`` with --budget or on a study that already
    races (a resumed race stays a race); never ``off``."""
    if setting == "off":
        return False
    return setting == "on" or bool(budget_seconds) or bool(study.user_attrs.get(RULE_ATTR))


def race_rule(sweep, baseline_id: str) -> dict:
    """The race's settings from the sweep's ``[pick]``: margin (pp), cost, baseline id, and
    futility (the margin rule's family of tests: that rule never recommends a plan costlier than
    the baseline, and never one that loses more than the margin to it)."""
    cost = RACE_FALLBACK_COST if COSTS[sweep.pick.cost].timed else sweep.pick.cost
    return {
        "margin_pp": float(sweep.pick.margin),
        "cost": cost,
        "baseline": baseline_id,
        "futility": sweep.pick.rule == "margin",
    }


def read_rounds(study: optuna.Study) -> dict[int, dict]:
    """Seed → the stored record of its round."""
    attrs = study.user_attrs
    return {
        int(key[len(ROUND_PREFIX) :]): value
        for key, value in attrs.items()
        if key.startswith(ROUND_PREFIX) and value
    }


def retired_variants(rounds: dict[int, dict]) -> dict[str, dict]:
    """Variant id → its retirement: ``seed`` (the round's), ``n_seeds``, ``why`` (absent in
    races recorded before futility), ``by`` (variant id), ``by_name``, ``name``, ``diff``,
    ``upper``, ``p_holm``, ``margin_pp``, ``cost``."""
    out: dict[str, dict] = {}
    for seed, record in rounds.items():
        for vid, entry in record.get("retired", {}).items():
            out.setdefault(
                vid,
                dict(
                    entry,
                    seed=seed,
                    n_seeds=len(record["seeds"]),
                    margin_pp=record["margin_pp"],
                    cost=record["cost"],
                ),
            )
    return out


@dataclass
class Race:
    """The race of one sweep: its variants (id, name, race cost), seeds, rule and labels."""

    variants: list[tuple[str, str, float]]
    seeds: tuple[int, ...]
    rule: dict  # `race_rule`
    labels: np.ndarray  # validation labels, in the order of every trial's predictions

    @classmethod
    def of(cls, catalog, labels, rule: dict) -> Race:
        from kablate.costs.plan_output import cost_json

        column = COSTS[rule["cost"]].column
        variants = []
        for item in catalog.variants:
            value = cost_json(item.cost).get(column)
            variants.append((item.variant.id, item.name, float(value or math.nan)))
        return cls(variants, tuple(catalog.sweep.seeds), rule, np.asarray(labels))

    def frontier(self, rounds: dict[int, dict]) -> int:
        """The index of the first seed whose round is undecided (len(seeds): all decided)."""
        return next((i for i, s in enumerate(self.seeds) if s not in rounds), len(self.seeds))

    def jobs(self, rounds: dict[int, dict]) -> list[Job]:
        """Seed-major jobs of the variants still in the race, up to the first undecided round."""
        retired = retired_variants(rounds)
        last = min(self.frontier(rounds), len(self.seeds) - 1)
        return [
            Job(vid, name, seed)
            for seed in self.seeds[: last + 1]
            for vid, name, _ in self.variants
            if vid not in retired
        ]

    def decide_rounds(self, study: optuna.Study) -> dict[int, dict]:
        """Decide every round that can be decided now, in order; the stored rounds after."""
        rounds = read_rounds(study)
        while (r := self.frontier(rounds)) < len(self.seeds):
            record = self.decide(study, rounds, r)
            if record is None:
                break
            seed = self.seeds[r]
            study.set_user_attr(f"{ROUND_PREFIX}{seed}", record)
            rounds = read_rounds(study)  # the stored record is authoritative
            names = [e["name"] for e in rounds[seed]["retired"].values()]
            log.info(
                "race: after seed %d (%d variant(s) compared) %s",
                seed,
                len(record["compared"]),
                f"retired {', '.join(names)}" if names else "no variant retired",
            )
        return rounds

    def decide(self, study: optuna.Study, rounds: dict[int, dict], r: int) -> dict | None:
        """The record of round ``r``, or None while a variant in the race lacks a seed."""
        from kablate.analysis.evidence import Evidence
        from kablate.analysis.race import retirements
        from kablate.results.evidence import decode_predictions

        out = set(retired_variants(rounds)) | set(halted_variants(study))
        seeds = self.seeds[: r + 1]
        by_job = tagged_trials(study)
        compared, correct, predicted = [], [], []
        for vid, _, _ in self.variants:
            if vid in out:
                continue
            keys = [str(JobKey(vid, s)) for s in seeds]
            found = [job_status(by_job[key]) if key in by_job else None for key in keys]
            if any(f is None or not is_finished(f[0]) for f in found):
                return None
            encoded = [scored(trial) for _, trial in found]
            if all(encoded):  # a variant that diverged on a seed is left out of the round
                rows = np.stack([decode_predictions(e) for e in encoded])
                compared.append(vid)
                predicted.append(rows)
                correct.append(rows == self.labels[None, :])
        record = {"seeds": list(seeds), "compared": compared, **self.rule, "retired": {}}
        if len(compared) < 2:
            return record
        evidence = Evidence(
            tuple(compared), tuple(seeds), np.stack(correct), np.stack(predicted), self.labels
        )
        costs = {vid: cost for vid, _, cost in self.variants if vid in compared}
        names = {vid: name for vid, name, _ in self.variants}
        retiring = retirements(
            evidence,
            costs,
            self.rule["baseline"],
            self.rule["margin_pp"] / 100,
            futility=bool(self.rule.get("futility")),  # absent: a race recorded before it
        )
        record["retired"] = {
            vid: {
                "name": names[vid],
                "why": d.why,
                "by": d.by,
                "by_name": names[d.by],
                "diff": d.diff,
                "upper": d.upper,
                "p_holm": d.p_holm,
            }
            for vid, d in sorted(retiring.items())
        }
        return record

    def advance(self, study: optuna.Study, liveness) -> int:
        """Decide what can be decided, withdraw retired variants' waiting trials, and enqueue
        the jobs of the variants in the race; how many jobs were enqueued. Callers hold
        ``liveness.queue_lock()``."""
        rounds = self.decide_rounds(study)
        withdraw(study, liveness, dict.fromkeys(retired_variants(rounds), {}))
        return enqueue_missing(study, self.jobs(rounds))


def scored(trial: FrozenTrial) -> str | None:
    """A done trial's encoded validation predictions (None: diverged, or none stored)."""
    if trial.state != TrialState.COMPLETE:
        return None
    return (trial.user_attrs.get("predictions") or {}).get("val")


def start_race(study: optuna.Study, catalog, labels, racing: str, budget: float) -> Race | None:
    """The race of this run, or None: records the rule on a race's first run, and clears it
    when the sweep says ``racing = "off"`` (the retired variants' seeds then run)."""
    if not racing_wanted(racing, budget, study):
        if racing == "off" and study.user_attrs.get(RULE_ATTR):
            study.set_user_attr(RULE_ATTR, None)
            log.info("racing is off: retired variants get their remaining seeds")
        return None
    rule = study.user_attrs.get(RULE_ATTR)
    if not rule:
        rule = race_rule(catalog.sweep, catalog.baseline.variant.id)
        study.set_user_attr(RULE_ATTR, rule)
    return Race.of(catalog, labels, rule)


def race_of_study(study: optuna.Study, catalog, labels) -> Race | None:
    """A worker's view: the study's race, if it has one."""
    rule = study.user_attrs.get(RULE_ATTR)
    return Race.of(catalog, labels, rule) if rule else None


def race_summary(study: optuna.Study) -> dict | None:
    """What the report says of the race: ``{"rule", "rounds"}``, or None without one."""
    rule = study.user_attrs.get(RULE_ATTR)
    return {"rule": rule, "rounds": read_rounds(study)} if rule else None
