"""Warnings that must travel with a variant: undertrained, at chance level, diverged.

A flagged variant can still be the recommended plan, but never without its flag beside it.
"""

from __future__ import annotations

import pandas as pd
from scipy import stats

from kablate.lifecycle import DIVERGED, DONE

# "Still learning": in most of its seeds the last epoch had the best validation accuracy, or
# the mean training loss of the last WINDOW epochs is more than STILL_FALLING below that of the
# WINDOW epochs before them while still above LOSS_FLOOR (thresholds of ours; below the floor
# the network fits its training images and a relative drop is noise).
STILL_FALLING = 0.10
LOSS_FLOOR = 0.01  # nats of cross-entropy
WINDOW = 3


def still_learning(curve: pd.DataFrame) -> bool:
    """One trial's curve (epoch, train_loss, val_acc): best validation accuracy reached only
    at the last epoch (ties count as earlier), or a training loss still falling (above)."""
    curve = curve.sort_values("epoch")
    if len(curve) < 2:
        return False
    acc = curve["val_acc"].to_numpy()
    loss = curve["train_loss"].to_numpy()
    best_last = acc[-1] > acc[:-1].max()
    falling = False
    if len(loss) >= 2 * WINDOW:
        recent, before = loss[-WINDOW:].mean(), loss[-2 * WINDOW : -WINDOW].mean()
        falling = recent > LOSS_FLOOR and (before - recent) / before > STILL_FALLING
    return bool(best_last or falling)


def at_chance(n_correct: int, n_images: int, n_seeds: int, n_classes: int) -> bool:
    """Not better than guessing: the exact one-sided binomial test of a seed's average number
    of correct images against 1/n_classes (``scipy.stats.binomtest``) gives p ≥ 0.05."""
    k = round(n_correct / max(1, n_seeds))
    p = stats.binomtest(k, n_images, 1 / n_classes, alternative="greater").pvalue
    return bool(p >= 0.05)


def variant_flags(
    trials: pd.DataFrame,
    curves: pd.DataFrame,
    n_correct: dict[str, int],
    n_images: int,
    n_seeds: int,
    n_classes: int,
) -> dict[str, list[str]]:
    """variant name → its warnings, in words (an empty list when there are none)."""
    flags: dict[str, list[str]] = {}
    for name, mine in trials.groupby("variant", sort=False):
        found = []
        n_div = int((mine["status"] == DIVERGED).sum())
        if n_div:
            found.append(f"diverged in {n_div} of {len(mine)} seeds")
        if name in n_correct and at_chance(n_correct[name], n_images, n_seeds, n_classes):
            found.append(f"at chance level (1 in {n_classes})")
        done = mine[mine["status"] == DONE]
        learning = [
            still_learning(curves[(curves["variant"] == name) & (curves["seed"] == seed)])
            for seed in done["seed"]
        ]
        if learning and sum(learning) * 2 > len(learning):
            found.append(
                f"still learning at the last epoch in {sum(learning)} of {len(learning)} "
                "seeds: more epochs may change its rank"
            )
        flags[str(name)] = found
    return flags
