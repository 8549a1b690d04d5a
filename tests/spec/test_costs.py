"""The cost vocabulary: each timed cost names its timing fields as sweeps/README.md documents
them, and those are the fields the plan writes and the card's latency table reads."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from kablate.costs.latency import Timing
from kablate.costs.plan_output import LATENCY_FIELDS, ORT_FIELDS, timing_json
from kablate.spec.costs import COSTS, cost_of_column

README = Path(__file__).resolve().parents[2] / "sweeps" / "README.md"


def documented_timings(prefix: str) -> list[str]:
    """The ``<prefix>latency…_ms`` field names sweeps/README.md lists, in its order."""
    names = re.findall(r"`([a-z_]*latency[a-z0-9_]*_ms)`", README.read_text(encoding="utf-8"))
    return list(dict.fromkeys(n for n in names if re.fullmatch(f"{prefix}latency[a-z0-9_]*", n)))


@pytest.mark.parametrize(("name", "prefix"), [("latency", ""), ("ort_latency", "ort_")])
def test_a_timed_costs_fields_are_the_documented_ones(name, prefix):
    cost = COSTS[name]
    assert cost.timed
    mine = [cost.timing(stat, batch) for batch in (False, True) for stat in ("", "q1", "q3")]
    assert mine == documented_timings(prefix)  # median, q1, q3 at batch 1, then at the batch
    assert cost.timing() == cost.column  # a selection on the cost uses the median at batch 1
    assert set(mine) <= set(LATENCY_FIELDS if not prefix else ORT_FIELDS)


def test_timing_json_puts_each_figure_under_its_own_field():
    one, many = Timing(1.0, 0.5, 2.0, 30), Timing(3.0, 2.5, 4.0, 7)
    written = timing_json(COSTS["ort_latency"], one, many)
    assert written == {
        "ort_latency_ms": 1.0,
        "ort_latency_q1_ms": 0.5,
        "ort_latency_q3_ms": 2.0,
        "ort_latency_batch_ms": 3.0,
        "ort_latency_batch_q1_ms": 2.5,
        "ort_latency_batch_q3_ms": 4.0,
    }


def test_each_column_belongs_to_one_cost_with_its_own_front_and_plot():
    for cost in COSTS.values():
        assert cost_of_column(cost.column) is cost
    assert len({c.front for c in COSTS.values()}) == len({c.plot for c in COSTS.values()})
    assert len({c.plot for c in COSTS.values()}) == len(COSTS)
