"""Image quality and the choice of rank: PSNR, SSIM, quality-vs-rank curves, rank rules.

Pixels are in the scale of :mod:`imgreduce.ingest`: ``value / (2**bits - 1)``, so the peak
value is 1 in pixel units whatever the bit depth, and a PSNR computed here with
``data_range=1`` equals the PSNR computed on the files' own integer values with
``MAX = 2**bits - 1`` (for 12-bit data in 16-bit files, 4095, not 65535).

Quality-vs-rank curves use the orthonormality of the components: with coefficients
``c = V (x - mean)``, the squared residual at rank k is
``||x - mean||^2 - sum_{i<=k} c_i^2``. Here it is accumulated from the other end,
``||r_K||^2 + sum_{k<i<=K} c_i^2`` with ``r_K`` the explicit residual at the largest rank
K, so high ranks (small residuals) carry no cancellation error. Every rank 1..K then costs
O(K) per image on top of one encode and one decode.

Curves are honest only on images the basis did not see: training images are partly fitted
noise and flatter every rank. :func:`cross_validated_curve` fits one basis per fold and
scores each image with the basis that left it out.
"""

import math
from dataclasses import dataclass, field

import numpy as np

from ._progress import progress_bar
from .errors import ParameterError

__all__ = [
    "psnr", "psnr_from_mse", "ssim", "reconstruction_metrics",
    "QualityCurve", "quality_curve", "cross_validated_curve",
    "variance_rank", "target_rank", "broken_stick", "broken_stick_rank",
    "marchenko_pastur_median", "gavish_donoho_omega", "gavish_donoho_rank",
    "data_spectrum", "RankChoice", "choose_rank", "SSIM_MIN_SIDE",
]

# Wang, Bovik, Sheikh & Simoncelli 2004: an 11x11 Gaussian window of sigma 1.5.
_SSIM_SIGMA = 1.5
SSIM_MIN_SIDE = 11
# Rows per chunk when encoding, reconstructing or centring: bounds temporaries.
_CHUNK_ROWS = 256


# -- metrics -----------------------------------------------------------------------------
def psnr_from_mse(mse, *, data_range=1.0):
    """PSNR in dB from mean squared errors: ``10 log10(data_range**2 / mse)``.

    Parameters
    ----------
    mse : float or array_like
        Mean squared errors, in the units of `data_range`.
    data_range : float
        Peak signal value: 1 for pixels in [0, 1], ``2**bits - 1`` for file values.

    Returns
    -------
    float or ndarray (float64)
        ``inf`` where the error is 0.

    Examples
    --------
    >>> round(float(psnr_from_mse(1.0, data_range=255)), 4)
    48.1308
    >>> psnr_from_mse([0.0, 0.01]).tolist()
    [inf, 20.0]
    """
    mse = np.asarray(mse, dtype=np.float64)
    with np.errstate(divide="ignore"):
        out = 10.0 * np.log10(float(data_range) ** 2 / mse)
    return out if out.ndim else float(out)


def psnr(reference, image, *, data_range=1.0):
    """Peak signal-to-noise ratio of `image` against `reference`, in dB.

    Parameters
    ----------
    reference, image : array_like, same shape
        The original and its reconstruction (unclipped), in pixel units.
    data_range : float
        Peak value (1 for pixels in [0, 1]).

    Returns
    -------
    float
        ``inf`` when the images are identical.

    Examples
    --------
    >>> ref = np.zeros((4, 4), dtype=np.float32)
    >>> round(psnr(ref, ref + 0.1), 6)
    20.0
    """
    reference = np.asarray(reference)
    image = np.asarray(image)
    if reference.shape != image.shape:
        raise ParameterError(f"psnr needs images of one shape, got {reference.shape} and "
                             f"{image.shape}")
    diff = np.subtract(reference, image, dtype=np.float64)
    return psnr_from_mse(float(np.mean(diff * diff)), data_range=data_range)


