"""Checks of imgreduce.quality against published formulas and reference libraries."""

import numpy as np
import pytest
from skimage import data
from skimage.metrics import peak_signal_noise_ratio, structural_similarity

from imgreduce import fit_basis
from imgreduce.quality import (broken_stick, cross_validated_curve, gavish_donoho_omega,
                               psnr, psnr_from_mse, quality_curve, ssim)


@pytest.mark.parametrize("bits, expected", [(8, 48.1308), (12, 72.2451), (16, 96.3295)])
def test_psnr_worked_values(bits, expected):
    # source: REFERENCES.md [computed] PSNR = 10 log10(MAX^2/MSE), MSE = 1 file level.
    peak = 2 ** bits - 1
    assert psnr_from_mse((1 / peak) ** 2) == pytest.approx(expected, abs=1e-4)


@pytest.mark.parametrize("bits", [8, 12, 16])
def test_psnr_matches_skimage_in_file_units(bits):
    # source: skimage.metrics.peak_signal_noise_ratio with data_range = 2**bits - 1.
    rng = np.random.default_rng(bits)
    peak = 2 ** bits - 1
    raw = rng.integers(0, peak + 1, (32, 32))
    noisy = np.clip(raw + rng.integers(-3, 4, raw.shape), 0, peak)
    expected = peak_signal_noise_ratio(raw.astype(float), noisy.astype(float),
                                       data_range=peak)
    assert psnr(raw / peak, noisy / peak) == pytest.approx(expected, rel=1e-9)


def test_ssim_check_values():
    # source: REFERENCES.md [computed], Wang et al. 2004 settings.
    a = np.full((32, 32), 100 / 255)
    assert ssim(a, np.full((32, 32), 110 / 255)) == pytest.approx(0.995476444, abs=1e-8)
    cam = data.camera().astype(float)
    from scipy.ndimage import uniform_filter
    blur = uniform_filter(cam, 5)
    got = ssim(cam / 255, blur / 255)
    ref = structural_similarity(cam, blur, data_range=255, gaussian_weights=True, sigma=1.5,
                                use_sample_covariance=False)
    assert got == pytest.approx(ref, abs=1e-6)
    assert got == pytest.approx(0.7646830, abs=2e-3)


def test_curve_equals_explicit_reconstruction():
    # source: Eckart-Young bookkeeping for orthonormal rows (REFERENCES.md), checked
    # against explicit decode at every rank.
    rng = np.random.default_rng(0)
    x = (0.5 + 0.1 * rng.standard_normal((50, 3)) @ rng.standard_normal((3, 100))
         + 0.01 * rng.standard_normal((50, 100))).astype(np.float32)
    basis = fit_basis(x[:40], rank=10)
    curve = quality_curve(basis, x[40:])
    coef = basis.encode(x[40:])
    for k in range(11):
        rec = basis.decode(coef[:, :k], rank=k) if k else np.broadcast_to(basis.mean, x[40:].shape)
        mse = np.mean((x[40:].astype(np.float64) - rec) ** 2, axis=1)
        np.testing.assert_allclose(curve.mse[:, k], mse, rtol=1e-4)


def test_cross_validated_curve_is_worse_than_training():
    # common practice (no source): training images flatter every rank.
    rng = np.random.default_rng(1)
    x = (0.5 + 0.05 * rng.standard_normal((60, 120))).astype(np.float32)
    cv = cross_validated_curve(x, max_rank=10, folds=5)
    train = quality_curve(fit_basis(x, rank=10), x)
    assert cv.mse[:, 10].mean() > train.mse[:, 10].mean()


@pytest.mark.parametrize("beta, omega", [(0.05, 1.519341), (0.1, 1.608772), (0.25, 1.836866),
                                         (0.5, 2.171185), (0.75, 2.501430), (1.0, 2.858362)])
def test_gavish_donoho_omega_table(beta, omega):
    # source: Gavish & Donoho 2014, table in REFERENCES.md [computed].
    assert gavish_donoho_omega(beta) == pytest.approx(omega, abs=1e-5)
    # source: the paper's cubic approximation, within its stated accuracy.
    assert gavish_donoho_omega(beta) == pytest.approx(
        0.56 * beta ** 3 - 0.95 * beta ** 2 + 1.82 * beta + 1.43, abs=0.02)


def test_broken_stick_values():
    # source: D. A. Jackson, Ecology 74(8), 1993 (values in REFERENCES.md).
    np.testing.assert_allclose(broken_stick(4), [0.520833, 0.270833, 0.145833, 0.0625],
                               atol=1e-6)
