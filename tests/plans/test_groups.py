"""Layer groups: a plan gives kernel specs to body < stage < one conv, the most specific group
winning whatever the order in the file; an unknown group, a spec that does not parse and a
stride outside the stem are refused naming the group (the rules of the module docstring,
worked by hand on a stem and two stages of two convs)."""

from __future__ import annotations

import pytest

from kablate.plans.grammar import parse_kernel
from kablate.plans.groups import GroupError, list_slots, resolve_kernels
from tests.nets.tiny import tiny_network

NET = tiny_network(stages=((4, 2, "none"), (8, 2, "maxpool")))


def kernels(plan: dict[str, str]) -> dict[str, str]:
    """slot → the spec it gets, as the text that parses to it."""
    texts = {parse_kernel(t): t for t in ("3", "5", "7", "3x2", "11s4")}
    return {slot: texts[spec] for slot, spec in resolve_kernels(NET, plan).items()}


def test_slots_are_the_stem_then_each_stages_convs_in_forward_order():
    slots = list_slots(NET)
    assert [(s.name, s.index, s.stage) for s in slots] == [
        ("stem", 0, ""),
        ("stage1.0", 1, "stage1"),
        ("stage1.1", 2, "stage1"),
        ("stage2.0", 3, "stage2"),
        ("stage2.1", 4, "stage2"),
    ]


@pytest.mark.parametrize(
    "plan",
    [
        {"body": "5", "stage2": "3x2", "conv3": "7"},
        {"conv3": "7", "stage2": "3x2", "body": "5"},  # the order in the file does not matter
    ],
)
def test_the_most_specific_group_wins(plan):
    assert kernels(plan) == {
        "stem": "3",  # the base network's: body does not reach the stem
        "stage1.0": "5",
        "stage1.1": "5",
        "stage2.0": "7",  # conv3, one conv, beats stage2 and body
        "stage2.1": "3x2",
    }


def test_the_stem_alone_takes_a_stride():
    assert kernels({"conv0": "11s4"})["stem"] == "11s4"
    with pytest.raises(GroupError, match="gives stride 4.*which only the stem takes") as caught:
        resolve_kernels(NET, {"stage1": "11s4"})
    assert caught.value.group == "stage1"


def test_an_unknown_group_or_a_bad_spec_is_refused_naming_the_group():
    with pytest.raises(GroupError, match="did you mean `stage2`") as caught:
        resolve_kernels(NET, {"stage3": "5"})
    assert caught.value.group == "stage3"
    assert "(groups: body, stem, stage1, stage2, or one conv" in str(caught.value)
    with pytest.raises(GroupError, match='but got "0"') as caught:
        resolve_kernels(NET, {"body": "0"})
    assert caught.value.group == "body"
