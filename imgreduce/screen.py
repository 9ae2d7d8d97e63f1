"""Screening: Q, T^2 and a local residual statistic per image, calibrated limits, maps.

For each image, with scores ``t = V (x - mean)`` on the first k components:

- **Q** (also called SPE) is the squared residual ``||x - mean - V^T t||^2``, in squared
  pixel units: what the basis cannot represent, summed over the whole frame.
- **T^2** (Hotelling) is ``sum_a t_a^2 / lambda_a`` with ``lambda_a = s_a^2 / (n - 1)``
  (the n - 1 covariance estimator, common practice): how unusual the image is *inside*
  the model (an odd combination of normal appearances, an extreme lamp level).
- **local** is the largest value of the residual energy map: the squared residual divided
  pixel by pixel by the held-out residual variance of good images, smoothed with a small
  Gaussian. A scratch or a particle a few pixels wide hardly moves a whole-frame Q when
  textured or moving parts of the scene leave large residuals everywhere, but it stands
  far above its neighbourhood here. Its limit is a Gumbel law (the extreme-value law of
  maxima of light-tailed fields) matched by moments to held-out maxima.

- **shift** (with ``align=True``): frames are first moved onto the reference's mean by
  sub-pixel translation (:mod:`imgreduce.align`), and the squared Mahalanobis distance
  of that translation from the reference frames' own is screened: a part that landed
  far off its usual place.

**Limits are calibrated on images the basis did not see.** With far more pixels than
images, a basis fits part of its training images' noise: their residuals are shrunk, and
limits computed from training residuals or training eigenvalues flag nearly every new good
frame. Here the reference set is split into k folds; a basis fitted on the other folds
scores each held-out fold, and Box's weighted chi-square ``g chi2_h`` is matched to the
mean m and variance v of the held-out values (``g = v / (2 m)``, ``h = 2 m^2 / v``; Box,
Ann. Math. Statist. 25(2), 1954, as used by Nomikos & MacGregor, Technometrics 37(1),
1995), for Q and for T^2 alike. The textbook limits (Jackson & Mudholkar 1979 for Q, the
F-based limit for a new observation's T^2) are available as ``limits='analytic'``.

An image is flagged when any statistic exceeds its limit. Each of the m statistics in use
gets ``alpha / m`` (Bonferroni), and with enough reference images one split-conformal
factor then scales all limits so that held-out good images exceed any at rate alpha:
``alpha`` is the rate of false alarms per good image, not per statistic.

Screening is an aid to inspection, not an acceptance decision: confirm flagged frames,
audit a sample of passed ones, validate detection on known defects before relying on it,
and follow the quality procedures and standards that apply.
"""

from dataclasses import dataclass, field

import numpy as np

from .errors import ParameterError

__all__ = [
    "box_limit", "box_limit_from_eigenvalues", "jackson_mudholkar_limit",
    "t2_limit_new", "t2_limit_reference", "gumbel_limit", "scores", "Calibration",
    "calibrate", "calibrate_on_batch", "conformal_scale", "Screener", "ScreenResult",
    "screen_images", "screen_batch", "residual_map", "locate_defect",
    "choose_screening_rank", "CAUTION",
]

CAUTION = ("Screening is an aid to inspection, not an acceptance decision: confirm flagged "
           "frames, audit a sample of passed ones, validate detection on known defects "
           "before relying on it, and follow the quality procedures that apply.")
_CHUNK_ROWS = 256
_MAP_ROWS = 64  # rows whose maps are held at once while screening


# -- limits ------------------------------------------------------------------------------
def _check_alpha(alpha):
    if not 0 < float(alpha) < 1:
        raise ParameterError(f"alpha must be between 0 and 1 (for example 0.01), got {alpha!r}")
    return float(alpha)


def box_limit(mean, variance, alpha):
    """Upper limit of ``g chi2_h`` matched to a mean and variance (Box 1954).

    Examples
    --------
    >>> round(box_limit(45.7401, 2 * 1129.5532, 0.05), 4)  # Jackson's example, k = 2
    140.8082
    """
    from scipy import stats

    alpha = _check_alpha(alpha)
    mean, variance = float(mean), float(variance)
    if mean <= 0 or variance <= 0:
        return float(mean)
    g = variance / (2 * mean)
    h = 2 * mean ** 2 / variance
    return float(g * stats.chi2.ppf(1 - alpha, h))


def box_limit_from_eigenvalues(residual_eigenvalues, alpha):
    """Box's limit from residual eigenvalues: ``g = theta2/theta1``, ``h = theta1^2/theta2``."""
    lam = np.asarray(residual_eigenvalues, dtype=np.float64)
    theta1, theta2 = lam.sum(), (lam ** 2).sum()
    return box_limit(theta1, 2 * theta2, alpha)


def jackson_mudholkar_limit(residual_eigenvalues, alpha):
    """Q limit of Jackson & Mudholkar (Technometrics 21(3), 1979), Box's when h0 <= 0.

    Parameters
    ----------
    residual_eigenvalues : array_like
        Covariance eigenvalues of the components *not* kept.
    alpha : float

    Returns
    -------
    limit : float
    method : {'jackson-mudholkar', 'box'}
        ``'box'`` when ``h0 <= 0`` (very uneven residual eigenvalues), where the
        approximation breaks down.

    Examples
    --------
    >>> lam = [48.03, 29.33, 16.41][1:]  # Jackson 1991, ballistic missile data, k = 2
    >>> limit, method = jackson_mudholkar_limit(lam, 0.05)
    >>> round(limit, 2), method
    (140.42, 'jackson-mudholkar')
    """
    from scipy import stats

    alpha = _check_alpha(alpha)
    lam = np.asarray(residual_eigenvalues, dtype=np.float64)
    theta1, theta2, theta3 = (lam ** 1).sum(), (lam ** 2).sum(), (lam ** 3).sum()
    if theta1 <= 0:
        return 0.0, "jackson-mudholkar"
    h0 = 1 - 2 * theta1 * theta3 / (3 * theta2 ** 2)
    if h0 <= 0:
        return box_limit_from_eigenvalues(lam, alpha), "box"
    c = stats.norm.ppf(1 - alpha)
    inner = (c * np.sqrt(2 * theta2 * h0 ** 2) / theta1 + 1
             + theta2 * h0 * (h0 - 1) / theta1 ** 2)
    return float(theta1 * inner ** (1 / h0)), "jackson-mudholkar"


def t2_limit_new(k, n, alpha):
    """T^2 limit for a new observation (NIST/SEMATECH e-Handbook 6.5.4.4).

    ``k (n - 1) (n + 1) / (n (n - k)) F_{1-alpha}(k, n - k)``.

    Examples
    --------
    >>> round(t2_limit_new(2, 40, 0.05), 4)
    6.8269
    """
    from scipy import stats

    alpha = _check_alpha(alpha)
    if n <= k:
        return float("inf")
    return float(k * (n - 1) * (n + 1) / (n * (n - k)) * stats.f.ppf(1 - alpha, k, n - k))


