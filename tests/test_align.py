"""Sub-pixel alignment against known shifts of a real photograph."""

import numpy as np
import pytest
from scipy import ndimage
from skimage import data

from imgreduce.align import align_rows, apply_shifts, estimate_shifts


def _photo():
    # source: scikit-image data.camera() (a real photograph), a 96x128 crop.
    return data.camera()[100:196, 180:308].astype(np.float32) / 255


def test_estimated_shifts_match_known_shifts():
    # Ground truth: shifts drawn at random (sd 0.25 px, and up to 3 px) applied with
    # cubic splines. Measured rms error 0.015 px at sd 0.25.
    base = _photo()
    rng = np.random.default_rng(0)
    true = np.vstack([rng.normal(0, 0.25, (40, 2)), rng.uniform(-3, 3, (10, 2))])
    rows = np.stack([ndimage.shift(base, s, order=3, mode="nearest").ravel() for s in true])
    est = estimate_shifts(rows, base.shape, base)
    assert np.sqrt(np.mean((est + true) ** 2)) < 0.04
    assert np.abs(est + true).max() < 0.12


def test_one_round_matches_scikit_image_phase_cross_correlation():
    # source: skimage.registration.phase_cross_correlation (normalization=None,
    # upsample_factor=20) on the same Tukey-windowed frames: our batched single-precision
    # version of the method must find the same peak, to 1/20 pixel.
    from scipy.signal.windows import tukey
    from skimage.registration import phase_cross_correlation

    base = _photo()
    window = np.outer(tukey(96, 0.25), tukey(128, 0.25))
    rng = np.random.default_rng(3)
    true = rng.uniform(-2, 2, (8, 2))
    rows = np.stack([ndimage.shift(base, s, order=3, mode="nearest").ravel() for s in true])
    ours = estimate_shifts(rows, base.shape, base, rounds=1)
    for row, est in zip(rows, ours):
        img = row.reshape(base.shape)
        ref, _, _ = phase_cross_correlation((base - base.mean()) * window,
                                            (img - img.mean()) * window,
                                            upsample_factor=20, normalization=None)
        assert est == pytest.approx(ref, abs=0.051)


def test_colour_frames_are_aligned_on_their_luma():
    base = _photo()
    rgb = np.dstack([base, base * 0.8, base[::-1] * 0.5 + 0.2])
    moved = ndimage.shift(rgb, (1.5, -0.75, 0), order=3, mode="nearest")
    est = estimate_shifts(moved.reshape(1, -1), rgb.shape, rgb)
    assert est[0] == pytest.approx([-1.5, 0.75], abs=0.05)


def test_apply_shifts_is_scipy_linear_shift():
    # source: scipy.ndimage.shift, order 1, mode 'nearest'.
    base = _photo()
    out = apply_shifts(base.reshape(1, -1), base.shape, [[0.3, -1.2]])
    expected = ndimage.shift(base, (0.3, -1.2), order=1, mode="nearest")
    np.testing.assert_allclose(out[0].reshape(base.shape), expected, atol=1e-6)


def test_align_rows_brings_frames_together():
    base = _photo()
    rng = np.random.default_rng(1)
    true = rng.normal(0, 0.6, (30, 2))
    rows = np.stack([ndimage.shift(base, s, order=3, mode="nearest").ravel() for s in true])
    aligned, shifts, template = align_rows(rows, base.shape)
    # The template is their common mean position; shifts differ from -true by one offset.
    offset = (shifts + true).mean(axis=0)
    assert np.abs(shifts + true - offset).max() < 0.1
    assert aligned.std(axis=0).mean() < 0.5 * rows.std(axis=0).mean()
    assert template.shape == (base.size,)
