"""Layer groups: the names a plan uses to give kernel specs to convs of the base network.

A *slot* is one conv position of the base network (the stem, or conv ``i`` of a stage). A plan
addresses slots through groups, from least to most specific:

    body            every stage conv (not the stem)
    <stage name>    every conv of that stage, e.g. ``stage2``
    stem, conv<N>, <stage>.<i>
                    one conv: the stem, the N-th conv overall (stem = conv0), or conv i of a stage

A more specific group wins over a less specific one, whatever their order in the file. Only
the stem takes a spec with a stride (``stem = "11s4"``, `stride_refusal` says why).
"""

from __future__ import annotations

from dataclasses import dataclass

from kablate.errors import did_you_mean
from kablate.plans.grammar import KernelSpec, KernelSpecError, parse_kernel
from kablate.spec.schema import NetworkSpec


@dataclass(frozen=True)
class Slot:
    name: str  # "stem" or "<stage>.<i>"
    index: int  # global conv index; the stem is 0
    stage: str  # "" for the stem
    base_kernel: str  # the base network's spec for this conv


class GroupError(ValueError):
    """A plan names a group the network does not have, or a spec that does not parse."""

    def __init__(self, group: str, message: str):
        self.group = group
        super().__init__(message)


def stage_names(network: NetworkSpec) -> list[str]:
    return [s.name or f"stage{i + 1}" for i, s in enumerate(network.stages)]


def list_slots(network: NetworkSpec) -> list[Slot]:
    """Every conv position of the base network, in forward order."""
    slots = [Slot("stem", 0, "", network.stem.kernel or network.kernel)]
    for stage, name in zip(network.stages, stage_names(network), strict=True):
        for i in range(stage.n_convs):
            kernel = stage.kernel or network.kernel
            slots.append(Slot(f"{name}.{i}", len(slots), name, kernel))
    return slots


def group_members(network: NetworkSpec) -> dict[str, tuple[int, list[str]]]:
    """Map every group name to (specificity, slot names). Higher specificity wins."""
    slots = list_slots(network)
    groups: dict[str, tuple[int, list[str]]] = {
        "body": (0, [s.name for s in slots if s.stage]),
    }
    for name in stage_names(network):
        groups[name] = (1, [s.name for s in slots if s.stage == name])
    for slot in slots:
        groups[slot.name] = (2, [slot.name])
        groups[f"conv{slot.index}"] = (2, [slot.name])
    return groups


def resolve_kernels(network: NetworkSpec, plan: dict[str, str]) -> dict[str, KernelSpec]:
    """The kernel spec of every slot under ``plan``.

    Raises:
        GroupError: an unknown group or a spec that does not parse, naming the group.
    """
    groups = group_members(network)
    slots = list_slots(network)
    chosen: dict[str, tuple[int, KernelSpec]] = {}
    for slot in slots:
        chosen[slot.name] = (-1, parse_group_spec(slot.base_kernel, slot.name))
    for group, text in plan.items():
        if group not in groups:
            visible = ["body", "stem", *stage_names(network)]
            hint = did_you_mean(group, list(groups))
            raise GroupError(
                group,
                f"is not a layer group of this network{hint} (groups: {', '.join(visible)}, "
                f"or one conv as conv<N> or <stage>.<i>)",
            )
        level, members = groups[group]
        spec = parse_group_spec(text, group)
        if spec.stride and members != ["stem"]:
            raise GroupError(group, stride_refusal(spec, text))
        for slot_name in members:
            if level >= chosen[slot_name][0]:
                chosen[slot_name] = (level, spec)
    return {name: spec for name, (_, spec) in chosen.items()}


def stride_refusal(spec: KernelSpec, text: str) -> str:
    """Why a spec with a stride is refused for a group other than the stem: a stage's stride is
    its ``down``, and a stride inside a stage would change shapes its residual adds rely on."""
    return (
        f'gives stride {spec.stride} ("{text}"), which only the stem takes (as `stem` or '
        "`conv0`); a stage downsamples with its `down` setting"
    )


def parse_group_spec(text: str, group: str) -> KernelSpec:
    """Parse the spec a plan gives ``group``; a spec that does not parse is a `GroupError`
    naming the group."""
    try:
        return parse_kernel(text)
    except KernelSpecError as exc:
        raise GroupError(group, f'{exc}, but got "{text}"') from None