def t2_limit_reference(k, n, alpha):
    """T^2 limit for a reference observation itself (Tracy, Young & Mason 1992).

    ``((n - 1)^2 / n) Beta_{1-alpha}(k / 2, (n - k - 1) / 2)``.

    Examples
    --------
    >>> round(t2_limit_reference(2, 40, 0.05), 4)
    5.6848
    """
    from scipy import stats

    alpha = _check_alpha(alpha)
    if n - k - 1 <= 0:
        return float((n - 1) ** 2 / n)
    return float((n - 1) ** 2 / n * stats.beta.ppf(1 - alpha, k / 2, (n - k - 1) / 2))




def gumbel_limit(values, alpha):
    """Upper ``1 - alpha`` quantile of a Gumbel law matched to the moments of `values`.

    The Gumbel (type I extreme-value) law with scale ``beta = s sqrt(6) / pi`` and location
    ``mu = m - gamma beta`` has mean m and standard deviation s (gamma is Euler's
    constant); its quantile is ``mu - beta ln(-ln(1 - alpha))``. Maxima of many
    light-tailed values, such as the largest value of a residual energy map, follow it
    approximately.

    Examples
    --------
    >>> x = np.random.default_rng(0).gumbel(5.0, 2.0, 200_000)
    >>> round(gumbel_limit(x, 0.01), 1)  # exact: 5 - 2 ln(-ln 0.99) = 14.2
    14.2
    """
    alpha = _check_alpha(alpha)
    values = np.asarray(values, dtype=np.float64)
    values = values[np.isfinite(values)]
    if len(values) < 2:
        return float("inf")
    beta = float(values.std(ddof=1)) * np.sqrt(6.0) / np.pi
    mu = float(values.mean()) - np.euler_gamma * beta
    return float(mu - beta * np.log(-np.log1p(-alpha)))


def _box_from_values(values, alpha):
    values = np.asarray(values, dtype=np.float64)
    values = values[np.isfinite(values)]
    if len(values) < 2:
        return float("inf")
    return box_limit(values.mean(), values.var(ddof=1), alpha)


# -- statistics --------------------------------------------------------------------------
def _check_rank(basis, rank):
    return basis._rank(rank)


def _energy(residual, image_shape, sigma):
    """Smoothed residual energy of a chunk of residual rows, shape (m, h * w), float32.

    Squared residual summed over colour channels, smoothed with a Gaussian of `sigma`
    pixels (``mode='nearest'`` at the borders).
    """
    from scipy.ndimage import gaussian_filter

    energy = residual * residual
    shape = tuple(image_shape)
    energy = energy.reshape((len(residual),) + shape)
    if energy.ndim == 4:
        energy = energy.sum(axis=3)
    if sigma and energy.ndim == 3:
        energy = gaussian_filter(energy, (0.0, float(sigma), float(sigma)), mode="nearest")
    return energy.reshape(len(residual), -1)


def _moments(sum1, sum2, count):
    """Per-pixel mean and variance of good images' smoothed energy, floored."""
    count = np.asarray(count, dtype=np.float64)
    mean = sum1 / count
    var = np.maximum(sum2 - count * mean * mean, 0.0) / np.maximum(count - 1, 1)
    return _floor_moments(mean, var)


def _floor_moments(mean, var):
    scale = float(np.median(mean)) if np.ndim(mean) == 1 else np.median(mean, axis=-1,
                                                                         keepdims=True)
    mean = np.maximum(mean, 1e-3 * scale + 1e-30)
    # h = 2 m^2 / v stays at or above 0.5 (a heavier tail than one squared normal is not
    # credible for smoothed energy); the Gumbel limit absorbs what remains.
    var = np.clip(var, 1e-8 * mean * mean, 4.0 * mean * mean)
    return mean, var


def _zscore(energy, mean, var):
    """Wilson-Hilferty normal score of energy under ``g chi2_h`` matched to mean, var.

    ``z = ((E / m)^(1/3) - (1 - a)) / sqrt(a)`` with ``a = 2 / (9 h)``, ``h = 2 m^2 / v``
    (Wilson & Hilferty, PNAS 17(12), 1931): about standard normal for a good image.
    """
    a = (2.0 / 9.0) * var / (2.0 * mean * mean)
    a = a.astype(np.float32, copy=False)
    ratio = (energy / mean).astype(np.float32, copy=False)
    return (np.cbrt(ratio) - (1.0 - a)) / np.sqrt(a)


