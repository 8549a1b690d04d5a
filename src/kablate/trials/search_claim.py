"""How several processes (on one machine or several) share one search study and its budget.

The budget is kept in the study itself, as *tickets*: one WAITING trial per budget slot, with
the user attribute ``ticket`` = the slot's index (0 … budget − 1). Optuna's ``Study.ask`` pops
a WAITING trial by a compare-and-set of its state (WAITING → RUNNING) that the storage makes
atomic (the journal file's log order; PostgreSQL's ``SELECT … FOR UPDATE``), so two processes
never pop the same trial. The sampler then fills in the plan (a ticket of a start plan carries
it as fixed parameters). A slot is *settled* by an evaluated trial (COMPLETE), *held* while a
trial of it is WAITING or RUNNING, and *free* otherwise; `issue_tickets` enqueues a ticket for
every free slot. So:

- a filtered or repeated proposal, or one a kill cut short, fails its trial; its slot is free
  again and is issued anew: it costs no budget;
- two runners that issue the same free slot at once make two tickets of it: the one with the
  lower trial number keeps it (`holds_ticket`), the other is given back (told FAIL with
  ``outcome = "surplus"``), as is a trial that ``ask`` created because another process had just
  popped the last ticket. At most one trial per slot is evaluated: the budget is exact.
- a repeat is decided the same way: a network evaluated, or being trained by a trial with a
  lower number, makes this proposal a repeat (`repeats`). Each process writes its claim (the
  ``key``) before it reads the others', so of two proposals of one network at least one sees
  the other.

A trial whose process died is found by the liveness check of the storage (`recover_search`):
a host ``flock`` per trial on a local storage, taken while popping under a host lock; Optuna's
heartbeat on PostgreSQL. It is told FAIL with ``outcome = "interrupted"``: its plan may be
proposed again and its slot is issued anew. (On PostgreSQL a process killed between ``ask`` and
its first heartbeat, a few milliseconds, leaves a trial that is never found stale: it keeps
its slot, and the search ends one plan short.)

With one process the proposals follow from the sampler's seed alone. With more, which process
tells its result first changes what NSGA-II proposes next, so the search is reproducible from
its seed only with ``--workers 1`` on one machine.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from contextlib import nullcontext

import optuna
from optuna.exceptions import UpdateFinishedTrialError
from optuna.trial import FrozenTrial, TrialState

from kablate.trials.liveness import WORKER, HeartbeatLiveness, LocalLiveness, process_name

TICKET = "ticket"  # user attribute: the budget slot a trial holds
CLAIMED = "claimed"  # the outcome of a trial while its plan trains
INTERRUPTED = "interrupted"  # a proposal whose training was cut short by a kill
SURPLUS = "surplus"  # a proposal beyond the budget, given back untrained
LIVE = (TrialState.WAITING, TrialState.RUNNING)


class SoloLiveness:
    """The liveness of a study that one process alone uses (an in-memory study, a test): a
    RUNNING trial found at the start was left by a process that is gone."""

    remote = False
    interval = 0.0

    def hold(self, trial_id: int) -> int:
        return trial_id

    def started(self, study: optuna.Study, trial_id: int) -> None:
        """Nothing to record."""

    def release(self, token: int | None) -> None:
        """Nothing to release."""

    def queue_lock(self):
        return nullcontext()


def issue_tickets(study: optuna.Study, budget: int, first: Sequence[Mapping[str, str]]) -> int:
    """Enqueue a ticket for every free budget slot; the first tickets ever issued carry the
    start plans ``first``. Returns how many were issued."""
    trials = study.get_trials(deepcopy=False)
    seen = {t.user_attrs[TICKET] for t in trials if TICKET in t.user_attrs}
    taken = {
        t.user_attrs[TICKET]
        for t in trials
        if TICKET in t.user_attrs and (t.state in LIVE or t.state == TrialState.COMPLETE)
    }
    issued = 0
    for slot in range(budget):
        if slot in taken:
            continue
        plan = dict(first[slot]) if slot not in seen and slot < len(first) else {}
        study.enqueue_trial(plan, user_attrs={TICKET: slot})
        issued += 1
    return issued


def holds_ticket(trials: Sequence[FrozenTrial], number: int, ticket: int | None) -> bool:
    """Whether trial ``number`` keeps its slot: no other trial of the slot was evaluated, and
    none with a lower number is waiting or running."""
    if ticket is None:  # created by `ask` with no ticket left
        return False
    for other in trials:
        if other.number == number or other.user_attrs.get(TICKET) != ticket:
            continue
        if other.state == TrialState.COMPLETE:
            return False
        if other.state in LIVE and other.number < number:
            return False
    return True


def repeats(trials: Sequence[FrozenTrial], number: int, key: str) -> bool:
    """Whether the network ``key`` was evaluated already, or is being trained by a trial with a
    lower number than ``number``."""
    for other in trials:
        if other.number == number or other.user_attrs.get("key") != key:
            continue
        if other.state == TrialState.COMPLETE:
            return True
        running = other.state == TrialState.RUNNING and other.user_attrs.get("outcome") == CLAIMED
        if running and other.number < number:
            return True
    return False


def recover_search(study: optuna.Study, liveness) -> int:
    """Tell FAIL, with ``outcome = "interrupted"``, every RUNNING trial whose process is gone;
    return how many. Their slots are issued anew and their plans may be proposed again."""
    storage = study._storage  # noqa: SLF001 (trial ids are only reachable here)
    if isinstance(liveness, HeartbeatLiveness):
        ids = storage._get_stale_trial_ids(study._study_id)  # noqa: SLF001 (Optuna's own test)
        return sum(_interrupt(storage, trial_id) for trial_id in ids)
    running = study.get_trials(deepcopy=False, states=(TrialState.RUNNING,))
    if not isinstance(liveness, LocalLiveness):  # one process: every RUNNING trial is stale
        return sum(_interrupt(storage, t._trial_id) for t in running)
    n = 0
    with liveness.queue_lock():  # `pop` holds a trial's lock before this can look at it
        for trial in running:
            token = liveness.hold(trial._trial_id)
            if token is None:
                continue  # its process is alive
            try:
                n += _interrupt(storage, trial._trial_id)
            finally:
                liveness.release(token)
    return n


def _interrupt(storage, trial_id: int) -> bool:
    try:
        storage.set_trial_user_attr(trial_id, "outcome", INTERRUPTED)
        return bool(storage.set_trial_state_values(trial_id, TrialState.FAIL))
    except UpdateFinishedTrialError:  # told meanwhile, by its process or another recoverer
        return False


def pop(study: optuna.Study, liveness, distributions: dict) -> tuple[optuna.Trial, object]:
    """Ask the study for a proposal, holding its liveness token from the moment it runs."""
    with liveness.queue_lock():
        trial = study.ask(distributions)
        token = liveness.hold(trial._trial_id)  # noqa: SLF001
    liveness.started(study, trial._trial_id)  # noqa: SLF001
    trial.set_user_attr(WORKER, process_name())  # for `status`: who trains it
    return trial, token


def give_back(study: optuna.Study, trial: optuna.Trial) -> None:
    """A proposal beyond the budget: told FAIL untrained, and not counted as a proposal."""
    trial.set_user_attr("outcome", SURPLUS)
    study.tell(trial, state=TrialState.FAIL)


def has_running(study: optuna.Study) -> bool:
    return bool(study.get_trials(deepcopy=False, states=(TrialState.RUNNING,)))