def ssim(reference, image, *, data_range=1.0, channel_axis=None):
    """Structural similarity with the settings of Wang et al. (2004).

    An 11x11 Gaussian window of sigma 1.5, K1 = 0.01, K2 = 0.03 and population
    (biased) covariances: scikit-image's defaults (7x7 uniform window, sample covariance)
    give different numbers.

    Parameters
    ----------
    reference, image : ndarray, shape (h, w) or (h, w, c)
        The original and its reconstruction (unclipped), in pixel units.
    data_range : float
        Peak-to-peak range of the pixel scale (1 for pixels in [0, 1]).
    channel_axis : int, optional
        Axis of the colour channels (``-1`` for RGB images), ``None`` for gray.

    Returns
    -------
    float

    Examples
    --------
    >>> a = np.full((16, 16), 100 / 255)
    >>> round(ssim(a, np.full((16, 16), 110 / 255)), 6)
    0.995476
    """
    from skimage.metrics import structural_similarity

    reference = np.asarray(reference)
    image = np.asarray(image)
    spatial = reference.shape if channel_axis is None else tuple(
        d for i, d in enumerate(reference.shape) if i != channel_axis % reference.ndim)
    if min(spatial) < SSIM_MIN_SIDE:
        raise ParameterError(
            f"SSIM needs images of at least {SSIM_MIN_SIDE}x{SSIM_MIN_SIDE} pixels (its "
            f"Gaussian window), got {'x'.join(map(str, spatial[::-1]))}; use PSNR instead")
    dtype = np.result_type(reference.dtype, image.dtype, np.float32)
    return float(structural_similarity(
        reference.astype(dtype, copy=False), image.astype(dtype, copy=False),
        data_range=float(data_range), gaussian_weights=True, sigma=_SSIM_SIGMA,
        use_sample_covariance=False, channel_axis=channel_axis))


def reconstruction_metrics(originals, reconstructions, *, image_shape, with_ssim=True):
    """Per-image quality of reconstructions against their originals.

    Parameters
    ----------
    originals, reconstructions : ndarray, shape (m, p)
        Images as rows in pixel units; reconstructions unclipped, as decoded.
    image_shape : tuple of int
        ``(h, w)`` or ``(h, w, 3)``.
    with_ssim : bool
        Also compute SSIM (``nan`` for images smaller than the SSIM window).

    Returns
    -------
    dict of ndarray, shape (m,)
        ``psnr`` (dB), ``ssim``, ``rmse`` and ``max_abs_error`` (pixel units, computed on
        the unclipped values) and ``clipped_fraction`` (share of values outside [0, 1],
        which a saved or displayed image clips).

    Examples
    --------
    >>> x = np.zeros((2, 16 * 16), dtype=np.float32)
    >>> m = reconstruction_metrics(x, x - 0.1, image_shape=(16, 16))
    >>> m["psnr"].round(3).tolist(), m["clipped_fraction"].tolist()
    ([20.0, 20.0], [1.0, 1.0])
    """
    originals = np.atleast_2d(originals)
    reconstructions = np.atleast_2d(reconstructions)
    diff = np.subtract(reconstructions, originals, dtype=np.float64)
    mse = np.mean(diff * diff, axis=1)
    out = {
        "psnr": psnr_from_mse(mse),
        "rmse": np.sqrt(mse),
        "max_abs_error": np.abs(diff).max(axis=1),
        "clipped_fraction": np.mean((reconstructions < 0) | (reconstructions > 1), axis=1),
        "ssim": np.full(len(originals), np.nan),
    }
    image_shape = tuple(image_shape)
    spatial = image_shape[:2]
    if with_ssim and len(spatial) == 2 and min(spatial) >= SSIM_MIN_SIDE:
        channel_axis = -1 if len(image_shape) == 3 else None
        for i in range(len(originals)):
            out["ssim"][i] = ssim(originals[i].reshape(image_shape),
                                  reconstructions[i].reshape(image_shape),
                                  channel_axis=channel_axis)
    return out


