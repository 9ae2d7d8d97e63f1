"""Numerical kernels against outside references (named beside each check)."""

import numpy as np
import pytest
import scipy.linalg

from imgreduce.errors import ParameterError
from imgreduce.svd import (check_rank, column_mean_and_total, exact_svd,
                           randomized_svd)


def _low_rank_plus_noise(n, p, rank, *, noise=0.01, dtype=np.float32, seed=0):
    rng = np.random.default_rng(seed)
    u = rng.standard_normal((n, rank))
    v = rng.standard_normal((rank, p)) / np.sqrt(p)
    s = 10.0 * np.arange(1, rank + 1) ** -1.0
    x = 0.5 + 0.05 * (u * s) @ v + noise * rng.standard_normal((n, p))
    return x.astype(dtype)


def _centred_with_spectrum(s, p, seed):
    """Matrix with zero column means and exactly the singular values `s`."""
    rng = np.random.default_rng(seed)
    n = len(s) + 1
    g = rng.standard_normal((n, n))
    g -= g.mean(axis=0)
    u = np.linalg.qr(g)[0][:, : len(s)]  # columns orthogonal to the ones vector
    v = np.linalg.qr(rng.standard_normal((p, len(s))))[0]
    return (u * s) @ v.T


def _subspace_distance(a, b):
    """Sine of the largest principal angle between the row spaces of a and b."""
    qa = np.linalg.qr(np.asarray(a, float).T)[0]
    qb = np.linalg.qr(np.asarray(b, float).T)[0]
    return np.linalg.norm(qa - qb @ (qb.T @ qa), 2)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_mean_and_total_match_numpy(dtype):
    # source: numpy mean/var (float64) as the reference.
    x = _low_rank_plus_noise(300, 50, 5, dtype=dtype)
    mean, total = column_mean_and_total(x)
    x64 = x.astype(np.float64)
    # float32 sums within blocks of 64 rows, float64 across them: ~1e-7 relative.
    np.testing.assert_allclose(mean, x64.mean(axis=0), rtol=1e-6)
    np.testing.assert_allclose(total, ((x64 - x64.mean(0)) ** 2).sum(), rtol=1e-6)


@pytest.mark.parametrize("method", ["randomized", "exact"])
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_singular_values_and_subspace_match_scipy(method, dtype):
    # source: scipy.linalg.svd of the explicitly centred float64 matrix.
    x = _low_rank_plus_noise(120, 400, 8, dtype=dtype)
    x64 = x.astype(np.float64)
    _, s_ref, vt_ref = scipy.linalg.svd(x64 - x64.mean(0), full_matrices=False)
    k = 8
    if method == "randomized":
        res = randomized_svd(x, k, oversample=10, power_iterations=4, seed=3)
    else:
        res = exact_svd(x, k)
    np.testing.assert_allclose(res.singular_values, s_ref[:k], rtol=2e-4)
    assert _subspace_distance(res.components, vt_ref[:k]) < 1e-2
    # Orthonormal rows, float32 out.
    assert res.components.dtype == np.float32
    gram = res.components.astype(np.float64) @ res.components.T
    np.testing.assert_allclose(gram, np.eye(k), atol=1e-5)


def test_exact_all_values_match_scipy_tall_matrix():
    # source: scipy.linalg.svd; n > p takes the p x p Gram route.
    x = _low_rank_plus_noise(300, 20, 20, dtype=np.float64, noise=0.1)
    s_ref = scipy.linalg.svd(x - x.mean(0), compute_uv=False)
    res = exact_svd(x, 20)
    np.testing.assert_allclose(res.singular_values, s_ref, rtol=1e-9)


def test_hilbert_singular_values():
    # source: REFERENCES.md [computed] 4x4 Hilbert matrix s = (1.500214, 0.169141,
    # 0.006738, 9.67023e-5); stacking [H; -H] gives zero column means and sqrt(2) s.
    h = scipy.linalg.hilbert(4)
    x = np.vstack([h, -h])
    expected = np.sqrt(2) * np.array([1.500214, 0.169141, 0.006738, 9.67023e-5])
    # The reference gives six decimals (five significant digits for the last value).
    np.testing.assert_allclose(exact_svd(x, 4).singular_values, expected, rtol=1e-5, atol=1e-6)
    rand = randomized_svd(x, 4, oversample=0, power_iterations=2)
    np.testing.assert_allclose(rand.singular_values[:3], expected[:3], rtol=1e-5, atol=1e-6)


def test_eckart_young_worked_example():
    # source: Eckart & Young, Psychometrika 1(3), 1936; worked values from REFERENCES.md:
    # A = [[3,2,2],[2,3,-2]], s = (5, 3), best rank-1 approximation [[2.5,2.5,0],[2.5,2.5,0]]
    # with error 3. [A; -A] has zero column means, s = sqrt(2) (5, 3).
    a = np.array([[3.0, 2, 2], [2, 3, -2]])
    x = np.vstack([a, -a])
    res = exact_svd(x, 1)
    np.testing.assert_allclose(res.singular_values, [5 * np.sqrt(2)])
    v = res.components.astype(np.float64)
    rank1 = a @ v.T @ v
    np.testing.assert_allclose(rank1, [[2.5, 2.5, 0], [2.5, 2.5, 0]], atol=1e-6)
    np.testing.assert_allclose(np.linalg.norm(a - rank1, 2), 3, rtol=1e-6)
    np.testing.assert_allclose(np.linalg.norm(a - rank1), 3, rtol=1e-6)


