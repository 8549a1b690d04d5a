"""The stem atlas's numbers: spectra against numpy.fft and analytic Fourier transforms, dead
and near-duplicate filters on hand-made filter banks, intervals against scipy.stats."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from kablate.analysis.stem import (
    PAD_SIZE,
    band_shares,
    dead_mask,
    describe_filters,
    display_tiles,
    pair_masks,
    power_spectrum,
    radial_profile,
    summarize_stems,
)
from tests.analysis.synthetic import planted_bank

N = PAD_SIZE  # the DFT size the report uses
EDGES = (1 / 8, 1 / 4)  # cycles per pixel, as documented in sweeps/README.md (the stem section)


def one_channel(kernel: np.ndarray) -> np.ndarray:
    return np.asarray(kernel, dtype=float)[None, None]


def gabor(size: int, freq: float, angle: float, sigma: float) -> np.ndarray:
    """A cosine carrier of ``freq`` cycles/px under a Gaussian envelope, centred."""
    c = (size - 1) / 2
    y, x = np.mgrid[:size, :size] - c
    along = x * math.cos(angle) + y * math.sin(angle)
    return np.exp(-(x**2 + y**2) / (2 * sigma**2)) * np.cos(2 * math.pi * freq * along)


def test_box_filter_power_matches_numpy_fft_and_the_dirichlet_kernel():
    box = np.ones((3, 3))
    power = power_spectrum(one_channel(box), N)[0]
    padded = np.zeros((N, N))
    padded[:3, :3] = box
    # The same zero-padded array through numpy.fft directly.
    np.testing.assert_allclose(power, np.abs(np.fft.fft2(padded)) ** 2, atol=1e-9)
    # The DTFT of a length-3 rectangular pulse: |sin(3πf) / sin(πf)|, 3 at f = 0
    # (Oppenheim & Schafer, Discrete-Time Signal Processing, the rectangular-pulse example).
    f = np.fft.fftfreq(N)
    with np.errstate(invalid="ignore", divide="ignore"):
        d = np.where(f == 0, 3.0, np.sin(3 * np.pi * f) / np.sin(np.pi * f))
    np.testing.assert_allclose(power, np.outer(d**2, d**2), atol=1e-9)
    freqs, profile = radial_profile(power[None])
    assert freqs[np.argmax(profile[0])] == 0 and profile[0, 0] == pytest.approx(81)


def test_a_delta_has_a_flat_spectrum_and_band_shares_equal_to_the_band_areas():
    delta = np.zeros((5, 5))
    delta[2, 2] = 1.0
    power = power_spectrum(one_channel(delta), N)
    _, profile = radial_profile(power)
    np.testing.assert_allclose(profile, 1.0)  # |DFT of a unit impulse| = 1 everywhere
    # A flat spectrum spreads energy like area: the disc of radius 1/8, the ring to 1/4, and
    # the rest of the unit square of frequencies (Parseval).
    a, b = EDGES
    areas = [math.pi * a**2, math.pi * (b**2 - a**2), 1 - math.pi * b**2]
    np.testing.assert_allclose(band_shares(power)[0], areas, atol=0.01)


@pytest.mark.parametrize(
    ("freq", "angle"), [(0.25, 0.0), (0.125, math.pi / 4), (0.1875, 0.3), (0.3125, 1.0)]
)
def test_a_gabor_patch_peaks_at_its_carrier_frequency(freq, angle):
    # The Fourier transform of a Gabor function is a Gaussian centred on the carrier
    # frequency (Daugman 1985, J. Opt. Soc. Am. A 2(7)), so the radial peak sits at `freq`.
    # The envelope is wide (σ = 4 px) so that the spectral blob is narrow (σ_f = 1/(2π·4)
    # cycle/px): a ring average divides the blob's power by ring sizes that grow with radius,
    # pulling its peak low by about σ_f²/freq (≤ 0.005 here), so we allow 1/64.
    power = power_spectrum(one_channel(gabor(21, freq, angle, sigma=4.0)), N)
    freqs, profile = radial_profile(power)
    assert freqs[np.argmax(profile[0])] == pytest.approx(freq, abs=1 / 64)


def test_a_gaussian_puts_its_energy_in_the_low_band_as_the_analytic_transform_says():
    # exp(-r²/2σ²) has power ∝ exp(-4π²σ²f²): a 2-D Gaussian in frequency with
    # s = 1/(2√2 πσ), so the share within radius r is 1 − exp(−r²/2s²) (Rayleigh CDF).
    sigma = 2.0
    y, x = np.mgrid[:15, :15] - 7
    shares = band_shares(power_spectrum(one_channel(np.exp(-(x**2 + y**2) / 8.0)), N))[0]
    s = 1 / (2 * math.sqrt(2) * math.pi * sigma)
    a, b = EDGES
    inside = [1 - math.exp(-(r**2) / (2 * s**2)) for r in (a, b)]
    expected = [inside[0], inside[1] - inside[0], 1 - inside[1]]
    np.testing.assert_allclose(shares, expected, atol=0.005)
    assert shares[0] > 0.85


def test_planted_dead_duplicate_and_opposite_filters_are_found():
    bank = planted_bank()
    dead = dead_mask(bank)
    assert np.flatnonzero(dead).tolist() == [10, 11, 12]
    duplicate, opposite = pair_masks(bank, ~dead)
    assert np.flatnonzero(duplicate).tolist() == [0, 13]  # filter 2's tiny copy is dead
    assert np.flatnonzero(opposite).tolist() == [1, 14]
    m = describe_filters(bank, N).metrics
    assert (m["dead_share"], m["duplicate_share"], m["opposite_share"]) == (3 / 15, 2 / 15, 2 / 15)
    assert sum(m[f"share_{b}"] for b in ("low", "middle", "high")) == pytest.approx(1)


def test_a_layer_of_equal_filters_has_no_dead_one_and_all_duplicates():
    bank = np.ones((4, 1, 3, 3)) * np.arange(9).reshape(1, 1, 3, 3)
    assert not dead_mask(bank).any()
    assert describe_filters(bank, N).metrics["duplicate_share"] == 1.0


def test_summary_intervals_are_student_t_over_seeds():
    rng = np.random.default_rng(3)
    weights = {"a": {s: rng.normal(size=(6, 3, 5, 5)) for s in range(3)}}
    weights["a"][2][:2] = 0  # seed 2 has two dead filters
    atlas = summarize_stems(weights, {"a": ("baseline", "5×5")})
    per_seed = atlas.per_seed["dead_share"].to_numpy()
    assert per_seed.tolist() == [0, 0, 2 / 6]
    low, high = stats.t.interval(
        0.95, df=2, loc=per_seed.mean(), scale=stats.sem(per_seed)
    )  # scipy.stats: the Student-t interval of a mean
    row = atlas.summary.iloc[0]
    assert (row["dead_share_ci_low"], row["dead_share_ci_high"]) == pytest.approx((low, high))
    assert atlas.size == N and atlas.shown["a"][0] == 0


def test_display_tiles_keep_zero_at_mid_grey_and_colour_for_rgb():
    bank = planted_bank()
    tiles = display_tiles(bank)
    assert tiles.shape == (15, 3, 3, 3)  # n, kh, kw, RGB
    w = bank[0]
    np.testing.assert_allclose(tiles[0], 0.5 + np.moveaxis(w, 0, -1) / (2 * np.abs(w).max()))
    assert (tiles[10] == 0.5).all()  # a zero filter is flat grey
    grey = display_tiles(np.stack([np.eye(3)[None], -np.eye(3)[None]]))
    assert grey.shape == (2, 3, 3) and grey[1, 0, 0] == 0 and grey[0, 0, 0] == 1