# -- quality-vs-rank curves --------------------------------------------------------------
@dataclass(eq=False)
class QualityCurve:
    """Per-image reconstruction error at every rank 0..K, and how to rebuild any image.

    Attributes
    ----------
    mse : ndarray, shape (m, K + 1), float64
        Mean squared error (pixel units) of each image at ranks 0 (the mean image) to K.
    explained : ndarray, shape (K + 1,)
        Cumulative explained variance ratio of the basis (or the mean over the fold bases).
    bases : list of EigenBasis
        The basis that scores each image (one per fold, or the given basis).
    fold_of : ndarray, shape (m,), int
        Index into `bases` of the basis that scored each image (it did not see the image
        when ``held_out`` is true).
    coefficients : ndarray, shape (m, K), float32
        Coefficients of each image on its basis.
    held_out : bool
        True when every image was scored by a basis fitted without it.
    """

    mse: np.ndarray
    explained: np.ndarray
    bases: list
    fold_of: np.ndarray
    coefficients: np.ndarray
    held_out: bool
    power_iterations: int | None = None
    extra: dict = field(default_factory=dict)

    @property
    def max_rank(self):
        return self.mse.shape[1] - 1

    @property
    def ranks(self):
        return np.arange(self.mse.shape[1])

    @property
    def psnr(self):
        """Per-image PSNR in dB, shape (m, K + 1)."""
        return psnr_from_mse(self.mse)

    def psnr_percentile(self, q):
        """PSNR that at least ``100 - q`` % of the images reach, per rank.

        An observed value (the inverted-CDF quantile of the errors), so that "the 5th
        percentile image meets the target" means at least 95% of the images do.
        """
        return psnr_from_mse(np.quantile(self.mse, 1 - q / 100, axis=0,
                                         method="inverted_cdf"))

    def summary(self):
        """``psnr_mean``, ``psnr_p05`` and ``psnr_min`` per rank 0..K (dB)."""
        values = self.psnr
        with np.errstate(invalid="ignore"):
            mean = values.mean(axis=0)
        return {"psnr_mean": mean, "psnr_p05": self.psnr_percentile(5),
                "psnr_min": psnr_from_mse(self.mse.max(axis=0))}

    def reconstruct(self, index, rank):
        """Unclipped reconstructions of images `index` at `rank`, shape (len(index), p)."""
        index = np.atleast_1d(np.asarray(index, dtype=np.intp))
        if not 0 <= rank <= self.max_rank:
            raise ParameterError(f"rank must be between 0 and {self.max_rank}, got {rank}")
        out = np.empty((len(index), self.bases[0].n_pixels), dtype=np.float32)
        for f, basis in enumerate(self.bases):
            rows = np.flatnonzero(self.fold_of[index] == f)
            if len(rows):
                out[rows] = basis.decode(self.coefficients[index[rows], :rank], rank=rank)
        return out


def _score(basis, pixels, rank, mse, coefficients, rows, bar):
    """Fill `mse[rows]` (all ranks) and `coefficients[rows]` from one basis."""
    comps = basis.components[:rank]
    p = basis.n_pixels
    for start in range(0, len(rows), _CHUNK_ROWS):
        idx = rows[start:start + _CHUNK_ROWS]
        chunk = np.subtract(pixels[idx], basis.mean, dtype=np.float32)
        coef = chunk @ comps.T
        chunk -= coef @ comps
        tail = np.einsum("ij,ij->i", chunk, chunk, dtype=np.float64)
        c2 = coef.astype(np.float64) ** 2
        # Residual energy at rank k = ||r_K||^2 + sum_{k<i<=K} c_i^2 (Eckart-Young
        # bookkeeping for orthonormal rows), summed from the tail so it never cancels.
        energy = np.empty((len(idx), rank + 1))
        energy[:, rank] = tail
        if rank:
            energy[:, :rank] = tail[:, None] + np.cumsum(c2[:, ::-1], axis=1)[:, ::-1]
        mse[idx] = energy / p
        coefficients[idx] = coef
        bar.update(len(idx))


