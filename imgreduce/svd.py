"""Numerical kernels: a randomized SVD of the implicitly centred pixel matrix, and an exact path.

The matrix X holds one image per row (n images, p pixels, float32). Its centred form
``X - 1 mean`` is never materialized: every product applies the mean as a rank-one
correction, ``(X - 1 m) W = X W - 1 (m W)``, which saves a copy of the matrix in memory and a
pass over it in time.

The randomized path is the subspace iteration of Halko, Martinsson & Tropp, "Finding
structure with randomness", SIAM Review 53(2), 2011 (Algorithms 4.4 and 5.1): a Gaussian test
matrix with ``rank + oversample`` columns, ``power_iterations`` rounds of ``X^T`` then ``X``,
re-orthonormalizing after *every* product (without it, float32 runs lose the small singular
values), then the SVD of the small projected matrix.

All products with X run in float32 (they dominate the cost); the small Gram matrices, the
orthonormalizations, means and totals run in float64. Only numpy's BLAS is used on the hot
path: numpy and scipy each load their own OpenBLAS, and alternating between the two on 2
cores leaves one pool spinning while the other works.
"""

import numpy as np

from .errors import InputError, ParameterError

__all__ = ["column_mean_and_total", "randomized_svd", "exact_svd", "SVDResult"]

# Rows per block when a pass over X must be chunked (memory-bounded statistics).
_BLOCK_ROWS = 64


class SVDResult:
    """Truncated SVD of the centred matrix: ``X - 1 mean ~ U diag(s) Vt``.

    Attributes
    ----------
    mean : ndarray, shape (p,), float64
    singular_values : ndarray, shape (k,), float64, descending
    components : ndarray, shape (k, p), float32, orthonormal rows (``Vt``)
    total_sum_squares : float
        ``sum ||x_i - mean||^2`` over all rows, computed exactly (not from the k values).
    method : str
        ``'randomized'`` or ``'exact'``.
    """

    def __init__(self, mean, singular_values, components, total_sum_squares, method):
        self.mean = mean
        self.singular_values = singular_values
        self.components = components
        self.total_sum_squares = float(total_sum_squares)
        self.method = method


def column_mean_and_total(x, *, progress=None):
    """Column mean and total squared deviation of `x`, accumulated in float64.

    Parameters
    ----------
    x : ndarray, shape (n, p)
        Data, one observation per row (float32 or float64; may be a memory map).
    progress : object with ``update(n)``, optional
        Advanced by the number of rows read (each row is read twice).

    Returns
    -------
    mean : ndarray, shape (p,), float64
    total : float
        ``sum_i ||x_i - mean||^2``.

    Examples
    --------
    >>> x = np.array([[1.0, 2.0], [3.0, 6.0]], dtype=np.float32)
    >>> mean, total = column_mean_and_total(x)
    >>> mean.tolist(), total
    ([2.0, 4.0], 10.0)
    """
    n, p = x.shape
    acc = np.zeros(p, dtype=np.float64)
    for start in range(0, n, _BLOCK_ROWS):
        block = x[start:start + _BLOCK_ROWS]
        # A float32 sum over at most _BLOCK_ROWS rows (relative error ~1e-7), then float64
        # across blocks: a float64 cast of every element would double the pass's time.
        acc += block.sum(axis=0)
        if progress is not None:
            progress.update(len(block))
    mean = acc / n
    # Two-pass (deviations from the mean) rather than sum x^2 - n m^2: image sets vary
    # little around a bright mean, and the one-pass form cancels away most digits.
    mean32 = mean.astype(x.dtype)
    total = 0.0
    for start in range(0, n, _BLOCK_ROWS):
        block = np.subtract(x[start:start + _BLOCK_ROWS], mean32)
        total += float(np.einsum("ij,ij->", block, block, dtype=np.float64))
        if progress is not None:
            progress.update(len(block))
    return mean, float(total)


