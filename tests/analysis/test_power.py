"""What a sweep can resolve, against the normal quantiles of scipy.stats and a simulation of
the one-sided test it describes.

Source of the formula: NIST/SEMATECH e-Handbook of Statistical Methods, §7.2.2.2 (sample
sizes for a one-sided test of a mean, normal approximation): δ = (z₁₋α + z₁₋β)·SE.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import norm

from kablate.analysis.power import (
    PLANNING_RATES,
    plan_note,
    resolution_after,
    resolution_before,
    z_sum,
)


def test_z_sum_is_the_sum_of_the_normal_quantiles():
    # statsmodels solves for the effect size numerically: equal to about 1e-6
    assert z_sum() == pytest.approx(norm.ppf(0.95) + norm.ppf(0.80), abs=1e-5)  # ≈ 2.486
    assert z_sum(0.025, 0.9) == pytest.approx(norm.ppf(0.975) + norm.ppf(0.90), abs=1e-5)


def test_the_smallest_difference_before_a_run_follows_the_handbook_formula():
    r = resolution_before(1000, 0.05)
    assert r.smallest == pytest.approx(2.4865 * math.sqrt(0.05 / 1000), rel=1e-4)  # ≈ 1.76 pp
    assert not r.observed and r.n_images == 1000
    assert resolution_after(0.01, 1000, 0.05).smallest == pytest.approx(z_sum() * 0.01)


def test_a_difference_of_the_smallest_size_is_detected_about_80_percent_of_the_time():
    """Simulated sweeps: each image's score difference is +1, 0 or -1, the plans disagreeing on
    a share d of images and the true difference being the resolution; the one-sided test at 5%
    with the standard error √(d/n) should reject in about 80% of them (slightly more: the
    true variance d − δ² is below the bound d)."""
    n, d = 2000, 0.05
    delta = resolution_before(n, d).smallest
    rng = np.random.default_rng(0)
    ups = rng.binomial(n, (d + delta) / 2, size=20_000)
    downs = rng.binomial(n - ups, ((d - delta) / 2) / (1 - (d + delta) / 2))
    mean = (ups - downs) / n
    power = np.mean(mean > norm.ppf(0.95) * math.sqrt(d / n))
    assert 0.78 < power < 0.84


def test_images_for_a_margin_is_the_fewest_that_resolve_it():
    r = resolution_before(300, 0.05)
    margin = 0.01
    need = r.images_for(margin)
    assert resolution_before(need, 0.05).smallest <= margin
    assert resolution_before(need - 1, 0.05).smallest > margin


def test_the_dry_run_note_gives_every_planning_rate_and_what_the_margin_needs():
    note = plan_note(300, 1.0, 3)
    for rate in PLANNING_RATES:
        r = resolution_before(300, rate)
        assert f"{100 * rate:g}% → {100 * r.smallest:.2f} pp" in note
    assert f"the margin needs {resolution_before(300, 0.05).images_for(0.01):,} images" in note
    assert "enough for the margin" in plan_note(100_000, 1.0, 3)