def _chunk_stats(basis, rank, pixels, *, sigma=1.5, moments=None, energy=True,
                 eigenvalues=None):
    """Q, T^2, smoothed energy and (with `moments`) local z-maps of one chunk.

    Returns
    -------
    q, t2 : ndarray (m,)
    e : ndarray (m, h*w) float32 or None
        Smoothed residual energy (None when ``energy=False``).
    z : ndarray (m, h*w) float32 or None
        Normal scores of `e` against `moments` ``(mean, var)``, when given.
    """
    comps = basis.components[:rank]
    lam = basis.explained_variance[:rank] if eigenvalues is None else eigenvalues[:rank]
    r = np.subtract(pixels, basis.mean, dtype=np.float32)
    t = r @ comps.T
    r -= t @ comps
    q = np.einsum("ij,ij->i", r, r, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        t2 = (t.astype(np.float64) ** 2 / lam).sum(axis=1) if rank else np.zeros(len(r))
    if not energy:
        return q, t2, None, None
    e = _energy(r, basis.image_shape, sigma)
    z = _zscore(e, *moments) if moments is not None else None
    return q, t2, e, z


def scores(basis, pixels, *, rank):
    """Q and T^2 of each row of `pixels` on the first `rank` components of `basis`.

    Parameters
    ----------
    basis : EigenBasis
    pixels : ndarray, shape (m, p)
    rank : int

    Returns
    -------
    q : ndarray, shape (m,), float64
        Squared residual norm, in squared pixel units.
    t2 : ndarray, shape (m,), float64

    Examples
    --------
    >>> from imgreduce import fit_basis
    >>> x = np.random.default_rng(0).random((30, 20), dtype=np.float32)
    >>> b = fit_basis(x, rank=3, exact=True)
    >>> q, t2 = scores(b, x, rank=3)
    >>> round(float(t2.sum()), 3)  # training identity: sum T^2 = k (n - 1)
    87.0
    """
    pixels = basis._pixels(pixels)
    rank = _check_rank(basis, rank)
    q = np.empty(len(pixels))
    t2 = np.empty(len(pixels))
    for start in range(0, len(pixels), _CHUNK_ROWS):
        stop = start + _CHUNK_ROWS
        q[start:stop], t2[start:stop], _, _ = _chunk_stats(basis, rank, pixels[start:stop],
                                                           energy=False)
    return q, t2


def _loo_z(energy, sum1, sum2, count):
    """z-maps of images that are part of the moments, each left out of its own moments.

    An image that sets a pixel's largest value also inflates that pixel's variance; left
    in, its own score would be understated and the limit set too low.
    """
    n = count - 1
    mean = (sum1 - energy) / n
    var = np.maximum(sum2 - energy * energy - n * mean * mean, 0.0) / max(n - 1, 1)
    mean, var = _floor_moments(mean, var)
    return _zscore(energy, mean.astype(np.float32), var.astype(np.float32))


def _local_from_energy(energy, *, keep, chunk=_CHUNK_ROWS):
    """Local statistic of every row of `energy`: kept rows leave-one-out, others not.

    Returns
    -------
    local : ndarray (n,)
    moments : (mean, var)
        Of the kept rows, float32, for images screened later.
    """
    kept = np.flatnonzero(keep)
    sum1 = np.zeros(energy.shape[1])
    sum2 = np.zeros(energy.shape[1])
    for start in range(0, len(kept), chunk):
        e = energy[kept[start:start + chunk]].astype(np.float64)
        sum1 += e.sum(axis=0)
        sum2 += (e * e).sum(axis=0)
    mean, var = _moments(sum1, sum2, len(kept))
    moments = (mean.astype(np.float32), var.astype(np.float32))
    local = np.empty(len(energy))
    for start in range(0, len(energy), chunk):
        rows = np.arange(start, min(start + chunk, len(energy)))
        inside = keep[rows]
        z = np.empty((len(rows), energy.shape[1]), np.float32)
        e = energy[rows].astype(np.float64)
        if inside.any():
            z[inside] = _loo_z(e[inside], sum1, sum2, len(kept))
        if (~inside).any():
            z[~inside] = _zscore(e[~inside].astype(np.float32), *moments)
        local[rows] = z.max(axis=1)
    return local, moments


@dataclass(eq=False)
class Calibration:
    """Control limits and how they were obtained.

    Attributes
    ----------
    rank : int
        Components kept for screening.
    alpha : float
        Aimed-at false-alarm rate per good image; each statistic's limit is set at
        ``alpha`` divided by the number of statistics in use.
    q_limit, t2_limit, local_limit : float
        ``local_limit`` is ``inf`` when the local statistic is not in use.
    energy_mean, energy_var : ndarray, shape (h * w,), or None
        Per-pixel mean and variance of good images' smoothed residual energy (held out);
        they turn a residual map into normal scores (None with ``'analytic'`` limits).
    method : str
        ``'heldout'`` or ``'box'`` (k-fold over a reference set), ``'batch'`` (the
        screened batch itself, trimmed) or ``'analytic'`` (textbook limits from training
        eigenvalues).
    sigma : float
        Smoothing of the residual maps, in pixels.
    reference : dict
        The values the limits were fitted to: arrays ``'q'``, ``'t2'``, ``'local'``.
    details : dict
    align_template : ndarray or None
        With alignment: the template frames are moved onto.
    shift_mean, shift_cov, shift_limit
        With alignment: the reference frames' shifts and the placement limit.
    t2_eigenvalues : ndarray (rank,) or None
        The k-fold bases' eigenvalues, averaged per component. A basis fitted on all n
        reference images has smaller noise-inflated eigenvalues than bases fitted on
        (k-1)/k of them, so its T^2 of a new frame runs about 10% above the held-out T^2
        the limit was fitted to (measured), and the false-alarm rate with it. Scoring new
        frames with these eigenvalues keeps the two on one scale. Only meaningful for a
        basis fitted on the same reference; None otherwise.
    """

    rank: int
    alpha: float
    q_limit: float
    t2_limit: float
    local_limit: float
    energy_mean: object
    energy_var: object
    method: str
    sigma: float = 1.5
    reference: dict = field(default_factory=dict)
    details: dict = field(default_factory=dict)
    align_template: object = None
    shift_mean: object = None
    shift_cov: object = None
    shift_limit: float = float("inf")
    t2_eigenvalues: object = None

    @property
    def align(self):
        """Whether frames are aligned to a template before scoring (``--align``)."""
        return self.align_template is not None

    @property
    def statistics(self):
        """The statistics in use: ``Q``, ``T2``, and ``local`` and ``shift`` when used."""
        out = ("Q", "T2") + (("local",) if np.isfinite(self.local_limit) else ())
        return out + (("shift",) if self.align else ())

    def prepare(self, pixels, image_shape):
        """Rows as this calibration scores them: aligned when it aligns.

        Returns
        -------
        rows : ndarray (m, p)
        shifts : ndarray (m, 2) or None
        """
        if not self.align:
            return pixels, None
        from .align import apply_shifts, estimate_shifts

        shifts = estimate_shifts(pixels, image_shape, self.align_template)
        return (apply_shifts(pixels, image_shape, shifts, fill=self.align_template),
                shifts)

    def shift_distance(self, shifts):
        """Squared Mahalanobis distance of shifts from the reference's placement."""
        d = np.asarray(shifts, dtype=np.float64) - np.asarray(self.shift_mean)
        return np.einsum("ij,jk,ik->i", d, np.linalg.inv(np.asarray(self.shift_cov)), d)

    @property
    def moments(self):
        if self.energy_mean is None:
            return None
        return self.energy_mean, self.energy_var

    def limits(self):
        """``q_limit``, ``t2_limit``, ``local_limit`` and ``shift_limit`` (None: unused)."""
        local = float(self.local_limit) if np.isfinite(self.local_limit) else None
        shift = float(self.shift_limit) if self.align else None
        return {"q_limit": float(self.q_limit), "t2_limit": float(self.t2_limit),
                "local_limit": local, "shift_limit": shift}

    def attach(self, basis):
        """Store this calibration in `basis`, to be saved and loaded with it."""
        if self.rank > basis.rank:
            raise ParameterError(f"calibration rank {self.rank} exceeds the basis rank "
                                 f"{basis.rank}")
        basis.metadata["screening"] = {
            "rank": int(self.rank), "alpha": float(self.alpha), "method": self.method,
            "sigma": float(self.sigma), **self.limits(), "details": _jsonable(self.details),
            "shift_mean": None if not self.align else np.asarray(self.shift_mean).tolist(),
            "shift_cov": None if not self.align else np.asarray(self.shift_cov).tolist()}
        for key in ("screening_energy_mean", "screening_energy_var",
                    "screening_align_template", "screening_t2_eigenvalues"):
            basis.extra.pop(key, None)
        if self.t2_eigenvalues is not None:
            basis.extra["screening_t2_eigenvalues"] = np.asarray(self.t2_eigenvalues,
                                                                 np.float64)
        if self.align:
            basis.extra["screening_align_template"] = np.asarray(self.align_template,
                                                                 np.float32)
        if self.energy_mean is not None:
            basis.extra["screening_energy_mean"] = np.asarray(self.energy_mean, np.float32)
            basis.extra["screening_energy_var"] = np.asarray(self.energy_var, np.float32)

    @classmethod
    def from_basis(cls, basis):
        """The calibration stored in `basis`, or None."""
        meta = basis.metadata.get("screening")
        if not meta:
            return None
        local = meta.get("local_limit")
        mean = basis.extra.get("screening_energy_mean")
        var = basis.extra.get("screening_energy_var")
        if local is not None and (mean is None or var is None):
            raise ParameterError("the basis's screening calibration lacks its energy maps "
                                 "(calibrate again with --reference)")
        template = basis.extra.get("screening_align_template")
        if meta.get("shift_limit") is not None and template is None:
            raise ParameterError("the basis's screening calibration aligns frames but lacks "
                                 "its template (calibrate again with --reference --align)")
        return cls(int(meta["rank"]), float(meta["alpha"]), float(meta["q_limit"]),
                   float(meta["t2_limit"]), float("inf") if local is None else float(local),
                   mean, var, meta.get("method", "heldout"), float(meta.get("sigma", 1.5)),
                   {}, dict(meta.get("details", {})), template,
                   None if template is None else np.asarray(meta["shift_mean"]),
                   None if template is None else np.asarray(meta["shift_cov"]),
                   float("inf") if template is None else float(meta["shift_limit"]),
                   basis.extra.get("screening_t2_eigenvalues"))


def _jsonable(details):
    out = {}
    for key, value in details.items():
        if isinstance(value, np.generic):
            value = value.item()
        if isinstance(value, (str, int, float, bool, type(None), list, dict)):
            out[key] = value
    return out


def _limits_from(q, t2, local, alpha):
    """Box limits for Q and T^2, Gumbel for local, with a Bonferroni split of alpha."""
    use_local = local is not None and np.isfinite(local).any()
    level = alpha / (3 if use_local else 2)
    return (_box_from_values(q, level), _box_from_values(t2, level),
            gumbel_limit(local, level) if use_local else float("inf"))


def conformal_scale(excess, alpha):
    """Factor on the limits so that held-out good images exceed any at rate <= alpha.

    `excess` holds, per held-out good image, its largest ratio of statistic to limit.
    The ``ceil((n + 1)(1 - alpha))``-th smallest value is the split-conformal quantile
    (Vovk, Gammerman & Shafer 2005; Lei et al., JASA 113, 2018): a new good image
    exchangeable with them exceeds it with probability at most alpha, whatever the
    statistics' distribution. None when ``n < 1 / alpha - 1`` (too few images for that
    quantile).

    Examples
    --------
    >>> conformal_scale(np.arange(1, 201) / 100, 0.01)  # 199th of 200 values
    1.99
    >>> conformal_scale(np.ones(50), 0.01) is None
    True
    """
    excess = np.sort(np.asarray(excess, dtype=np.float64))
    n = len(excess)
    k = int(np.ceil((n + 1) * (1 - alpha)))
    if k > n or n == 0:
        return None
    return float(excess[k - 1])


def _heldout_limits(q, t2, local, alpha, shift_d2=None):
    """Limits from held-out good images: parametric shapes, a distribution-free level.

    Box (Q, T^2) and Gumbel (local) laws at ``alpha / m`` each (m statistics) give the
    limits' shape, and for aligned frames the F-based limit of a new observation's
    squared Mahalanobis distance gives the placement (``shift``) limit's; with enough
    images all limits are then scaled by one :func:`conformal_scale` so that the rate of
    held-out images over any limit is alpha. The parametric tails alone are too light
    when good frames vary in ways that are not Gaussian (sub-pixel placement, say):
    measured 2-3x alpha on such sets.

    Returns
    -------
    q_limit, t2_limit, local_limit, shift_limit, info
    """
    m = 3 if local is not None and np.isfinite(local).any() else 2
    m += shift_d2 is not None
    level = alpha / m
    box_alpha = level * (m - (shift_d2 is not None))  # what _limits_from splits
    limits = list(_limits_from(q, t2, local, box_alpha))
    values = [q, t2] + ([local] if np.isfinite(limits[2]) else [])
    used = [limits[0], limits[1]] + ([limits[2]] if np.isfinite(limits[2]) else [])
    shift_limit = float("inf")
    if shift_d2 is not None:
        shift_limit = t2_limit_new(2, len(shift_d2), level)
        values.append(shift_d2)
        used.append(shift_limit)
    excess = np.max([np.asarray(v) / lim for v, lim in zip(values, used)], axis=0)
    scale = conformal_scale(excess, alpha)
    info = {"limit_scale": scale, "level": "conformal" if scale else "parametric"}
    if scale is not None:
        limits = [lim * scale for lim in limits]
        shift_limit *= scale
    return float(limits[0]), float(limits[1]), float(limits[2]), float(shift_limit), info


def _fold_bases(pixels, rank, folds, seed, image_shape, power_iterations=2):
    """k-fold assignment and one basis per fold, each fitted without its fold."""
    from .basis import fit_basis

    n = len(pixels)
    folds = int(min(folds, n))
    fold_of = np.empty(n, dtype=np.intp)
    fold_of[np.random.default_rng(seed).permutation(n)] = np.arange(n) % folds
    bases = []
    for f in range(folds):
        train = np.flatnonzero(fold_of != f)
        b = fit_basis(pixels[train], rank=min(rank, len(train) - 1), seed=seed + f,
                      power_iterations=power_iterations)
        b.image_shape = tuple(image_shape)
        bases.append(b)
    return fold_of, bases


def _heldout(pixels, image_shape, rank, folds, seed, sigma):
    """Held-out Q, T^2, smoothed energy of every image (k-fold), and the rank used.

    One fold basis at a time is held in memory; the energies (one float32 map per image)
    are kept for the local statistic. Also returns the fold bases' eigenvalues, averaged
    per component (see :attr:`Calibration.t2_eigenvalues`).
    """
    from .basis import fit_basis

    n = len(pixels)
    folds = int(min(folds, n))
    rank = int(max(0, min(rank, n - -(-n // folds) - 1)))
    fold_of = np.empty(n, dtype=np.intp)
    fold_of[np.random.default_rng(seed).permutation(n)] = np.arange(n) % folds
    q, t2 = np.empty(n), np.empty(n)
    h, w = tuple(image_shape)[:2] if len(image_shape) >= 2 else (1, image_shape[0])
    energy = np.empty((n, h * w), np.float32)
    lams = []
    for f in range(folds):
        train, test = np.flatnonzero(fold_of != f), np.flatnonzero(fold_of == f)
        b = fit_basis(pixels[train], rank=rank, seed=seed + f)
        b.image_shape = tuple(image_shape)
        lams.append(b.explained_variance[:rank])
        for start in range(0, len(test), _CHUNK_ROWS):
            rows = test[start:start + _CHUNK_ROWS]
            q[rows], t2[rows], energy[rows], _ = _chunk_stats(b, rank, pixels[rows],
                                                              sigma=sigma)
    return q, t2, energy, rank, np.mean(lams, axis=0)


def _as_pixels(images, image_shape):
    if hasattr(images, "pixels"):
        return images.pixels, tuple(images.image_shape)
    pixels = np.asarray(images)
    if pixels.ndim != 2:
        raise ParameterError(f"images must be an ImageStack or an (n, p) array, got shape "
                             f"{pixels.shape}")
    return pixels, tuple(image_shape) if image_shape is not None else (pixels.shape[1],)


def calibrate(reference, *, rank=None, alpha=0.01, folds=5, seed=0, limits="heldout",
              sigma=1.5, image_shape=None, align=False):
    """Control limits from known-good reference images.

    Parameters
    ----------
    reference : ImageStack or ndarray, shape (n, p)
        Known-good images (pixel units).
    rank : int, optional
        Components kept; default :func:`choose_screening_rank`.
    alpha : float
        Aimed-at false-alarm rate per good image (split over the statistics).
    folds : int
        k of the k-fold held-out scoring.
    seed : int
    limits : {'heldout', 'box', 'analytic'}
        ``'box'``: Box's g chi2_h fitted to the mean and variance of held-out Q and T^2,
        a Gumbel law to the held-out local maxima, each at ``alpha / 3``. ``'heldout'``
        (default): the same shapes, all scaled by one split-conformal factor
        (:func:`conformal_scale`) so that held-out good images exceed some limit at rate
        alpha, whatever their distribution; needs at least ``1 / alpha - 1`` reference
        images, else it is ``'box'`` (``details['level']`` says which).
        ``'analytic'``: Jackson-Mudholkar on the residual eigenvalues of `reference` and
        the F-based T^2 limit, Q and T^2 only; textbook, but with far more pixels than
        images the training eigenvalues understate new images' residuals and the limits
        flag too many good frames.
    sigma : float
        Smoothing of residual maps, in pixels.
    image_shape : tuple, optional
        Needed with an ndarray `reference` for 2-D maps.
    align : bool
        Align every frame to the reference's mean by sub-pixel translation before
        scoring (:mod:`imgreduce.align`), and screen the translation itself as a fourth
        statistic, ``shift``: the squared Mahalanobis distance of a frame's shift from
        the reference frames' shifts. For fixed cameras over parts that land a little
        differently each time. Fit the screening basis on ``calibration.prepare(...)``
        of the reference, not on the raw frames. Not with ``'analytic'`` limits.

    Returns
    -------
    Calibration

    Examples
    --------
    >>> x = np.random.default_rng(0).normal(size=(60, 64)).astype(np.float32)
    >>> cal = calibrate(x, rank=3, image_shape=(8, 8))
    >>> cal.method, cal.rank, cal.statistics
    ('heldout', 3, ('Q', 'T2', 'local'))
    """
    alpha = _check_alpha(alpha)
    pixels, image_shape = _as_pixels(reference, image_shape)
    n = len(pixels)
    if limits not in ("heldout", "box", "analytic"):
        raise ParameterError(f"limits must be 'heldout', 'box' or 'analytic', got {limits!r}")
    if isinstance(folds, bool) or not isinstance(folds, (int, np.integer)) or folds < 2:
        raise ParameterError(f"folds must be a whole number >= 2, got {folds!r}")
    if n < 10:
        raise ParameterError(f"calibrating limits needs at least 10 known-good reference "
                             f"images, got {n}; add more (50 or more is better)")
    rank, rule = _rank_and_rule(pixels, rank, seed)
    details = {"reference_images": n, "rank_rule": rule}
    if align and limits == "analytic":
        raise ParameterError("aligning frames needs held-out limits (--limits heldout or "
                             "box), not the analytic ones")
    template = shift_mean = shift_cov = d2 = None
    if align:
        from .align import align_rows

        pixels, shifts, template = align_rows(pixels, image_shape)
        shift_mean, shift_cov = shifts.mean(axis=0), np.cov(shifts.T)
        if not np.all(np.linalg.eigvalsh(shift_cov) > 1e-8):
            shift_cov = shift_cov + np.eye(2) * 1e-4  # frames that never move
        d = shifts - shift_mean
        d2 = np.einsum("ij,jk,ik->i", d, np.linalg.inv(shift_cov), d)
        details["shift_sd"] = np.sqrt(np.diag(shift_cov)).round(4).tolist()
    if limits in ("heldout", "box"):
        q, t2, energy, rank, fold_lam = _heldout(pixels, image_shape, rank, folds, seed,
                                                 sigma)
        local, (mean, var) = _local_from_energy(energy, keep=np.ones(n, bool))
        if limits == "heldout":
            q_lim, t2_lim, local_lim, shift_lim, info = _heldout_limits(q, t2, local, alpha,
                                                                        d2)
        else:
            m = 3 + (d2 is not None)
            q_lim, t2_lim, local_lim = _limits_from(q, t2, local, alpha * 3 / m)
            shift_lim = t2_limit_new(2, n, alpha / m) if align else float("inf")
            info = {"limit_scale": None, "level": "parametric"}
        details.update(info, folds=int(min(folds, n)))
        ref = {"q": q, "t2": t2, "local": local}
        if align:
            ref["shift_d2"] = d2
        return Calibration(rank, alpha, q_lim, t2_lim, local_lim, mean, var, limits,
                           sigma, ref, details, template, shift_mean, shift_cov, shift_lim,
                           fold_lam)
    from .quality import data_spectrum

    rank = int(min(rank, n - 1))
    spectrum, _ = data_spectrum(pixels, max_rows=max(n, 2))
    lam = np.asarray(spectrum, dtype=np.float64) ** 2 / (n - 1)
    q_limit, method = jackson_mudholkar_limit(lam[rank:], alpha / 2)
    details.update(q_method=method, warning="textbook limits from training eigenvalues: "
                   "with far more pixels than images they flag too many good frames")
    return Calibration(rank, alpha, q_limit, t2_limit_new(rank, n, alpha / 2), float("inf"),
                       None, None, "analytic", sigma, {}, details)
def _rank_and_rule(pixels, rank, seed):
    """The given rank, or :func:`choose_screening_rank`'s; and which it was."""
    if rank is not None:
        return rank, "given"
    return choose_screening_rank(pixels, seed=seed)[0], "gavish-donoho"


def choose_screening_rank(reference, *, max_rank=50, seed=0):
    """Rank for screening when none is given: the Gavish-Donoho noise floor.

    Components above the optimal hard threshold of Gavish & Donoho (IEEE Trans. Inf.
    Theory 60(8), 2014; noise level unknown) carry the set's structured variation; those
    below mostly fit noise, and keeping them only adds noise to T^2. The rank is capped at
    `max_rank` and at a quarter of the reference images (T^2 needs many more images
    than components to be stable), and is at least 1.

    Returns
    -------
    rank : int
    singular_values : ndarray
        The spectrum the rule read.
    """
    from .quality import data_spectrum, gavish_donoho_rank

    pixels = reference.pixels if hasattr(reference, "pixels") else np.asarray(reference)
    s, shape = data_spectrum(pixels, seed=seed)
    rank, _, _ = gavish_donoho_rank(s, shape)
    return int(max(1, min(rank, max_rank, len(pixels) // 4))), s


# -- localisation ------------------------------------------------------------------------
def _map_shape(image_shape):
    shape = tuple(image_shape)
    return shape[:2] if len(shape) >= 2 else (1, shape[0])


def residual_map(residual, image_shape, *, moments=None, sigma=1.5):
    """Map of where one image's residual is unusual, shape (h, w).

    The squared residual, summed over colour channels and smoothed with a Gaussian of
    `sigma` pixels (isolated noisy pixels fade, a defect's region stands out). With
    `moments` (per-pixel mean and variance of good images' smoothed energy, from a
    :class:`Calibration`), each pixel's energy becomes a normal score: how many standard
    deviations above good images at that very spot (Wilson-Hilferty transform of Box's
    scaled chi-square), so that edges that always move and textured backgrounds weigh
    no more than flat areas.

    Examples
    --------
    >>> r = np.zeros(64, np.float32); r[27] = 1.0
    >>> m = residual_map(r, (8, 8), sigma=0)
    >>> m.shape, [int(i) for i in np.unravel_index(int(m.argmax()), m.shape)]
    ((8, 8), [3, 3])
    """
    r = np.array(residual, dtype=np.float32).reshape(1, -1)
    e = _energy(r, image_shape, sigma)
    if moments is not None:
        e = _zscore(e, *moments)
    return e[0].reshape(_map_shape(image_shape))


def locate_defect(energy, *, fraction=0.25, background=None):
    """Peak ``[row, col]`` and box ``[row0, col0, row1, col1]`` (end exclusive).

    The box is the bounding box of the connected region around the peak where the map
    exceeds the larger of `fraction` of the peak and a robust background level (median
    + 6 scaled MADs of the map, or `background`).

    Examples
    --------
    >>> e = np.zeros((10, 12)); e[2:5, 6:9] = 4.0; e[3, 7] = 9.0
    >>> locate_defect(e)
    ([3, 7], [2, 6, 5, 9])
    """
    from scipy.ndimage import label

    energy = np.asarray(energy)
    peak = np.unravel_index(int(np.argmax(energy)), energy.shape)
    med = float(np.median(energy))
    mad = 1.482602218505602 * float(np.median(np.abs(energy - med)))
    floor = med + 6 * mad if background is None else float(background)
    level = max(fraction * float(energy[peak]), floor)
    if not energy[peak] >= level:
        level = float(energy[peak])
    regions, _ = label(energy >= level)
    rows, cols = np.nonzero(regions == regions[peak])
    box = [int(rows.min()), int(cols.min()), int(rows.max()) + 1, int(cols.max()) + 1]
    return [int(peak[0]), int(peak[1])], box


# -- screening ---------------------------------------------------------------------------
class Screener:
    """Scores images chunk by chunk against a basis and a calibration (bounded memory).

    Parameters
    ----------
    basis : EigenBasis
        Must not have seen the images to be screened.
    calibration : Calibration

    Examples
    --------
    >>> from imgreduce import fit_basis
    >>> rng = np.random.default_rng(1)
    >>> good = rng.normal(size=(80, 64)).astype(np.float32)
    >>> cal = calibrate(good, rank=3, image_shape=(8, 8))
    >>> basis = fit_basis(good, rank=3); basis.image_shape = (8, 8)
    >>> bad = rng.normal(size=(1, 64)).astype(np.float32); bad[0, 27] += 12
    >>> chunk = Screener(basis, cal).screen(bad)
    >>> "local" in chunk["reasons"][0], chunk["peak"][0]
    (True, [3, 3])
    """

    def __init__(self, basis, calibration):
        if calibration.rank > basis.rank:
            raise ParameterError(f"the calibration keeps {calibration.rank} components but "
                                 f"the basis holds {basis.rank}")
        mean = calibration.energy_mean
        if mean is not None and len(mean) != int(np.prod(_map_shape(basis.image_shape))):
            raise ParameterError("the calibration's energy maps do not match the basis's "
                                 "image size (calibrate again on images like the basis's)")
        lam = calibration.t2_eigenvalues
        if lam is not None and len(lam) < calibration.rank:
            raise ParameterError("the calibration's T^2 eigenvalues do not match its rank "
                                 "(calibrate again)")
        self.basis, self.calibration = basis, calibration
        self.map_shape = _map_shape(basis.image_shape)

    def judge(self, q, t2, local, shift_d2=None):
        """Reasons an image is flagged: a subset of ``['Q', 'T2', 'local', 'shift']``."""
        c = self.calibration
        reasons = []
        if q > c.q_limit:
            reasons.append("Q")
        if t2 > c.t2_limit:
            reasons.append("T2")
        if np.isfinite(c.local_limit) and local > c.local_limit:
            reasons.append("local")
        if shift_d2 is not None and c.align and shift_d2 > c.shift_limit:
            reasons.append("shift")
        return reasons

    def screen(self, pixels, *, maps=True):
        """Statistics, flags and localisation of a chunk of rows.

        With an aligning calibration each frame is first moved onto the template; its
        shift is screened too, and peak, box and map are given back in the frame's own
        coordinates.

        Returns
        -------
        dict
            ``q``, ``t2``, ``local`` (arrays; local NaN without energy moments),
            ``shift`` ((m, 2) array of ``(dy, dx)``, or None) and ``shift_d2``,
            ``reasons``, ``peak``, ``box`` (lists; peak and box None for images not
            flagged) and ``maps`` (index in the chunk -> map of each flagged image, when
            `maps`: normal scores, or smoothed energy without moments).
        """
        pixels = self.basis._pixels(pixels)
        c = self.calibration
        out = {"q": [], "t2": [], "local": [], "shift": [], "shift_d2": [], "reasons": [],
               "peak": [], "box": [], "maps": {}}
        for start in range(0, len(pixels), _MAP_ROWS):
            rows, shifts = c.prepare(pixels[start:start + _MAP_ROWS], self.basis.image_shape)
            d2 = c.shift_distance(shifts) if shifts is not None else None
            q, t2, e, z = _chunk_stats(self.basis, c.rank, rows, sigma=c.sigma,
                                       moments=c.moments, eigenvalues=c.t2_eigenvalues)
            local = z.max(axis=1).astype(np.float64) if z is not None else np.full(len(q),
                                                                                   np.nan)
            shown, fraction = (z, 0.5) if z is not None else (e, 0.25)
            for i in range(len(q)):
                why = self.judge(q[i], t2[i], local[i], None if d2 is None else d2[i])
                peak = box = None
                if why:
                    m = shown[i].reshape(self.map_shape)
                    if shifts is not None:
                        m = _unshift_map(m, shifts[i])
                    peak, box = locate_defect(m, fraction=fraction)
                    if maps:
                        out["maps"][start + i] = m.copy()
                out["reasons"].append(why)
                out["peak"].append(peak)
                out["box"].append(box)
            out["q"].append(q)
            out["t2"].append(t2)
            out["local"].append(local)
            if shifts is not None:
                out["shift"].append(shifts)
                out["shift_d2"].append(d2)
        for key in ("q", "t2", "local"):
            out[key] = np.concatenate(out[key]) if out[key] else np.empty(0)
        for key in ("shift", "shift_d2"):
            out[key] = np.concatenate(out[key]) if out[key] else None
        return out


def _unshift_map(score_map, shift):
    """A map computed on an aligned frame, moved back onto the frame as acquired."""
    from scipy import ndimage

    return ndimage.shift(score_map, (-shift[0], -shift[1]), order=1, mode="nearest")


@dataclass(eq=False)
class ScreenResult:
    """Per-image statistics, flags and localisation, with the limits used.

    Attributes
    ----------
    paths : list of str
    q, t2, local : ndarray, shape (m,)
        ``local`` is NaN where the local statistic is not in use.
    reasons : list of list of str
        Statistics over their limit: ``'Q'``, ``'T2'``, ``'local'``.
    peak, box : list
        Per image ``[row, col]`` / ``[row0, col0, row1, col1]`` (end exclusive), None when
        not flagged.
    calibration : Calibration
    mode : str
        ``'reference'`` (limits from known-good images), ``'basis'`` (limits stored in the
        basis), ``'batch'`` (a given basis, limits from the batch itself, trimmed) or
        ``'self'`` (basis and limits from the batch itself, trimmed).
    maps : dict
        Index -> residual map (normal scores), for flagged images.
    shift, shift_d2 : ndarray or None
        With alignment: each frame's ``(dy, dx)`` onto the template, in pixels, and its
        squared Mahalanobis distance from the reference frames' shifts.
    """

    paths: list
    q: np.ndarray
    t2: np.ndarray
    local: np.ndarray
    reasons: list
    peak: list
    box: list
    calibration: Calibration
    mode: str
    maps: dict = field(default_factory=dict)
    shift: object = None
    shift_d2: object = None

    @property
    def flagged(self):
        """Boolean array: any statistic over its limit."""
        return np.array([bool(r) for r in self.reasons], dtype=bool)

    def rows(self):
        """One dict per image: path, q, q_limit, t2, t2_limit, local, local_limit, flagged,
        reasons, peak, box, shift, shift_d2, shift_limit."""
        limits = self.calibration.limits()
        out = []
        for i, p in enumerate(self.paths):
            local = float(self.local[i]) if np.isfinite(self.local[i]) else None
            out.append({"path": p, "q": float(self.q[i]), "q_limit": limits["q_limit"],
                        "t2": float(self.t2[i]), "t2_limit": limits["t2_limit"],
                        "local": local, "local_limit": limits["local_limit"],
                        "flagged": bool(self.reasons[i]), "reasons": list(self.reasons[i]),
                        "peak": self.peak[i], "box": self.box[i],
                        "shift": (None if self.shift is None
                                  else [round(float(v), 3) for v in self.shift[i]]),
                        "shift_d2": (None if self.shift_d2 is None
                                     else float(self.shift_d2[i])),
                        "shift_limit": limits["shift_limit"]})
        return out


def _result(paths, chunk, calibration, mode):
    return ScreenResult(list(paths), chunk["q"], chunk["t2"], chunk["local"],
                        chunk["reasons"], chunk["peak"], chunk["box"], calibration, mode,
                        chunk["maps"], chunk.get("shift"), chunk.get("shift_d2"))


def _trim(q, t2, local, *, keep, alpha, rounds, cap):
    """Iteratively set aside the images over a limit fitted to the kept ones."""
    for _ in range(rounds):
        q_lim, t2_lim, local_lim = _limits_from(q[keep], t2[keep],
                                                None if local is None else local[keep],
                                                alpha)
        excess = np.maximum(q / q_lim, t2 / t2_lim)
        if local is not None and np.isfinite(local_lim):
            excess = np.maximum(excess, local / local_lim)
        over = np.flatnonzero(excess > 1)
        over = over[np.argsort(-excess[over])][:cap]
        new_keep = np.ones(len(q), bool)
        new_keep[over] = False
        if np.array_equal(new_keep, keep):
            break
        keep = new_keep
    return keep


def calibrate_on_batch(basis, images, *, rank=None, alpha=0.01, sigma=1.5, max_trim=0.2):
    """Limits from a mostly-good batch scored by a basis that never saw it.

    The batch's own Q and T^2 set Box limits; the images over a limit are set aside (at
    most `max_trim` of the batch, worst first); the kept images give the energy moments
    of the local statistic; then the images over any of the three limits are set aside
    once more and the final limits fitted to the rest (three rounds each). Use it when no
    known-good reference set is at hand. Trimming cuts into the good images' own tail:
    the false-alarm rate sits above alpha (measured 4-6.5% at alpha 0.01).

    Parameters
    ----------
    basis : EigenBasis
    images : ImageStack or ndarray, shape (m, p)
    rank : int, optional
        Default ``min(basis.rank, 50)``.
    alpha, sigma, max_trim
        As in :func:`screen_batch`.

    Returns
    -------
    Calibration
        ``method == 'batch'``.
    """
    alpha = _check_alpha(alpha)
    pixels = images.pixels if hasattr(images, "pixels") else basis._pixels(images)
    n = len(pixels)
    if n < 20:
        raise ParameterError(f"calibrating limits on the batch itself needs at least 20 "
                             f"images, got {n}; give known-good images with --reference")
    rank = _check_rank(basis, min(basis.rank, 50) if rank is None else rank)
    q, t2 = np.empty(n), np.empty(n)
    energy = np.empty((n, int(np.prod(_map_shape(basis.image_shape)))), np.float32)
    for start in range(0, n, _CHUNK_ROWS):
        stop = start + _CHUNK_ROWS
        q[start:stop], t2[start:stop], energy[start:stop], _ = _chunk_stats(
            basis, rank, pixels[start:stop], sigma=sigma)
    cap = max(1, int(max_trim * n))
    # Three rounds of setting aside: fewer leave strong defects inflating the limits;
    # many more cut into the good images' own tail and tighten the limits step by step.
    keep = _trim(q, t2, None, keep=np.ones(n, bool), alpha=alpha, rounds=3, cap=cap)
    local, _ = _local_from_energy(energy, keep=keep)
    keep = _trim(q, t2, local, keep=np.ones(n, bool), alpha=alpha, rounds=3, cap=cap)
    local, (mean, var) = _local_from_energy(energy, keep=keep)
    q_lim, t2_lim, local_lim = _limits_from(q[keep], t2[keep], local[keep], alpha)
    return Calibration(rank, alpha, q_lim, t2_lim, local_lim, mean, var, "batch", sigma,
                       {"q": q[keep], "t2": t2[keep], "local": local[keep]},
                       {"batch_images": n, "kept": int(keep.sum())})


def screen_images(basis, stack, calibration=None, *, alpha=0.01, maps=True):
    """Score images against a basis and control limits, and locate what is flagged.

    Parameters
    ----------
    basis : EigenBasis
        Must not have seen these images (its training residuals are shrunk).
    stack : ImageStack or ndarray
        Images to screen (an ImageStack also gives paths and is checked against the basis).
    calibration : Calibration, optional
        From :func:`calibrate` on known-good images. Default: the calibration stored in
        the basis, else limits from the batch itself (:func:`calibrate_on_batch`).
    alpha : float
        Used only when the limits come from the batch.
    maps : bool
        Keep the residual maps of flagged images in the result.

    Returns
    -------
    ScreenResult

    Examples
    --------
    >>> from imgreduce import fit_basis
    >>> rng = np.random.default_rng(2)
    >>> good = rng.normal(size=(100, 256)).astype(np.float32)
    >>> cal = calibrate(good, rank=3, image_shape=(16, 16))
    >>> basis = fit_basis(good, rank=3); basis.image_shape = (16, 16)
    >>> batch = rng.normal(size=(20, 256)).astype(np.float32)
    >>> batch[5, 16 * 9 + 6] += 15  # a spike at row 9, column 6 of image 5
    >>> result = screen_images(basis, batch, cal)
    >>> bool(result.flagged[5]), result.peak[5]
    (True, [9, 6])
    """
    if hasattr(stack, "pixels"):
        basis.check_compatible(stack)
        pixels, paths = stack.pixels, list(stack.paths)
    else:
        pixels = basis._pixels(stack)
        paths = [str(i) for i in range(len(pixels))]
    mode = "reference"
    if calibration is None:
        calibration = Calibration.from_basis(basis)
        mode = "basis"
    if calibration is None:
        calibration = calibrate_on_batch(basis, pixels, alpha=alpha)
        mode = "batch"
    chunk = Screener(basis, calibration).screen(pixels, maps=maps)
    return _result(paths, chunk, calibration, mode)


def screen_batch(stack, *, rank=None, alpha=0.01, folds=5, seed=0, rounds=3,
                 max_trim=0.2, sigma=1.5, maps=True):
    """Screen a mostly-good batch against itself, robustly (no reference set).

    Each round scores every kept image by k-fold (a basis that never saw it) and every
    set-aside image by the basis of all kept images, sets limits from the kept images'
    held-out values, and sets aside the images over a limit (at most `max_trim` of the
    batch, worst first). After `rounds` rounds, or when nothing changes, every image
    carries its held-out (kept) or out-of-sample (set aside) statistics. A batch with up
    to about 10% defective frames is screened much as if a clean reference existed; with
    more, defects shape the basis and hide each other.

    Returns
    -------
    basis : EigenBasis
        Fitted on the kept images, with the final calibration attached.
    result : ScreenResult
        ``mode == 'self'``.
    """
    from .basis import fit_basis

    alpha = _check_alpha(alpha)
    pixels, image_shape = _as_pixels(stack, None)
    n = len(pixels)
    if n < 20:
        raise ParameterError(f"screening a batch against itself needs at least 20 images, "
                             f"got {n}; give known-good images with --reference")
    rank, rule = _rank_and_rule(pixels, rank, seed)
    keep = np.ones(n, bool)
    cap = max(1, int(max_trim * n))
    q, t2 = np.empty(n), np.empty(n)
    energy = np.empty((n, int(np.prod(_map_shape(image_shape)))), np.float32)
    for round_ in range(rounds + 1):
        kept, out = np.flatnonzero(keep), np.flatnonzero(~keep)
        q[kept], t2[kept], energy[kept], r, fold_lam = _heldout(
            pixels[kept], image_shape, rank, folds, seed, sigma)
        basis = fit_basis(pixels[kept], rank=r, seed=seed)
        basis.image_shape = tuple(image_shape)
        for start in range(0, len(out), _CHUNK_ROWS):
            rows = out[start:start + _CHUNK_ROWS]
            q[rows], t2[rows], energy[rows], _ = _chunk_stats(basis, r, pixels[rows],
                                                              sigma=sigma,
                                                              eigenvalues=fold_lam)
        local, (mean, var) = _local_from_energy(energy, keep=keep)
        if round_ == rounds:
            break
        new_keep = _trim(q, t2, local, keep=keep, alpha=alpha, rounds=1, cap=cap)
        if np.array_equal(new_keep, keep):
            break
        keep = new_keep
    q_lim, t2_lim, local_lim = _limits_from(q[keep], t2[keep], local[keep], alpha)
    calibration = Calibration(r, alpha, q_lim, t2_lim, local_lim, mean, var, "batch", sigma,
                              {"q": q[keep], "t2": t2[keep], "local": local[keep]},
                              {"batch_images": n, "kept": int(keep.sum()), "folds": folds,
                               "rank_rule": rule}, t2_eigenvalues=fold_lam)
    if hasattr(stack, "policy"):
        basis.metadata.update(stack.policy())
    calibration.attach(basis)
    screener = Screener(basis, calibration)
    chunk = {"q": q, "t2": t2, "local": local, "reasons": [], "peak": [], "box": [],
             "maps": {}}
    for i in range(n):
        why = screener.judge(q[i], t2[i], local[i])
        peak = box = None
        if why:
            _, _, _, z = _chunk_stats(basis, r, pixels[i:i + 1], sigma=sigma,
                                      moments=calibration.moments)
            m = z[0].reshape(screener.map_shape)
            peak, box = locate_defect(m, fraction=0.5)
            if maps:
                chunk["maps"][i] = m
        chunk["reasons"].append(why)
        chunk["peak"].append(peak)
        chunk["box"].append(box)
    paths = stack.paths if hasattr(stack, "paths") else [str(i) for i in range(n)]
    return basis, _result(paths, chunk, calibration, "self")
