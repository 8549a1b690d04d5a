"""Learning-rate schedules as a multiplier of the recipe's lr, evaluated per step."""

from __future__ import annotations

import math

from kablate.spec.schema import RecipeSpec


def get_lr_factor(step: int, total_steps: int, steps_per_epoch: int, recipe: RecipeSpec) -> float:
    """Linear warmup over ``warmup_epochs``, then cosine to 0, step decay, or constant."""
    warmup = int(round(recipe.warmup_epochs * steps_per_epoch))
    if step < warmup:
        return (step + 1) / warmup
    if recipe.schedule == "cosine":
        span = max(1, total_steps - warmup)
        return 0.5 * (1.0 + math.cos(math.pi * min(1.0, (step - warmup) / span)))
    if recipe.schedule == "step":
        epoch = step // max(1, steps_per_epoch)
        return recipe.step_gamma ** (epoch // recipe.step_every)
    return 1.0
