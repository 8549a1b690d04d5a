"""The stem plots draw what the atlas holds: tiles where and as the filters are, frames on the
planted dead and duplicate filters, profiles and band shares as computed."""

from __future__ import annotations

import numpy as np
import pytest
from matplotlib.patches import Rectangle

from kablate.analysis.stem import BANDS, summarize_stems
from kablate.report import stem_plots
from kablate.report.plot_style import rendering
from kablate.report.stem_plots import plot_stem_atlas, plot_stem_spectrum, tile_origin
from tests.analysis.synthetic import planted_bank


@pytest.fixture
def atlas():
    rng = np.random.default_rng(11)
    weights = {
        "all-3": {0: planted_bank(), 1: planted_bank()[::-1].copy()},
        "stem-5": {0: rng.normal(size=(8, 3, 5, 5)), 1: rng.normal(size=(8, 3, 5, 5))},
    }
    return summarize_stems(weights, {"all-3": ("baseline", "3×3"), "stem-5": ("", "5×5")})


def drawn(monkeypatch, draw):
    """The figure a plot function draws (it is closed once saved)."""
    figures = []
    save = stem_plots.save_figure

    def keep(fig, out, stem):
        figures.append(fig)
        return save(fig, out, stem)

    monkeypatch.setattr(stem_plots, "save_figure", keep)
    with rendering():
        paths = draw()
    assert all(p.is_file() for p in paths)
    return figures[0]


def test_every_tile_is_its_filter_at_its_place_and_scale(atlas, tmp_path, monkeypatch):
    fig = drawn(monkeypatch, lambda: plot_stem_atlas(atlas, tmp_path, "sub"))
    panels = [ax for ax in fig.axes if ax.images]
    assert len(panels) == 2
    cell, n_columns = stem_plots.atlas_geometry(atlas)
    assert cell == 5  # the largest kernel sets every panel's cell
    for ax, (variant, seeds) in zip(panels, atlas.filters.items(), strict=True):
        w = seeds[0]  # the first seed is shown
        assert len(ax.images) == len(w)
        for j, image in enumerate(ax.images):
            # The display scaling, computed here from the weights: 0.5 + w / (2 max|w|).
            expected = 0.5 + np.moveaxis(w[j], 0, -1) / (2 * np.abs(w[j]).max() or 1)
            np.testing.assert_allclose(np.asarray(image.get_array()), expected)
            x, y = tile_origin(j, n_columns, cell, w.shape[-2:])
            k = w.shape[-1]
            assert image.get_extent() == pytest.approx([x, x + k, y + k, y])
        assert variant in ax.get_title()


def test_the_planted_dead_and_duplicate_filters_are_framed(atlas, tmp_path, monkeypatch):
    fig = drawn(monkeypatch, lambda: plot_stem_atlas(atlas, tmp_path, "sub"))
    ax = fig.axes[0]
    frames = [p for p in ax.patches if isinstance(p, Rectangle)]
    cell, n_columns = stem_plots.atlas_geometry(atlas)
    framed = sorted(
        j
        for j in range(15)
        for p in frames
        if p.get_x() == pytest.approx(tile_origin(j, n_columns, cell, (3, 3))[0] - 0.3)
        and p.get_y() == pytest.approx(tile_origin(j, n_columns, cell, (3, 3))[1] - 0.3)
    )
    assert framed == [0, 10, 11, 12, 13]  # planted: duplicates 0 and 13, dead 10–12
    assert "3 dead, 2 near-duplicate of 15" in ax.get_title()


def test_the_spectrum_plot_draws_the_profiles_and_band_shares(atlas, tmp_path, monkeypatch):
    fig = drawn(monkeypatch, lambda: plot_stem_spectrum(atlas, tmp_path, "sub"))
    left, right = fig.axes[:2]
    lines = [line for line in left.get_lines() if len(line.get_xdata()) > 2]
    for line, (freqs, profile) in zip(lines, atlas.profiles.values(), strict=True):
        np.testing.assert_allclose(line.get_xdata(), freqs)
        np.testing.assert_allclose(line.get_ydata(), profile)
    heights = [bar.get_height() for bar in right.patches]
    expected = [
        atlas.summary.loc[i, f"share_{b}_mean"] for i in range(len(atlas.summary)) for b in BANDS
    ]
    np.testing.assert_allclose(heights, expected)
