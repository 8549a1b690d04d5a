"""What the first layer learned: frequency coverage, dead and near-duplicate filters of a
variant's stem, from its trained weights (one ``(out_ch, in_ch, kh, kw)`` array per seed).

Read in this order: `power_spectrum` → `band_shares` / `radial_profile` (frequency coverage),
`dead_mask` / `pair_masks` (dead and near-duplicate filters), `describe_filters` (one seed),
`summarize_stems` (every variant, mean and 95% Student-t interval over seeds).

Method and thresholds (documented in sweeps/README.md, "What the report says about the
stem", and in the card):

- Each filter's input channels are zero-padded into an N×N array (``PAD_SIZE``, or the
  kernel's size if larger), so that kernels of different sizes are sampled at the same
  frequencies, and its power spectrum is the squared magnitude of the 2-D DFT summed over
  input channels. The radial frequency of a DFT bin is √(fx² + fy²) in cycles per pixel
  (numpy.fft.fftfreq). The radially averaged power spectrum averages the power over rings of
  width 1/N, the summary used for natural-image spectra by van der Schaaf & van Hateren 1996
  ("Modelling the power spectra of natural images", Vision Research 36; cited from memory).
- Band shares: the share of a filter's energy (Parseval: the sum of its power spectrum) at
  radial frequencies below 1/8 cycle per pixel (low, with the mean), from 1/8 to 1/4
  (middle), and from 1/4 up to the corner of the spectrum, √2/2 (high: the top octave below
  the Nyquist frequency 1/2, and the diagonals beyond it). Octave bands are common practice
  in image analysis (a Laplacian pyramid's levels are octaves, Burt & Adelson 1983).
  Shares are averaged over the live (not dead) filters of a seed; each filter counts once
  whatever its norm, so a few strong filters do not speak for the layer.
- Dead: a filter whose L2 norm is below ``DEAD_RATIO`` (0.1) of the median norm of its
  layer, so its energy is under 1% of a typical filter's. Our choice: trained filters of
  one layer have norms within a factor of a few of each other (common practice to expect),
  so a tenfold gap marks a filter that weight decay shrank because it got no gradient. With
  BatchNorm after the conv the norm alone does not silence a channel; a dead filter here is
  one that stopped learning.
- Near-duplicate: a live filter whose Pearson correlation (over all its weights) with
  another live filter exceeds ``DUPLICATE_R`` (0.9), i.e. more than 81% of its variance is
  shared. Opposite pairs (correlation below −0.9) are counted apart: under a ReLU a filter
  and its negative pass opposite halves of the signal, and first layers are known to learn
  such pairs (Shang et al. 2016, concatenated ReLU; from memory), so they are not redundant.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from kablate.analysis.stats import t_interval

PAD_SIZE = 128  # the DFT size; fine enough that bins on a band edge bias shares < 0.5 pp
BAND_EDGES = (1 / 8, 1 / 4)  # cycles per pixel: low | middle | high
BANDS = ("low", "middle", "high")
DEAD_RATIO = 0.1  # dead: norm < 0.1 × the layer's median norm (energy < 1% of a typical one)
DUPLICATE_R = 0.9  # near-duplicate: Pearson r > 0.9 with another live filter
METRICS = (
    *(f"share_{band}" for band in BANDS),
    "dead_share",
    "duplicate_share",
    "opposite_share",
)


def pad_size(kernels: list[tuple[int, int]]) -> int:
    """The common DFT size: ``PAD_SIZE``, or the largest kernel side if that is larger."""
    return max([PAD_SIZE, *(max(k) for k in kernels)])


def radial_frequency(size: int) -> np.ndarray:
    """(size, size) radial frequency of each 2-D DFT bin, in cycles per pixel."""
    f = np.fft.fftfreq(size)
    return np.hypot(f[:, None], f[None, :])


def power_spectrum(filters: np.ndarray, size: int) -> np.ndarray:
    """(n, size, size) power |DFT|² of each filter zero-padded to size × size, summed over
    its input channels. The filter sits in the corner: a shift changes only the phase."""
    w = np.asarray(filters, dtype=np.float64)
    if w.shape[-1] > size or w.shape[-2] > size:
        raise ValueError(f"a {w.shape[-2]}×{w.shape[-1]} kernel does not fit a {size}-point DFT")
    spectrum = np.fft.fft2(w, s=(size, size), axes=(-2, -1))
    return (np.abs(spectrum) ** 2).sum(axis=1)


def band_shares(power: np.ndarray) -> np.ndarray:
    """(n, 3) share of each filter's energy in the low, middle and high bands (rows sum to 1;
    NaN for an all-zero filter)."""
    f = radial_frequency(power.shape[-1])
    bands = np.digitize(f, BAND_EDGES)  # 0: f < 1/8, 1: 1/8 ≤ f < 1/4, 2: f ≥ 1/4
    total = power.sum(axis=(-2, -1))
    per_band = np.stack([power[:, bands == b].sum(axis=-1) for b in range(len(BANDS))], axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return per_band / total[:, None]


def radial_profile(power: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The radially averaged power spectrum: the mean power over rings of width 1/N.

    Returns:
        The ring centres r/N in cycles per pixel (r = 0 … ⌊N/√2⌉), and an (n, rings) array.
    """
    size = power.shape[-1]
    ring = np.rint(radial_frequency(size) * size).astype(int).ravel()
    counts = np.bincount(ring)
    flat = power.reshape(len(power), -1)
    sums = np.stack([np.bincount(ring, weights=row, minlength=len(counts)) for row in flat])
    return np.arange(len(counts)) / size, sums / counts


