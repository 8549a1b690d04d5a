"""Analysis: tables, per-image evidence, the paired bootstrap, the recommended plan, Pareto
fronts and the effective receptive field. Everything here returns data; `kablate.report` only
draws and writes it.

The names below are re-exported lazily (PEP 562 ``__getattr__``): importing one module of the
package (`pareto`, `halving`, as a sweep's workers do) does not import the others, which bring
scipy.stats, statsmodels and pandas, more than a CPU second of every worker's start.
"""

from importlib import import_module

HOMES = {  # name → the module of this package that defines it
    "Accuracy": "decide",
    "Contrast": "decide",
    "Decision": "decide",  # the function `decide` shares its module's name: import it from there
    "ErfMap": "erf",
    "centre_geometry": "erf",
    "effective_rf": "erf",
    "Evidence": "evidence",
    "gather_evidence": "evidence",
    "pareto_front": "pareto",
    "Interval": "stats",
    "t_interval": "stats",
    "t_interval_from_summary": "stats",
    "Analysis": "summary",
    "analyze": "summary",
}

__all__ = sorted(HOMES)


def __getattr__(name: str):
    if name in HOMES:
        return getattr(import_module(f"kablate.analysis.{HOMES[name]}"), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