def quality_curve(basis, pixels, *, max_rank=None, progress=False):
    """Reconstruction error of `pixels` on `basis` at every rank 0..K, in one pass.

    Parameters
    ----------
    basis : EigenBasis
    pixels : ndarray, shape (m, p)
        Images as rows (pixel units). Held-out images give honest curves; the basis's own
        training images give optimistic ones.
    max_rank : int, optional
        Largest rank K (default: all the basis holds).
    progress : bool or object

    Returns
    -------
    QualityCurve

    Examples
    --------
    >>> from imgreduce import fit_basis
    >>> rng = np.random.default_rng(0)
    >>> x = rng.random((30, 64), dtype=np.float32)
    >>> basis = fit_basis(x[:20], rank=5)
    >>> curve = quality_curve(basis, x[20:])
    >>> curve.mse.shape, bool(np.all(np.diff(curve.mse, axis=1) <= 1e-12))
    ((10, 6), True)
    """
    pixels = basis._pixels(pixels)
    rank = basis._rank(max_rank)
    m = len(pixels)
    mse = np.empty((m, rank + 1))
    coefficients = np.empty((m, rank), dtype=np.float32)
    bar = progress_bar(progress, total=m, desc="score", unit="img")
    try:
        _score(basis, pixels, rank, mse, coefficients, np.arange(m), bar)
    finally:
        bar.close()
    explained = np.concatenate([[0.0], np.cumsum(basis.explained_variance_ratio[:rank])])
    return QualityCurve(mse=mse, explained=explained, bases=[basis],
                        fold_of=np.zeros(m, dtype=np.intp), coefficients=coefficients,
                        held_out=False)


def _fold_assignment(n, folds, seed):
    order = np.random.default_rng(seed).permutation(n)
    fold_of = np.empty(n, dtype=np.intp)
    fold_of[order] = np.arange(n) % folds
    return fold_of


def cross_validated_curve(pixels, *, max_rank=None, folds=5, seed=0, power_iterations=2,
                          image_shape=None, progress=False):
    """Held-out reconstruction error at every rank, by k-fold cross-validation.

    Images are dealt at random (seeded) into `folds` groups; for each group a basis of
    rank K is fitted on the other groups and scores the group's images. Every image is
    scored exactly once, by a basis that never saw it.

    Parameters
    ----------
    pixels : ndarray, shape (n, p)
        Images as rows (pixel units); may be a memory map.
    max_rank : int, optional
        Largest rank K (default ``min(100, training images - 1)``).
    folds : int
        Number of folds, at least 2 (fewer if there are fewer images).
    seed : int
        Seed of the fold assignment and of the randomized fits.
    power_iterations : int
        Subspace iterations of each fold's randomized fit. Two are enough for the curves:
        against four, mean and 5th-percentile PSNR moved by at most 0.013 dB at any rank
        on 2000 images of 128x128, K = 100 (``benchmarks/choose_vs_fit.py``).
    image_shape : tuple of int, optional
    progress : bool or object

    Returns
    -------
    QualityCurve
        With ``held_out=True``; ``explained`` is the mean over the fold bases.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> x = rng.random((40, 64), dtype=np.float32)
    >>> curve = cross_validated_curve(x, max_rank=5, folds=4)
    >>> curve.mse.shape, curve.held_out, len(curve.bases)
    ((40, 6), True, 4)
    """
    from .basis import fit_basis

    n, p = pixels.shape
    if isinstance(folds, bool) or not isinstance(folds, (int, np.integer)) or folds < 2:
        raise ParameterError(f"folds must be a whole number >= 2, got {folds!r}")
    if n < 3:
        raise ParameterError(f"cross-validated curves need at least 3 images, got {n}")
    folds = int(min(folds, n))
    fold_of = _fold_assignment(n, folds, seed)
    smallest_train = n - int(np.bincount(fold_of).max())
    limit = min(smallest_train - 1, p)
    if max_rank is None:
        rank = min(100, limit)
    else:
        if isinstance(max_rank, bool) or not isinstance(max_rank, (int, np.integer)) \
                or max_rank < 1:
            raise ParameterError(f"max rank must be a whole number >= 1, got {max_rank!r}")
        if max_rank > limit:
            raise ParameterError(
                f"max rank {max_rank} is too large for {folds}-fold curves on {n} images: "
                f"each fold trains on {smallest_train} images, which give at most {limit} "
                f"components; use --max-rank {limit} or less")
        rank = int(max_rank)
    bases = []
    bar = progress_bar(progress, total=folds, desc="folds", unit="fold")
    try:
        for f in range(folds):
            train = np.flatnonzero(fold_of != f)
            bases.append(fit_basis(pixels[train], rank=rank, seed=seed + f,
                                   power_iterations=power_iterations))
            bar.update(1)
    finally:
        bar.close()
    # A fold basis can hold fewer components than asked (rank-deficient training set).
    rank = min(rank, min(b.rank for b in bases))
    mse = np.empty((n, rank + 1))
    coefficients = np.empty((n, rank), dtype=np.float32)
    silent = progress_bar(False, total=n, desc="score")
    for f, basis in enumerate(bases):
        if image_shape is not None:
            basis.image_shape = tuple(image_shape)
        _score(basis, pixels, rank, mse, coefficients, np.flatnonzero(fold_of == f), silent)
    ratios = np.mean([np.cumsum(b.explained_variance_ratio[:rank]) for b in bases], axis=0)
    return QualityCurve(mse=mse, explained=np.concatenate([[0.0], ratios]), bases=bases,
                        fold_of=fold_of, coefficients=coefficients, held_out=True,
                        power_iterations=power_iterations, extra={"folds": folds})


