"""Figures: structure, symmetric colour limits, atomic PNG output."""

import numpy as np
from PIL import Image

from imgreduce import fit_basis
from imgreduce.plots import plot_components, plot_mean_image, plot_spectrum, save_figure


def _basis(shape=(6, 8), n=30, rank=9):
    rng = np.random.default_rng(0)
    x = rng.random((n, int(np.prod(shape))), dtype=np.float32)
    b = fit_basis(x, rank=rank)
    b.image_shape = shape
    return b


def test_component_montage_is_symmetric_about_zero():
    b = _basis()
    fig = plot_components(b, count=7)
    images = [ax.images[0] for ax in fig.axes if ax.images]
    assert len(images) == 7
    for im in images:
        low, high = im.get_clim()
        assert low == -high and high > 0
        assert im.get_cmap().name == "RdBu_r"


def test_spectrum_cumulative_curve_ends_at_sum_of_ratios():
    b = _basis()
    fig = plot_spectrum(b)
    twin = fig.axes[1]
    cumulative = twin.lines[0].get_ydata()
    np.testing.assert_allclose(cumulative[-1], 100 * b.explained_variance_ratio.sum())
    np.testing.assert_allclose(fig.axes[0].lines[0].get_ydata(), 100 * b.explained_variance_ratio)


def test_mean_image_and_rgb(tmp_path):
    fig = plot_mean_image(_basis())
    assert fig.axes[0].images[0].get_clim() == (0, 1)
    rgb = _basis(shape=(4, 5, 3))
    assert plot_components(rgb, count=4).axes[0].images[0].get_array().ndim == 2
    assert plot_mean_image(rgb).axes[0].images[0].get_array().shape == (4, 5, 3)


def test_save_figure_writes_a_png_atomically(tmp_path):
    path = tmp_path / "spectrum.png"
    save_figure(plot_spectrum(_basis()), path)
    assert [p.name for p in tmp_path.iterdir()] == ["spectrum.png"]
    with Image.open(path) as im:
        assert im.format == "PNG" and im.size[0] > 300
