"""The one ETA of a running sweep, on the terminal's bar and in the log alike.

It starts from the calibration (budget.py), which predicts every trial's seconds before the
first one runs, and corrects those predictions by how this machine actually does:

    r      = Σ actual_k / Σ predicted_k        over the trials that finished in this run
                                                (r = 1 before any has)
    left_k = max(0, r · predicted_k − elapsed_k)   for a trial that is running
    left_k = r · predicted_k                       for a trial still waiting
    ETA    = max(Σ left_k / n_workers, max_k left_k)

A ratio of sums rather than the last trial's time: one slow or fast trial moves it little, and
a big variant that takes three times a small one is not mistaken for a slowdown. The sum over
workers assumes they stay busy; the max term covers the end of the sweep, when one long trial
is left and the other workers are idle. Both are lower bounds of the time left, so the larger
is taken.
"""

from __future__ import annotations

from collections.abc import Mapping


def time_ratio(actual: Mapping[str, float], predicted: Mapping[str, float]) -> float:
    """Σ actual / Σ predicted over the trials in ``actual`` that have a prediction; 1 if none."""
    keys = [k for k in actual if predicted.get(k, 0.0) > 0]
    total = sum(predicted[k] for k in keys)
    return sum(actual[k] for k in keys) / total if total else 1.0


def eta_seconds(
    predicted: Mapping[str, float],
    measured: Mapping[str, float],
    done: set[str],
    running: Mapping[str, float],
    n_workers: int,
) -> float | None:
    """Seconds until every trial of ``predicted`` has finished, by the formula above.

    Args:
        predicted: job key → the calibration's predicted seconds, for every job of the sweep.
        measured: job key → claim-to-finish seconds of the trials that finished in this run.
        done: the keys of every finished job (this run's, earlier runs', diverged ones).
        running: job key → seconds the trial has been running.
        n_workers: this run's workers.

    Returns:
        None when there is no prediction to start from.
    """
    if not predicted:
        return None
    ratio = time_ratio(measured, predicted)
    left = [
        max(0.0, ratio * seconds - running[key]) if key in running else ratio * seconds
        for key, seconds in predicted.items()
        if key not in done
    ]
    return max(sum(left) / max(1, n_workers), max(left, default=0.0))
