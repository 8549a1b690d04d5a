"""Learning-rate schedules agree with torch's own schedulers (torch.optim.lr_scheduler)."""

from __future__ import annotations

import pytest
import torch

from kablate.spec.schema import RecipeSpec
from kablate.train.schedule import get_lr_factor


def torch_factors(make, n_steps: int) -> list[float]:
    """The lr factor of each step under a torch scheduler stepped once per step."""
    opt = torch.optim.SGD([torch.zeros(1, requires_grad=True)], lr=1.0)
    scheduler = make(opt)
    factors = []
    for _ in range(n_steps):
        factors.append(opt.param_groups[0]["lr"])
        opt.step()
        scheduler.step()
    return factors


def test_cosine_without_warmup_is_cosine_annealing_to_zero():
    recipe = RecipeSpec(schedule="cosine", warmup_epochs=0)
    ours = [get_lr_factor(s, 50, 10, recipe) for s in range(50)]
    # torch.optim.lr_scheduler.CosineAnnealingLR with T_max = total steps, eta_min = 0.
    ref = torch_factors(lambda o: torch.optim.lr_scheduler.CosineAnnealingLR(o, 50), 50)
    assert ours == pytest.approx(ref, abs=1e-9)


def test_warmup_is_linear_from_one_step_to_the_peak():
    recipe = RecipeSpec(schedule="constant", warmup_epochs=0.5)
    ours = [get_lr_factor(s, 100, 10, recipe) for s in range(8)]
    # torch.optim.lr_scheduler.LinearLR from 1/5 to 1 over the 5 warmup steps.
    ref = torch_factors(
        lambda o: torch.optim.lr_scheduler.LinearLR(o, start_factor=0.2, total_iters=4), 8
    )
    assert ours == pytest.approx(ref, abs=1e-9)


def test_step_decay_is_step_lr_counted_in_epochs():
    recipe = RecipeSpec(schedule="step", step_every=3, step_gamma=0.5)
    steps_per_epoch = 4
    ours = [get_lr_factor(s, 40, steps_per_epoch, recipe) for s in range(40)]
    # torch.optim.lr_scheduler.StepLR with step_size = 3 epochs of 4 steps.
    ref = torch_factors(lambda o: torch.optim.lr_scheduler.StepLR(o, 12, gamma=0.5), 40)
    assert ours == pytest.approx(ref, abs=1e-9)


def test_cosine_after_warmup_is_linear_lr_then_cosine_annealing():
    recipe = RecipeSpec(schedule="cosine", warmup_epochs=0.5)
    ours = [get_lr_factor(s, 60, 10, recipe) for s in range(60)]

    # torch's SequentialLR: LinearLR from 1/5 to 1 over the 5 warmup steps, then
    # CosineAnnealingLR to 0 over the remaining 55 steps.
    def warmup_then_cosine(opt):
        warmup = torch.optim.lr_scheduler.LinearLR(opt, start_factor=0.2, total_iters=4)
        cosine = torch.optim.lr_scheduler.CosineAnnealingLR(opt, 55)
        return torch.optim.lr_scheduler.SequentialLR(opt, [warmup, cosine], milestones=[5])

    assert ours == pytest.approx(torch_factors(warmup_then_cosine, 60), abs=1e-9)
