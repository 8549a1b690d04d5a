"""The paired two-level bootstrap over seeds and validation images.

A variant's validation accuracy varies for two reasons: the seed (initialisation, data order,
augmentation) and the particular validation images, which are the same for every seed and
every variant. Counting seeds only ignores the second, usually larger, term. Following
Bouthillier et al. 2021 ("Accounting for variance in machine learning benchmarks"), each
resample draws the seeds with replacement, then the images with replacement, and applies the
*same* draw to every variant, so that differences between variants are paired on both levels.

Why not ``scipy.stats.bootstrap``: it resamples the observations of one level (it can pair
several samples of one length), but not a crossed two-level design in which every seed scores
the same images. With one seed the two coincide, which tests/analysis/test_bootstrap.py checks.

The resampled accuracy of variant v is Σ_s Σ_i W[s]·U[i]·C[v, s, i] / (S·I), with W and U the
multinomial counts of the seed and image draws, so one matrix product per level computes all
resamples at once.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

N_RESAMPLES = 4000  # Monte Carlo error of a 2.5% quantile: about ±0.25 percentile points
BOOTSTRAP_SEED = 20261202  # fixed: the same evidence gives the same intervals
CONFIDENCE = 0.95
BLOCK = 500  # resamples drawn and multiplied at a time


def resample_accuracies(
    correct: np.ndarray, n_resamples: int = N_RESAMPLES, seed: int = BOOTSTRAP_SEED
) -> np.ndarray:
    """Accuracy of every variant in every paired two-level resample: shape (B, V).

    Args:
        correct: (V, S, I) correctness of each variant, seed and image.
    """
    n_variants, n_seeds, n_images = correct.shape
    rng = np.random.default_rng(seed)
    per_seed = correct.reshape(n_variants * n_seeds, n_images).astype(np.float32)
    out = np.empty((n_resamples, n_variants))
    # Blocks of resamples keep memory at a few block × images counts (10,000 test images
    # would otherwise need 4,000 × 10,000 counts at once). float32 holds the counts exactly.
    for start in range(0, n_resamples, BLOCK):
        size = min(BLOCK, n_resamples - start)
        seed_counts = rng.multinomial(n_seeds, np.full(n_seeds, 1 / n_seeds), size=size)
        image_counts = rng.multinomial(n_images, np.full(n_images, 1 / n_images), size=size)
        # (V·S, I) @ (I, b): correct images of each (variant, seed) under each image draw.
        hits = (per_seed @ image_counts.T.astype(np.float32)).reshape(n_variants, n_seeds, size)
        out[start : start + size] = np.einsum("vsb,bs->bv", hits, seed_counts.astype(np.float32))
    return out / (n_seeds * n_images)


def percentile_interval(samples: np.ndarray, confidence: float = CONFIDENCE) -> tuple[float, float]:
    """The bootstrap percentile interval (Efron & Tibshirani 1993, §13.3)."""
    tail = (1 - confidence) / 2
    low, high = np.quantile(samples, [tail, 1 - tail])
    return float(low), float(high)


def exact_binomial_interval(k: int, n: int, confidence: float = CONFIDENCE) -> tuple[float, float]:
    """Clopper & Pearson's exact interval for a proportion (``scipy.stats.binomtest``)."""
    ci = stats.binomtest(k, n).proportion_ci(confidence_level=confidence, method="exact")
    return float(ci.low), float(ci.high)


def zero_discordance_bound(n_images: int, confidence: float = CONFIDENCE) -> float:
    """How many images two variants may score differently, at most, when none was seen to.

    The one-sided exact upper bound for a proportion after 0 events in n trials is
    1 − (1 − confidence)^(1/n), about 3/n at 95% (the "rule of three": Hanley & Lippman-Hand
    1983, "If nothing goes wrong, is everything all right?"). A bootstrap cannot see this: with
    no disagreement every resample gives the same difference, an interval of zero width.
    """
    return 1 - (1 - confidence) ** (1 / n_images)
