"""The trial lifecycle (lifecycle.py): its states, its job key."""

from __future__ import annotations

import pytest
from hypothesis import given
from hypothesis import strategies as st

from kablate import lifecycle
from kablate.lifecycle import FINISHED, JobKey


def test_finished_is_done_diverged_or_stopped():
    assert FINISHED == ("done", "diverged", "stopped")
    states = ("done", "diverged", "stopped", "failed", "retired")
    assert [lifecycle.is_finished(s) for s in states] == [True, True, True, False, False]
    assert lifecycle.n_finished(["done", "waiting", "diverged", "running", "stopped"]) == 3


def test_the_key_is_written_as_it_always_was():
    # Folders trials/<key>/ and the Optuna attribute `job` of existing studies use this form.
    assert str(JobKey("v1a2b3c4d", 12)) == "v1a2b3c4d-s12"


@given(
    st.text(alphabet="abcdefghijklmnopqrstuvwxyz0123456789-_", min_size=1, max_size=20),
    st.integers(min_value=0, max_value=10**6),
)
def test_parse_undoes_format(variant_id, seed):
    assert JobKey.parse(str(JobKey(variant_id, seed))) == JobKey(variant_id, seed)


@pytest.mark.parametrize("text", ["v1", "v1-s", "-s3", "v1-sx", "v1_s3"])
def test_parse_refuses_what_is_not_a_key(text):
    with pytest.raises(ValueError, match="not a job key"):
        JobKey.parse(text)


def test_every_transition_names_known_states_and_actors():
    states = {
        lifecycle.WAITING,
        lifecycle.RUNNING,
        lifecycle.DONE,
        lifecycle.DIVERGED,
        lifecycle.FAILED,
        lifecycle.RETIRED,
        lifecycle.STOPPED,
        lifecycle.INTERRUPTED,
        lifecycle.LOST,
    }
    actors = {"runner", "claim", "worker", "liveness", "race"}
    for (before, after), who in lifecycle.TRANSITIONS.items():
        assert before in states | {None} and after in states
        assert set(who) <= actors
    # Nothing leaves a finished state.
    assert not [pair for pair in lifecycle.TRANSITIONS if pair[0] in FINISHED]
    assert set(lifecycle.OUTCOMES.values()) <= states