# -- rank rules --------------------------------------------------------------------------
def variance_rank(explained, fraction):
    """Smallest rank whose cumulative explained variance ratio reaches `fraction`.

    Parameters
    ----------
    explained : array_like, shape (K + 1,)
        Cumulative ratio at ranks 0..K (``explained[0] == 0``).
    fraction : float
        In (0, 1].

    Returns
    -------
    int or None
        ``None`` when no rank up to K reaches it.

    Examples
    --------
    >>> variance_rank([0, 0.924619, 0.977685, 0.994788, 1.0], 0.95)
    2
    """
    if not 0 < fraction <= 1:
        raise ParameterError(f"variance fraction must be in (0, 1], got {fraction}")
    explained = np.asarray(explained, dtype=np.float64)
    hits = np.flatnonzero(explained >= fraction - 1e-12)
    return int(hits[0]) if len(hits) else None


def target_rank(values, target):
    """Smallest rank whose quality (indexed by rank) reaches `target`, or ``None``.

    Examples
    --------
    >>> target_rank([10.0, 20.0, 31.0, 35.0], 30)
    2
    """
    hits = np.flatnonzero(np.asarray(values, dtype=np.float64) >= target)
    return int(hits[0]) if len(hits) else None


def broken_stick(count):
    """Expected shares of the broken-stick model: ``b_k = (1/p) sum_{i=k..p} 1/i``.

    Parameters
    ----------
    count : int
        Number of pieces p (components sharing the variance).

    Examples
    --------
    >>> broken_stick(4).round(6).tolist()
    [0.520833, 0.270833, 0.145833, 0.0625]
    """
    count = int(count)
    if count < 1:
        raise ParameterError(f"broken stick needs at least 1 component, got {count}")
    inverse = 1.0 / np.arange(1, count + 1)
    return np.cumsum(inverse[::-1])[::-1] / count


def broken_stick_rank(ratios, *, count=None):
    """Number of leading components whose variance share beats the broken stick.

    Parameters
    ----------
    ratios : array_like
        Explained variance ratio of each component, descending (need not sum to 1).
    count : int, optional
        Pieces of the stick: the number of components that share the total variance
        (default ``len(ratios)``). For n images of p pixels there are ``min(n - 1, p)``.

    Examples
    --------
    >>> broken_stick_rank([0.7, 0.2, 0.07, 0.03])
    1
    """
    ratios = np.asarray(ratios, dtype=np.float64)
    stick = broken_stick(count or len(ratios))[:len(ratios)]
    below = np.flatnonzero(ratios[:len(stick)] <= stick)
    return int(below[0]) if len(below) else len(stick)


