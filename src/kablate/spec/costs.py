"""The cost vocabulary: every cost a sweep can pick on or draw a front for, in one place.

Contract: `[pick] cost`, `kablate report --cost`, the analysis's fronts (`Cost.front`), the
card's labels and captions and the accuracy-against-cost plots (`Cost.plot`) all read `COSTS`.
A cost's ``column`` is its field in plan.json and in the variants table. Adding a cost is one
entry here plus the column it names. A cost with ``always`` False may be missing from a plan
(latency is measured only on request, ONNX Runtime's only with the `onnx` extra; plans
written before activation memory was recorded lack it): it gets a front, a plot and a
selection only where every variant has it.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Cost:
    name: str  # as written in [pick] cost and --cost
    column: str  # in plan.json's variants and in variants.csv
    label: str  # in the card's prose and tables
    axis: str  # a plot's axis title
    prose: str  # in running text: "accuracy against <prose>" (the plot's caption)
    unit: str = ""  # appended to a figure in the card: "B" for bytes
    always: bool = True  # False: only present when measured
    timed: bool = False  # True: a timing, which differs between machines and between runs

    @property
    def front(self) -> str:
        """The variants table's column: whether a variant is on this cost's Pareto front."""
        return f"front_{self.name}"

    def timing(self, stat: str = "", batch: bool = False) -> str:
        """A timed cost's field in plan.json: its median (``stat`` "") or a quartile ("q1",
        "q3"), at batch 1 or, with ``batch``, at the latency batch size; `column` is the median
        at batch 1. `costs/plan_output.timing_json` writes them."""
        assert self.timed, f"{self.name} is not a timing"
        stem = self.column.removesuffix("_ms")
        return "_".join(part for part in (stem, "batch" if batch else "", stat, "ms") if part)

    @property
    def plot(self) -> str:
        """The file name (without suffix) of the accuracy-against-this-cost plot."""
        return f"accuracy_vs_{self.name}"


COSTS: dict[str, Cost] = {
    cost.name: cost
    for cost in (
        Cost("params", "params", "params", "parameters", "parameters"),
        Cost("macs", "macs", "MACs", "MACs", "MACs"),
        Cost(
            "latency",
            "latency_ms",
            "latency",
            "latency (ms)",
            "CPU latency",
            always=False,
            timed=True,
        ),
        Cost(
            "ort_latency",
            "ort_latency_ms",
            "ONNX Runtime latency",
            "ONNX Runtime latency (ms)",
            "ONNX Runtime latency on the CPU",
            always=False,
            timed=True,
        ),
        Cost(
            "memory",
            "act_mem_bytes",
            "activation memory",
            "activation memory per training step (bytes)",
            "the activation memory of a training step",
            "B",
            always=False,
        ),
    )
}
COST_NAMES = tuple(COSTS)


def cost_of_column(column: str) -> Cost:
    """The cost whose table column is ``column``."""
    return next(cost for cost in COSTS.values() if cost.column == column)
