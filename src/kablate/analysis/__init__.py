"""Analysis: tables, statistics, Pareto fronts and the recommended plan."""

from kablate.analysis.pareto import pareto_front
from kablate.analysis.select import Selection, one_se_rule
from kablate.analysis.stats import Interval, PairedResult, paired_comparison, t_interval
from kablate.analysis.summary import Analysis, analyze

__all__ = [
    "Analysis",
    "Interval",
    "PairedResult",
    "Selection",
    "analyze",
    "one_se_rule",
    "paired_comparison",
    "pareto_front",
    "t_interval",
]