def _orthonormalize(y, *, rounds=2):
    """Orthonormal basis of the columns of `y` (float64 Cholesky-QR, `rounds` times).

    Columns of `y` that are numerically dependent are dropped, so the result may have
    fewer columns; this happens when the data has lower rank than the sketch is wide.
    One round leaves an orthogonality error of about cond(y)^2 * 1e-16, ample inside the
    power iteration (only the subspace matters there); two rounds reach machine precision.
    """
    q = y.astype(np.float64)
    for _ in range(rounds):
        gram = q.T @ q
        w, v = np.linalg.eigh(gram)
        keep = w > w[-1] * 1e-12 if w[-1] > 0 else np.zeros(len(w), bool)
        w, v = w[keep], v[:, keep]
        q = q @ (v / np.sqrt(w))
    return q.astype(np.float32)


def _sign_flip(components):
    """Make the entry of largest absolute value of each row positive (in place)."""
    idx = np.argmax(np.abs(components), axis=1)
    signs = np.sign(components[np.arange(len(components)), idx])
    signs[signs == 0] = 1
    components *= signs[:, None].astype(components.dtype)
    return components


def _small_svd(b):
    """SVD of a short, wide matrix `b` (l x p) through its float64 Gram matrix."""
    b64 = b.astype(np.float64)
    gram = b64 @ b64.T
    w, u = np.linalg.eigh(gram)
    order = np.argsort(w)[::-1]
    w, u = w[order], u[:, order]
    keep = w > max(w[0], 0) * 1e-14
    # float64 keeps s_j to relative accuracy ~1e-16 (s_1/s_j)^2: ample for image spectra.
    s = np.sqrt(w[keep])
    vt = (u[:, keep].T @ b64) / s[:, None]
    return s, vt


def randomized_svd(x, rank, *, oversample=10, power_iterations=2, seed=0, mean=None,
                   total=None, progress=None):
    """Truncated SVD of ``x - mean`` by randomized subspace iteration.

    Parameters
    ----------
    x : ndarray, shape (n, p), float32
        Data, one image per row. Never copied or centred in memory.
    rank : int
        Number of singular triplets wanted.
    oversample : int
        Extra sketch columns beyond `rank` (Halko et al. recommend 5-10 or more).
    power_iterations : int
        Rounds of ``x^T`` then ``x``; each sharpens the spectrum by another factor s^2.
    seed : int
        Seed of the Gaussian test matrix; the same seed gives the same result.
    mean, total : optional
        Precomputed :func:`column_mean_and_total` of `x`.
    progress : object with ``update(n)``, optional
        Advanced once per pass over `x`.

    Returns
    -------
    SVDResult

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> x = (rng.standard_normal((50, 3)) @ rng.standard_normal((3, 40))).astype(np.float32)
    >>> res = randomized_svd(x, 3, seed=0)
    >>> exact = np.linalg.svd(x - x.mean(0), compute_uv=False)[:3]
    >>> bool(np.allclose(res.singular_values, exact, rtol=1e-5))
    True
    """
    n, p = x.shape
    if mean is None or total is None:
        mean, total = column_mean_and_total(x)
    mean32 = mean.astype(np.float32)
    width = min(rank + oversample, n, p)
    rng = np.random.default_rng(seed)
    omega = rng.standard_normal((p, width), dtype=np.float32)

    def times(w):  # (x - 1 m) @ w
        out = x @ w
        out -= mean32 @ w
        return out

    def transpose_times(q):  # q^T (x - 1 m), shape (width, p)
        # q^T x with the big matrix untransposed runs ~1.4x faster than x^T q in OpenBLAS.
        out = np.ascontiguousarray(q.T) @ x
        out -= np.outer(q.sum(axis=0), mean32)
        return out

    q = _orthonormalize(times(omega))
    del omega
    _tick(progress)
    for _ in range(power_iterations):
        # The pixel-side basis is tall (p x width): one round halves its cost.
        z = _orthonormalize(transpose_times(q).T, rounds=1)
        _tick(progress)
        q = _orthonormalize(times(z))
        _tick(progress)
    b = transpose_times(q)
    _tick(progress)
    s, vt = _small_svd(b)
    k = min(rank, len(s))
    components = _sign_flip(vt[:k].astype(np.float32))
    return SVDResult(mean, s[:k], components, total, "randomized")


