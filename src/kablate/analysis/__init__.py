"""Analysis: tables, statistics, Pareto fronts, the recommended plan and the effective
receptive field. Everything here returns data; `kablate.report` only draws and writes it."""

from kablate.analysis.erf import ErfMap, centre_geometry, effective_rf
from kablate.analysis.pareto import pareto_front
from kablate.analysis.select import Selection, one_se_rule
from kablate.analysis.stats import (
    Interval,
    PairedResult,
    paired_comparison,
    t_interval,
    t_interval_from_summary,
)
from kablate.analysis.summary import Analysis, analyze

__all__ = [
    "Analysis",
    "ErfMap",
    "Interval",
    "PairedResult",
    "Selection",
    "analyze",
    "centre_geometry",
    "effective_rf",
    "one_se_rule",
    "paired_comparison",
    "pareto_front",
    "t_interval",
    "t_interval_from_summary",
]
