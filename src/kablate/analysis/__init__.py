"""Analysis: tables, per-image evidence, the paired bootstrap, the recommended plan, Pareto
fronts and the effective receptive field. Everything here returns data; `kablate.report` only
draws and writes it."""

from kablate.analysis.decide import Accuracy, Contrast, Decision, decide
from kablate.analysis.erf import ErfMap, centre_geometry, effective_rf
from kablate.analysis.evidence import Evidence, gather_evidence
from kablate.analysis.pareto import pareto_front
from kablate.analysis.stats import Interval, t_interval, t_interval_from_summary
from kablate.analysis.summary import Analysis, analyze

__all__ = [
    "Accuracy",
    "Analysis",
    "Contrast",
    "Decision",
    "ErfMap",
    "Evidence",
    "Interval",
    "analyze",
    "centre_geometry",
    "decide",
    "effective_rf",
    "gather_evidence",
    "pareto_front",
    "t_interval",
    "t_interval_from_summary",
]