def exact_svd(x, rank, *, mean=None, total=None, progress=None):
    """Exact truncated SVD of ``x - mean`` in float64 through the smaller Gram matrix.

    Suited to problems where ``min(n, p)`` is small enough for an ``n x n`` (or ``p x p``)
    float64 matrix; the centred matrix is formed block by block, never whole.

    Parameters
    ----------
    x : ndarray, shape (n, p)
    rank : int
    mean, total : optional
        Precomputed :func:`column_mean_and_total` of `x`.
    progress : object with ``update(n)``, optional

    Returns
    -------
    SVDResult

    Examples
    --------
    >>> a = np.array([[3.0, 2, 2], [2, 3, -2], [-3, -2, -2], [-2, -3, 2]])
    >>> exact_svd(a, 2).singular_values.round(6).tolist()
    [7.071068, 4.242641]
    """
    n, p = x.shape
    if mean is None or total is None:
        mean, total = column_mean_and_total(x)
    if n <= p:
        gram = np.zeros((n, n))
        for a in range(0, n, _BLOCK_ROWS):
            xa = x[a:a + _BLOCK_ROWS].astype(np.float64) - mean
            for b in range(0, a + 1, _BLOCK_ROWS):
                xb = xa if b == a else x[b:b + _BLOCK_ROWS].astype(np.float64) - mean
                g = xa @ xb.T
                gram[a:a + len(xa), b:b + len(xb)] = g
                gram[b:b + len(xb), a:a + len(xa)] = g.T
            _tick(progress)
        w, u = np.linalg.eigh(gram)
        order = np.argsort(w)[::-1][:rank]
        w, u = w[order], u[:, order]
        keep = w > max(w[0], 0) * 1e-13
        s = np.sqrt(w[keep])
        u = u[:, keep]
        vt = np.zeros((len(s), p))
        for a in range(0, n, _BLOCK_ROWS):
            xa = x[a:a + _BLOCK_ROWS].astype(np.float64) - mean
            vt += u[a:a + len(xa)].T @ xa
        vt /= s[:, None]
    else:
        gram = np.zeros((p, p))
        for a in range(0, n, _BLOCK_ROWS):
            xa = x[a:a + _BLOCK_ROWS].astype(np.float64) - mean
            gram += xa.T @ xa
            _tick(progress)
        w, v = np.linalg.eigh(gram)
        order = np.argsort(w)[::-1][:rank]
        w, v = w[order], v[:, order]
        keep = w > max(w[0], 0) * 1e-13
        s = np.sqrt(w[keep])
        vt = v[:, keep].T
    components = _sign_flip(vt.astype(np.float32))
    return SVDResult(mean, s, components, total, "exact")


def _tick(progress):
    if progress is not None:
        progress.update(1)


def check_rank(rank, n, p):
    """Validate a requested rank against what ``n`` images of ``p`` pixels allow."""
    limit = min(n - 1, p)
    if isinstance(rank, bool) or not isinstance(rank, (int, np.integer)):
        raise ParameterError(f"rank must be a whole number, got {rank!r}")
    if rank < 1:
        raise ParameterError(f"rank must be at least 1, got {rank}")
    if rank > limit:
        if limit == n - 1:
            why = (f"{n} images give at most {n - 1} components (n - 1: subtracting the "
                   "mean image uses up one)")
        else:
            why = f"images of {p} pixels give at most {p} components"
        raise ParameterError(f"rank {rank} is too large: {why}; use --rank {limit} or less")
    return int(rank)


def check_matrix(x):
    """Raise InputError unless `x` is a 2-D float matrix with at least 2 rows."""
    if x.ndim != 2:
        raise InputError(f"expected a 2-D (images x pixels) matrix, got shape {x.shape}")
    if x.shape[0] < 2:
        raise InputError(f"a basis needs at least 2 images, got {x.shape[0]}")
    if not np.issubdtype(x.dtype, np.floating):
        raise InputError(f"expected float pixel data, got dtype {x.dtype}")
