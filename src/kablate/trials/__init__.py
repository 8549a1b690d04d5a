"""Trials: the queue on an Optuna study, workers, resume, status and export."""

from kablate.results.folder import ResultsFolder
from kablate.trials.jobs import Job, order_jobs
from kablate.trials.results import StoredResults, open_results
from kablate.trials.runner import RunOptions, RunSummary, run_sweep

__all__ = [
    "Job",
    "ResultsFolder",
    "RunOptions",
    "RunSummary",
    "StoredResults",
    "open_results",
    "order_jobs",
    "run_sweep",
]