def filter_norms(filters: np.ndarray) -> np.ndarray:
    return np.sqrt((np.asarray(filters, dtype=np.float64) ** 2).reshape(len(filters), -1).sum(1))


def dead_mask(filters: np.ndarray, ratio: float = DEAD_RATIO) -> np.ndarray:
    """True for each filter whose norm is below ``ratio`` × the layer's median norm (or zero)."""
    norms = filter_norms(filters)
    return (norms < ratio * np.median(norms)) | (norms == 0)


def pair_masks(
    filters: np.ndarray, live: np.ndarray, threshold: float = DUPLICATE_R
) -> tuple[np.ndarray, np.ndarray]:
    """(near-duplicate, opposite) masks: a live filter whose Pearson correlation with another
    live filter is above ``threshold`` (resp. below −``threshold``). Dead filters and filters
    with constant weights (no correlation defined) are in neither."""
    flat = np.asarray(filters, dtype=np.float64).reshape(len(filters), -1)
    centred = flat - flat.mean(axis=1, keepdims=True)
    spread = np.sqrt((centred**2).sum(axis=1))
    ok = live & (spread > 0)
    unit = np.where(ok[:, None], centred / np.where(spread > 0, spread, 1)[:, None], 0.0)
    r = unit @ unit.T  # Pearson r between rows with defined spread
    np.fill_diagonal(r, 0.0)
    r[~ok, :] = 0.0
    r[:, ~ok] = 0.0
    return (r > threshold).any(axis=1), (r < -threshold).any(axis=1)


@dataclass(frozen=True)
class FilterStats:
    """One seed's stem: the metrics, the masks and the mean radial profile of its filters."""

    metrics: dict[str, float]  # METRICS → value
    dead: np.ndarray  # (n,) bool
    duplicate: np.ndarray  # (n,) bool
    opposite: np.ndarray  # (n,) bool
    frequencies: np.ndarray  # ring centres, cycles per pixel
    profile: np.ndarray  # mean over live filters of the radial profile of power / energy