def marchenko_pastur_median(beta):
    """Median of the Marchenko-Pastur law of aspect ratio `beta` (0 < beta <= 1), variance 1.

    Examples
    --------
    >>> round(marchenko_pastur_median(1.0), 6)
    0.652776
    """
    from scipy import integrate, optimize

    if not 0 < beta <= 1:
        raise ParameterError(f"beta must be in (0, 1], got {beta}")
    lo, hi = (1 - math.sqrt(beta)) ** 2, (1 + math.sqrt(beta)) ** 2

    def density(x):
        return math.sqrt(max((hi - x) * (x - lo), 0.0)) / (2 * math.pi * beta * x)

    def below(t):
        return integrate.quad(density, lo, t)[0] - 0.5

    return float(optimize.brentq(below, lo, hi, xtol=1e-13))


def gavish_donoho_omega(beta):
    """Gavish-Donoho threshold coefficient for unknown noise: tau = omega * median s.

    ``omega(beta) = lambda*(beta) / sqrt(mu_beta)`` with ``lambda*`` the known-noise
    coefficient and ``mu_beta`` the Marchenko-Pastur median (Gavish & Donoho 2014).

    Examples
    --------
    >>> round(gavish_donoho_omega(1.0), 6)
    2.858362
    """
    lam = math.sqrt(2 * (beta + 1) + 8 * beta / ((beta + 1) + math.sqrt(beta ** 2 + 14 * beta
                                                                          + 1)))
    return lam / math.sqrt(marchenko_pastur_median(beta))


def gavish_donoho_rank(singular_values, shape):
    """Rank above the Gavish-Donoho optimal hard threshold (noise level unknown).

    Parameters
    ----------
    singular_values : array_like
        *All* ``min(shape)`` singular values of the (centred) data matrix.
    shape : tuple of int
        ``(rows, columns)`` of that matrix.

    Returns
    -------
    rank : int
    threshold : float
    beta : float

    Examples
    --------
    >>> s = np.r_[50.0, 20.0, np.linspace(3, 1, 98)]
    >>> gavish_donoho_rank(s, (100, 400))[0]
    2
    """
    s = np.sort(np.asarray(singular_values, dtype=np.float64))[::-1]
    rows, cols = shape
    beta = min(rows, cols) / max(rows, cols)
    threshold = gavish_donoho_omega(beta) * float(np.median(s))
    return int(np.count_nonzero(s > threshold)), threshold, beta