@pytest.mark.parametrize("k", [3, 10])
def test_no_rank_k_approximation_beats_eckart_young(k):
    # source: Eckart-Young-Mirsky: any rank-k error >= s_{k+1} (spectral) and
    # >= sqrt(sum_{j>k} s_j^2) (Frobenius); the randomized answer comes close to both.
    x = _low_rank_plus_noise(150, 300, 15, dtype=np.float64, noise=0.02)
    xc = x - x.mean(0)
    s = scipy.linalg.svd(xc, compute_uv=False)
    res = randomized_svd(x, k, seed=1)
    v = res.components.astype(np.float64)
    err = xc - xc @ v.T @ v
    spectral, frob = np.linalg.norm(err, 2), np.linalg.norm(err)
    best_frob = np.sqrt((s[k:] ** 2).sum())
    assert spectral >= s[k] * (1 - 1e-6)
    assert frob >= best_frob * (1 - 1e-6)
    assert frob <= best_frob * 1.002


@pytest.mark.parametrize("q, bound, reference_mean",
                         [(0, 0.551794, 0.128), (1, 0.145125, 0.060), (2, 0.117994, 0.054)])
def test_halko_martinsson_tropp_expected_spectral_error(q, bound, reference_mean):
    # source: Halko, Martinsson & Tropp, SIAM Review 53(2), 2011, Thm 10.6 (q = 0) and
    # Cor. 10.10 (power scheme); check values from REFERENCES.md [computed] for
    # A = U diag(1/j) V^T, 200x200, k = p = 10, 50 seeds. Our matrix has 199 values
    # (zero column means need one degree of freedom), which moves the bound by < 1e-4.
    s = 1.0 / np.arange(1, 200)
    k, over = 10, 10
    tail = np.sqrt((s[k:] ** 2).sum())
    if q == 0:
        formula = (1 + np.sqrt(k / (over - 1))) * s[k] + np.e * np.sqrt(k + over) / over * tail
        np.testing.assert_allclose(formula, bound, atol=2e-4)
    a = _centred_with_spectrum(s, 200, seed=0)
    errors = []
    for seed in range(50):
        res = randomized_svd(a, k + over, oversample=0, power_iterations=q, seed=seed)
        v = res.components.astype(np.float64)
        errors.append(np.linalg.norm(a - a @ v.T @ v, 2))
    mean_error = float(np.mean(errors))
    assert mean_error <= bound
    assert mean_error >= s[k + over]  # Eckart-Young: nothing beats s_{l+1}
    # The check run measured these means for the projection Q Q^T A. Ours projects A's
    # rows onto the row space of Q^T A, which is never worse seed by seed (it is the best
    # approximation with that row space), so its mean stays at or below theirs.
    assert mean_error <= reference_mean * 1.15


def test_same_seed_same_result_and_sign_convention():
    # common practice (no source): fixed seed and a sign convention make fits repeatable
    # (scikit-learn's svd_flip does the same job).
    x = _low_rank_plus_noise(80, 200, 6)
    a = randomized_svd(x, 5, seed=7)
    b = randomized_svd(x, 5, seed=7)
    np.testing.assert_array_equal(a.components, b.components)
    rows = np.arange(5)
    peak = a.components[rows, np.argmax(np.abs(a.components), axis=1)]
    assert np.all(peak > 0)
    c = randomized_svd(x, 5, seed=8)
    # Different seed, same answer up to float32 noise thanks to the sign convention.
    np.testing.assert_allclose(np.abs(np.sum(a.components * c.components, axis=1)), 1,
                               atol=1e-3)
    assert np.all(np.sum(a.components * c.components, axis=1) > 0)


def test_low_rank_data_gives_fewer_components_not_garbage():
    # Data of exact rank 3 (after centring) cannot support 6 components.
    rng = np.random.default_rng(0)
    x = (rng.standard_normal((40, 3)) @ rng.standard_normal((3, 30))).astype(np.float64)
    res = randomized_svd(x, 6, oversample=4)
    assert len(res.singular_values) <= 6
    s_ref = scipy.linalg.svd(x - x.mean(0), compute_uv=False)
    np.testing.assert_allclose(res.singular_values[:3], s_ref[:3], rtol=1e-6)
    assert np.all(np.isfinite(res.components))


def test_check_rank_messages():
    assert check_rank(4, 5, 100) == 4
    with pytest.raises(ParameterError, match=r"5 images give at most 4 components.*--rank 4"):
        check_rank(5, 5, 100)
    with pytest.raises(ParameterError, match="at least 1"):
        check_rank(0, 5, 100)
    with pytest.raises(ParameterError, match="whole number"):
        check_rank(2.5, 5, 100)