def describe_filters(filters: np.ndarray, size: int) -> FilterStats:
    """Frequency coverage, dead and near-duplicate filters of one trained stem."""
    filters = np.asarray(filters, dtype=np.float64)
    dead = dead_mask(filters)
    duplicate, opposite = pair_masks(filters, ~dead)
    power = power_spectrum(filters[~dead], size)
    energy = power.sum(axis=(-2, -1), keepdims=True)
    freqs, rings = radial_profile(power / np.where(energy > 0, energy, 1))
    shares = band_shares(power)
    n = len(filters)
    with np.errstate(invalid="ignore"):  # every filter dead: no shares, NaN
        mean_shares = shares.mean(axis=0) if len(shares) else np.full(len(BANDS), np.nan)
        profile = rings.mean(axis=0) if len(rings) else np.full(len(freqs), np.nan)
    metrics = {f"share_{b}": float(s) for b, s in zip(BANDS, mean_shares, strict=True)}
    metrics |= {
        "dead_share": float(dead.sum() / n),
        "duplicate_share": float(duplicate.sum() / n),
        "opposite_share": float(opposite.sum() / n),
    }
    return FilterStats(metrics, dead, duplicate, opposite, freqs, profile)


def display_tiles(filters: np.ndarray) -> np.ndarray:
    """Each filter scaled for display into [0, 1] with zero at mid-grey: 0.5 + w / (2 max|w|)
    over the filter's own weights. RGB tiles (n, kh, kw, 3) for 3 input channels, otherwise
    greyscale (n, kh, kw) of the mean over input channels."""
    w = np.asarray(filters, dtype=np.float64)
    w = np.moveaxis(w, 1, -1) if w.shape[1] == 3 else w.mean(axis=1)
    peak = np.abs(w).reshape(len(w), -1).max(axis=1)
    scale = np.where(peak > 0, peak, 1.0).reshape((-1,) + (1,) * (w.ndim - 1))
    return 0.5 + w / (2 * scale)


@dataclass
class StemAtlas:
    """Every analysed variant's stem: per-seed rows, per-variant summary, profiles, tiles."""

    per_seed: pd.DataFrame  # variant, seed, n_filters, METRICS
    summary: pd.DataFrame  # variant, role, stem, n_seeds, n_filters, <metric>_mean/_ci_low/_ci_high
    size: int  # the DFT size every spectrum used
    profiles: dict[str, tuple[np.ndarray, np.ndarray]]  # variant → (frequencies, mean profile)
    shown: dict[str, tuple[int, np.ndarray, FilterStats]]  # variant → (seed, tiles, its stats)
    filters: dict[str, dict[int, np.ndarray]]  # variant → seed → the weights described
    skipped: list[tuple[str, str]] = field(default_factory=list)  # (variant, why)


def summarize_stems(
    weights: dict[str, dict[int, np.ndarray]], labels: dict[str, tuple[str, str]]
) -> StemAtlas:
    """Describe each variant's stem per seed, then its mean and 95% Student-t interval over
    seeds (`kablate.analysis.stats.t_interval`; no interval from one seed).

    Args:
        weights: variant → seed → the stem's trained weights (out_ch, in_ch, kh, kw).
        labels: variant → (role, stem description), e.g. ("baseline", "3×3").
    """
    size = pad_size([w.shape[-2:] for seeds in weights.values() for w in seeds.values()])
    rows, summary, profiles, shown = [], [], {}, {}
    for variant, seeds in weights.items():
        stats = {seed: describe_filters(seeds[seed], size) for seed in sorted(seeds)}
        rows += [
            {"variant": variant, "seed": seed, "n_filters": len(seeds[seed]), **s.metrics}
            for seed, s in stats.items()
        ]
        first = min(stats)
        shown[variant] = (first, display_tiles(seeds[first]), stats[first])
        profiles[variant] = (
            stats[first].frequencies,
            np.mean([s.profile for s in stats.values()], axis=0),
        )
        role, stem = labels[variant]
        entry = {"variant": variant, "role": role, "stem": stem, "n_seeds": len(stats)}
        entry["n_filters"] = len(seeds[first])
        for metric in METRICS:
            iv = t_interval([s.metrics[metric] for s in stats.values()])
            entry |= {f"{metric}_mean": iv.mean, f"{metric}_ci_low": iv.low}
            entry[f"{metric}_ci_high"] = iv.high
        summary.append(entry)
    return StemAtlas(pd.DataFrame(rows), pd.DataFrame(summary), size, profiles, shown, weights)