def data_spectrum(pixels, *, max_rows=2000, seed=0):
    """All singular values of the centred image matrix, from its smaller Gram matrix.

    Parameters
    ----------
    pixels : ndarray, shape (n, p)
    max_rows : int
        When both n and p exceed it, a random subset of `max_rows` images is used (the
        Gram matrix costs rows^2 p).
    seed : int

    Returns
    -------
    singular_values : ndarray, descending, ``min(rows - 1, p)`` values
    shape : tuple
        ``(rows - 1, p)``: the centred matrix has one rank fewer than rows.

    Examples
    --------
    >>> x = np.array([[0, 0], [1, 0], [0, 2]], dtype=np.float32)
    >>> s, shape = data_spectrum(x)
    >>> shape, s.shape
    ((2, 2), (2,))
    """
    n, p = pixels.shape
    rows = np.arange(n)
    if n > max_rows and p > max_rows:
        rows = np.sort(np.random.default_rng(seed).choice(n, max_rows, replace=False))
    m = len(rows)
    mean = np.zeros(p)
    for start in range(0, m, _CHUNK_ROWS):
        mean += pixels[rows[start:start + _CHUNK_ROWS]].sum(axis=0, dtype=np.float64)
    mean = (mean / m).astype(np.float32)
    if m <= p:
        gram = np.zeros((m, m))
        blocks = [rows[i:i + _CHUNK_ROWS] for i in range(0, m, _CHUNK_ROWS)]
        for i, bi in enumerate(blocks):
            ci = np.subtract(pixels[bi], mean, dtype=np.float32)
            oi = i * _CHUNK_ROWS
            gram[oi:oi + len(bi), oi:oi + len(bi)] = ci @ ci.T
            for j in range(i):
                bj = blocks[j]
                cj = np.subtract(pixels[bj], mean, dtype=np.float32)
                oj = j * _CHUNK_ROWS
                block = ci @ cj.T
                gram[oi:oi + len(bi), oj:oj + len(bj)] = block
                gram[oj:oj + len(bj), oi:oi + len(bi)] = block.T
    else:
        gram = np.zeros((p, p))
        for start in range(0, m, _CHUNK_ROWS):
            c = np.subtract(pixels[rows[start:start + _CHUNK_ROWS]], mean, dtype=np.float64)
            gram += c.T @ c
    eig = np.linalg.eigvalsh(gram)[::-1]
    count = min(m - 1, p)
    return np.sqrt(np.clip(eig[:count], 0, None)), (m - 1, p)


# -- choosing the rank -------------------------------------------------------------------
@dataclass(eq=False)
class RankChoice:
    """A recommended rank, the rule that gave it, and the evidence.

    Attributes
    ----------
    rank : int
        The recommended rank (the largest rank tried when the target was not met).
    rule : str
        ``'psnr'``, ``'ssim'`` or ``'variance'``.
    target : float
        dB for ``'psnr'``, SSIM for ``'ssim'``, a fraction for ``'variance'``.
    target_met : bool
    curve : QualityCurve
    rules : dict
        Every rule's rank side by side: ``psnr``, ``variance`` (when asked),
        ``gavish_donoho`` (with threshold and beta) and ``broken_stick``.
    ssim : list of dict
        SSIM at the ranks evaluated: ``{rank, ssim_mean, ssim_p05, ssim_min}``.
    """

    rank: int
    rule: str
    target: float
    target_met: bool
    curve: QualityCurve
    rules: dict
    ssim: list


def _ssim_at(curve, pixels, rank, sample, image_shape):
    rec = curve.reconstruct(sample, rank)
    values = reconstruction_metrics(np.asarray(pixels[sample]), rec, image_shape=image_shape)
    v = values["ssim"]
    return {"rank": int(rank), "ssim_mean": float(v.mean()),
            "ssim_p05": float(np.quantile(v, 0.05, method="inverted_cdf")),
            "ssim_min": float(v.min())}


