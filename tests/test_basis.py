"""EigenBasis: fit against scikit-learn, projections, files."""

import json
import zipfile

import numpy as np
import pytest

from imgreduce import EigenBasis, fit_basis
from imgreduce.errors import BasisFileError, ModelMismatchError, ParameterError


def _flip_like_ours(components):
    idx = np.argmax(np.abs(components), axis=1)
    return components * np.sign(components[np.arange(len(components)), idx])[:, None]


@pytest.mark.parametrize("exact", [True, False])
def test_matches_sklearn_pca_on_digits(exact):
    # source: scikit-learn PCA (full SVD solver) on load_digits(), 1797 real 8x8 images.
    from sklearn.datasets import load_digits
    from sklearn.decomposition import PCA

    x = (load_digits().data / 16.0).astype(np.float32)
    ref = PCA(n_components=10, svd_solver="full").fit(x.astype(np.float64))
    # By default this small matrix takes the exact path; forced onto the randomized one,
    # its flat spectrum (no gap after component 10) needs 4 power iterations for 1e-4.
    basis = fit_basis(x, rank=10, exact=exact, seed=0, power_iterations=4)
    rtol = 1e-4
    np.testing.assert_allclose(basis.explained_variance_ratio, ref.explained_variance_ratio_,
                               rtol=rtol)
    np.testing.assert_allclose(basis.explained_variance, ref.explained_variance_, rtol=rtol)
    np.testing.assert_allclose(basis.singular_values, ref.singular_values_, rtol=rtol)
    np.testing.assert_allclose(basis.mean, ref.mean_, atol=1e-6)
    # Components agree up to sign; after our sign convention, exactly.
    np.testing.assert_allclose(basis.components, _flip_like_ours(ref.components_), atol=2e-3)


def test_matches_sklearn_on_real_faces_when_pixels_outnumber_images():
    # source: scikit-learn PCA on skimage.data.lfw_subset() (200 real 25x25 images, p > n).
    from skimage.data import lfw_subset
    from sklearn.decomposition import PCA

    x = lfw_subset().reshape(200, -1).astype(np.float32)
    ref = PCA(n_components=20, svd_solver="full").fit(x.astype(np.float64))
    basis = fit_basis(x, rank=20, exact=False, seed=0)
    np.testing.assert_allclose(basis.explained_variance_ratio[:10],
                               ref.explained_variance_ratio_[:10], rtol=1e-3)
    cos = np.abs(np.sum(basis.components[:10] * ref.components_[:10], axis=1))
    assert np.all(cos > 0.999)


def test_explained_variance_ratio_is_true_share_of_total():
    # source: definition; the total comes from all pixels, not from the k kept values.
    rng = np.random.default_rng(0)
    x = rng.random((60, 40), dtype=np.float32)
    basis = fit_basis(x, rank=5)
    total = np.var(x.astype(np.float64), axis=0, ddof=1).sum()
    np.testing.assert_allclose(basis.total_variance, total, rtol=1e-6)
    assert basis.explained_variance_ratio.sum() < 1
    full = fit_basis(x, rank=40, exact=True)
    np.testing.assert_allclose(full.explained_variance_ratio.sum(), 1, rtol=1e-6)


def test_default_rank_and_too_many_components():
    rng = np.random.default_rng(0)
    x = rng.random((12, 30), dtype=np.float32)
    assert fit_basis(x).rank == 11
    with pytest.raises(ParameterError, match=r"12 images give at most 11"):
        fit_basis(x, rank=12)


def test_identical_images_are_refused():
    x = np.full((5, 10), 0.5, dtype=np.float32)
    with pytest.raises(ParameterError, match="identical"):
        fit_basis(x, rank=2)


def test_encode_decode_residuals_agree():
    rng = np.random.default_rng(2)
    x = rng.random((700, 50), dtype=np.float32)  # more rows than one encode chunk
    basis = fit_basis(x, rank=8)
    coef = basis.encode(x)
    assert coef.dtype == np.float32 and coef.shape == (700, 8)
    rec = basis.decode(coef)
    np.testing.assert_allclose(basis.residuals(x), x - rec, atol=1e-5)
    np.testing.assert_allclose(basis.decode(coef, rank=3), basis.decode(coef[:, :3]),
                               atol=1e-6)
    # Residual energy identity for orthonormal rows (REFERENCES.md, Eckart-Young section):
    # ||x - mean||^2 - sum c_i^2 = ||residual||^2.
    d = x.astype(np.float64) - basis.mean
    lhs = (d ** 2).sum(1) - (coef.astype(np.float64) ** 2).sum(1)
    rhs = (basis.residuals(x).astype(np.float64) ** 2).sum(1)
    np.testing.assert_allclose(lhs, rhs, rtol=1e-4, atol=1e-5)
    with pytest.raises(ParameterError, match="larger than the basis holds"):
        basis.encode(x, rank=9)
    with pytest.raises(ModelMismatchError, match="expects 50"):
        basis.encode(np.zeros((2, 49), np.float32))