def choose_rank(pixels, *, image_shape, basis=None, target_psnr=None, target_ssim=None,
                variance=None, max_rank=None, folds=5, seed=0, power_iterations=2,
                ssim_images=100, spectrum_rows=2000, progress=False):
    """Recommend a rank: the smallest one whose 5th-percentile held-out image meets a target.

    Parameters
    ----------
    pixels : ndarray, shape (n, p)
        Images as rows (pixel units).
    image_shape : tuple of int
    basis : EigenBasis, optional
        A basis fitted on *other* images; without one, k-fold cross-validation over
        `pixels` gives held-out curves.
    target_psnr, target_ssim, variance : float, optional
        At most one. Default: ``target_psnr=40``.
    max_rank : int, optional
    folds, seed, power_iterations : int
        Cross-validation settings (see :func:`cross_validated_curve`).
    ssim_images : int
        SSIM is computed on a seeded random subset of at most this many images, at the
        ranks a bisection visits (it needs full reconstructions, unlike PSNR).
    spectrum_rows : int
        Image limit of the Gram matrix behind the Gavish-Donoho and broken-stick ranks.
    progress : bool or object

    Returns
    -------
    RankChoice

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> x = (0.5 + rng.standard_normal((60, 3)) @ rng.standard_normal((3, 144)) * 0.05
    ...      + 0.001 * rng.standard_normal((60, 144))).astype(np.float32)
    >>> choice = choose_rank(x, image_shape=(12, 12), target_psnr=45, max_rank=10)
    >>> choice.rank, choice.rule, choice.target_met
    (3, 'psnr', True)
    """
    given = [(name, value) for name, value in (("psnr", target_psnr), ("ssim", target_ssim),
                                               ("variance", variance)) if value is not None]
    if len(given) > 1:
        raise ParameterError("give at most one of --target-psnr, --target-ssim and "
                             f"--variance (got {', '.join(n for n, _ in given)})")
    rule, target = given[0] if given else ("psnr", 40.0)
    target = float(target)
    if rule == "ssim" and not -1 < target <= 1:
        raise ParameterError(f"--target-ssim must be in (-1, 1], got {target}")
    if rule == "variance" and not 0 < target <= 1:
        raise ParameterError(f"--variance must be a fraction in (0, 1], got {target} "
                             "(for 90% give 0.9)")
    if rule == "ssim" and min(tuple(image_shape)[:2]) < SSIM_MIN_SIDE:
        raise ParameterError(f"--target-ssim needs images of at least {SSIM_MIN_SIDE}x"
                             f"{SSIM_MIN_SIDE} pixels (the SSIM window); use --target-psnr")
    if basis is not None:
        curve = quality_curve(basis, pixels, max_rank=max_rank, progress=progress)
    else:
        curve = cross_validated_curve(pixels, max_rank=max_rank, folds=folds, seed=seed,
                                      power_iterations=power_iterations,
                                      image_shape=image_shape, progress=progress)
    K = curve.max_rank
    summary = curve.summary()
    rules = {}
    if target_psnr is not None or rule == "psnr":
        r = target_rank(summary["psnr_p05"][1:], target if rule == "psnr" else target_psnr)
        psnr_rank = None if r is None else r + 1
        rules["psnr"] = {"rank": psnr_rank, "target": target if rule == "psnr" else None}
    if rule == "variance":
        rules["variance"] = {"rank": variance_rank(curve.explained, target),
                             "target": target}
    s, shape = data_spectrum(pixels, max_rows=spectrum_rows, seed=seed)
    gd_rank, threshold, beta = gavish_donoho_rank(s, shape)
    total = float(np.sum(s ** 2))
    rules["gavish_donoho"] = {"rank": gd_rank, "threshold": threshold, "beta": beta,
                              "images": shape[0] + 1}
    rules["broken_stick"] = {"rank": broken_stick_rank(s ** 2 / total, count=len(s))
                             if total > 0 else 0}

    n = len(pixels)
    sample = np.arange(n)
    if n > ssim_images:
        sample = np.sort(np.random.default_rng(seed).choice(n, ssim_images, replace=False))
    ssim_rows = {}

    def ssim_row(r):
        if r not in ssim_rows:
            ssim_rows[r] = _ssim_at(curve, pixels, r, sample, image_shape)
        return ssim_rows[r]

    if rule == "ssim":
        lo, hi = 1, K
        if ssim_row(K)["ssim_p05"] < target:
            rank = None
        else:
            while lo < hi:
                mid = (lo + hi) // 2
                if ssim_row(mid)["ssim_p05"] >= target:
                    hi = mid
                else:
                    lo = mid + 1
            rank = lo
        rules["ssim"] = {"rank": rank, "target": target, "images": len(sample)}
    else:
        rank = rules[rule]["rank"]
    met = rank is not None
    rank = K if rank is None else rank
    if min(tuple(image_shape)[:2]) >= SSIM_MIN_SIDE:
        for r in {rank, *(v["rank"] for v in rules.values())}:
            if r is not None and 1 <= r <= K:
                ssim_row(r)
    return RankChoice(rank=int(rank), rule=rule, target=target, target_met=met, curve=curve,
                      rules=rules, ssim=[ssim_rows[r] for r in sorted(ssim_rows)])