def test_save_load_round_trip(tmp_path):
    rng = np.random.default_rng(0)
    x = rng.random((20, 12), dtype=np.float32)
    basis = fit_basis(x, rank=4)
    path = tmp_path / "b.npz"
    basis.save(path)
    assert [p.name for p in tmp_path.iterdir()] == ["b.npz"]  # no temporary left behind
    back = EigenBasis.load(path)
    np.testing.assert_array_equal(back.components, basis.components)
    np.testing.assert_array_equal(back.mean, basis.mean)
    np.testing.assert_array_equal(back.singular_values, basis.singular_values)
    assert back.n_samples == 20 and back.total_variance == basis.total_variance
    assert back.metadata["method"] == basis.metadata["method"]
    with np.load(path, allow_pickle=False) as data:
        meta = json.loads(str(data["metadata"]))
    assert meta["format"] == "imgreduce-basis" and meta["format_version"] == 1


def _saved(tmp_path):
    rng = np.random.default_rng(0)
    basis = fit_basis(rng.random((10, 6), dtype=np.float32), rank=3)
    path = tmp_path / "b.npz"
    basis.save(path)
    return path


def test_load_refuses_bad_files(tmp_path):
    with pytest.raises(BasisFileError, match="no such file"):
        EigenBasis.load(tmp_path / "missing.npz")
    text = tmp_path / "notes.npz"
    text.write_text("hello")
    with pytest.raises(BasisFileError, match="not a readable imgreduce basis"):
        EigenBasis.load(text)
    foreign = tmp_path / "foreign.npz"
    np.savez(foreign, a=np.zeros(3))
    with pytest.raises(BasisFileError, match="not an imgreduce basis"):
        EigenBasis.load(foreign)
    good = _saved(tmp_path)
    truncated = tmp_path / "truncated.npz"
    truncated.write_bytes(good.read_bytes()[: good.stat().st_size // 2])
    with pytest.raises(BasisFileError, match="truncated"):
        EigenBasis.load(truncated)


def test_load_detects_tampering_and_newer_versions(tmp_path):
    good = _saved(tmp_path)
    with np.load(good, allow_pickle=False) as data:
        arrays = {k: data[k] for k in data.files}
    meta = json.loads(str(arrays["metadata"]))
    arrays["components"] = arrays["components"] * 1.01
    np.savez(tmp_path / "tampered.npz", **arrays)
    with pytest.raises(BasisFileError, match="checksum of 'components'"):
        EigenBasis.load(tmp_path / "tampered.npz")
    meta["format_version"] = 99
    arrays["metadata"] = np.array(json.dumps(meta))
    np.savez(tmp_path / "future.npz", **arrays)
    with pytest.raises(BasisFileError, match="version 99"):
        EigenBasis.load(tmp_path / "future.npz")


def test_load_never_unpickles(tmp_path):
    # source: numpy.load documentation — allow_pickle=False refuses object arrays.
    good = _saved(tmp_path)
    with np.load(good, allow_pickle=False) as data:
        arrays = {k: data[k] for k in data.files}
    arrays["components"] = np.array([object()], dtype=object)
    np.savez(tmp_path / "pickled.npz", **arrays)
    with pytest.raises(BasisFileError):
        EigenBasis.load(tmp_path / "pickled.npz")
    assert zipfile.is_zipfile(tmp_path / "pickled.npz")


def test_check_compatible_names_both_sides():
    basis = EigenBasis(np.zeros(12), np.eye(2, 12), [2.0, 1.0], n_samples=5,
                       total_variance=1.0, image_shape=(3, 4),
                       metadata={"color": "gray", "bit_depth": 8})
    basis.check_compatible({"image_shape": [3, 4], "color": "gray", "bit_depth": 8})
    with pytest.raises(ModelMismatchError,
                       match=r"batch/ are 5x3 gray 8-bit images, but the basis was fitted "
                             r"on 4x3 gray 8-bit images: size differs.*--size 4x3"):
        basis.check_compatible({"image_shape": [3, 5], "color": "gray", "bit_depth": 8},
                               what="batch/")
    with pytest.raises(ModelMismatchError, match="colour and bit depth"):
        basis.check_compatible({"image_shape": [3, 4], "color": "rgb", "bit_depth": 16})
