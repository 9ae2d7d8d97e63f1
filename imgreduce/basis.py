"""The eigen-image basis: fit, encode, decode, residuals, save and load.

A basis is the mean image of a training set and the first k right singular vectors of the
centred training matrix (the *components*, one eigen-image per row, orthonormal), with their
singular values. Everything downstream — reconstruction, rank choice, screening, packing —
works from this one object.

Sign convention: each component is flipped so that its entry of largest absolute value is
positive. Singular vectors are only defined up to sign; this makes repeated fits (and fits
by other libraries, after the same flip) comparable.
"""

import hashlib
import json
import time
import zipfile
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from . import __version__
from ._files import atomic_path
from ._progress import progress_bar
from .errors import BasisFileError, ModelMismatchError, ParameterError
from .svd import (check_matrix, check_rank, column_mean_and_total, exact_svd,
                  randomized_svd)

__all__ = ["EigenBasis", "fit_basis", "FORMAT_NAME", "FORMAT_VERSION"]

FORMAT_NAME = "imgreduce-basis"
FORMAT_VERSION = 1
# Rows per chunk when encoding: bounds the temporary centred copy to chunk x p floats.
_CHUNK_ROWS = 512


class EigenBasis:
    """Mean image and orthonormal eigen-images of a training set.

    Parameters
    ----------
    mean : array_like, shape (p,)
        Mean training image, flattened, in the pixel scale [0, 1].
    components : array_like, shape (k, p)
        Orthonormal basis images, most important first.
    singular_values : array_like, shape (k,)
        Singular values of the centred training matrix, descending.
    n_samples : int
        Number of training images.
    total_variance : float
        ``sum ||x_i - mean||^2 / (n - 1)`` over the training images (exact, all ranks).
    image_shape : tuple of int, optional
        ``(h, w)`` or ``(h, w, 3)``; defaults to ``(p,)``.
    metadata : dict, optional
        Colour and size policy, bit depth, fit parameters and provenance.

    Attributes
    ----------
    explained_variance : ndarray, shape (k,)
        ``s**2 / (n - 1)``: variance of the training scores along each component.
    explained_variance_ratio : ndarray, shape (k,)
        Share of the total variance carried by each component.
    rank : int
        Number of components k.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> x = rng.random((20, 12), dtype=np.float32)
    >>> basis = fit_basis(x, rank=3)
    >>> basis.rank, basis.components.shape
    (3, (3, 12))
    >>> coef = basis.encode(x)
    >>> rec = basis.decode(coef)
    >>> bool(np.allclose(basis.residuals(x), x - rec, atol=1e-6))
    True
    """

    def __init__(self, mean, components, singular_values, *, n_samples, total_variance,
                 image_shape=None, metadata=None, extra=None):
        self.mean = np.ascontiguousarray(mean, dtype=np.float32)
        self.components = np.ascontiguousarray(components, dtype=np.float32)
        self.singular_values = np.asarray(singular_values, dtype=np.float64)
        self.n_samples = int(n_samples)
        self.total_variance = float(total_variance)
        p = self.mean.shape[0]
        self.image_shape = tuple(int(d) for d in (image_shape or (p,)))
        self.metadata = dict(metadata or {})
        # Optional named arrays saved with the basis (e.g. a screening calibration).
        self.extra = {str(k): np.asarray(v) for k, v in (extra or {}).items()}
        if self.components.ndim != 2 or self.components.shape[1] != p:
            raise ValueError(f"components must have shape (k, {p}), got {self.components.shape}")
        if len(self.singular_values) != len(self.components):
            raise ValueError("one singular value per component is needed")
        if int(np.prod(self.image_shape)) != p:
            raise ValueError(f"image_shape {self.image_shape} does not hold {p} pixels")

    @property
    def rank(self):
        return len(self.components)

    @property
    def n_pixels(self):
        return self.mean.shape[0]

    @property
    def explained_variance(self):
        return self.singular_values ** 2 / max(self.n_samples - 1, 1)

    @property
    def explained_variance_ratio(self):
        if self.total_variance <= 0:
            return np.zeros(self.rank)
        return self.explained_variance / self.total_variance

    def __repr__(self):
        shape = "x".join(str(d) for d in self.image_shape)
        return (f"EigenBasis(rank={self.rank}, image_shape={shape}, "
                f"n_samples={self.n_samples})")

    # -- projections -----------------------------------------------------------------
    def _rank(self, rank):
        if rank is None:
            return self.rank
        if isinstance(rank, bool) or not isinstance(rank, (int, np.integer)) or rank < 0:
            raise ParameterError(f"rank must be a whole number >= 0, got {rank!r}")
        if rank > self.rank:
            raise ParameterError(f"rank {rank} is larger than the basis holds ({self.rank} "
                                 f"components); fit a basis with --rank {rank} or more")
        return int(rank)

    def _pixels(self, pixels):
        pixels = np.asarray(pixels) if not isinstance(pixels, np.ndarray) else pixels
        if pixels.ndim == 1:
            pixels = pixels[None, :]
        if pixels.ndim != 2 or pixels.shape[1] != self.n_pixels:
            raise ModelMismatchError(
                f"images have {pixels.shape[-1]} values each; the basis expects "
                f"{self.n_pixels} ({'x'.join(map(str, self.image_shape))})")
        return pixels

    def encode(self, pixels, *, rank=None):
        """Coefficients of `pixels` on the first `rank` components.

        Parameters
        ----------
        pixels : ndarray, shape (m, p) or (p,)
            Images as rows (an :class:`~imgreduce.ingest.ImageStack`'s ``pixels``).
        rank : int, optional
            Number of components (default: all).

        Returns
        -------
        ndarray, shape (m, rank), float32
        """
        pixels = self._pixels(pixels)
        r = self._rank(rank)
        comps_t = self.components[:r].T
        out = np.empty((len(pixels), r), dtype=np.float32)
        # Centre chunk by chunk: exact (no cancellation against the mean) at bounded memory.
        for start in range(0, len(pixels), _CHUNK_ROWS):
            chunk = np.subtract(pixels[start:start + _CHUNK_ROWS], self.mean,
                                dtype=np.float32)
            out[start:start + len(chunk)] = chunk @ comps_t
        return out

    def decode(self, coefficients, *, rank=None):
        """Images rebuilt from coefficients (unclipped; may leave [0, 1]).

        Parameters
        ----------
        coefficients : ndarray, shape (m, r)
        rank : int, optional
            Use only the first `rank` coefficients (default: all given).

        Returns
        -------
        ndarray, shape (m, p), float32
        """
        coefficients = np.atleast_2d(np.asarray(coefficients, dtype=np.float32))
        r = coefficients.shape[1] if rank is None else self._rank(rank)
        if r > coefficients.shape[1]:
            raise ParameterError(f"rank {r} needs {r} coefficients per image, got "
                                 f"{coefficients.shape[1]}")
        self._rank(r)
        out = coefficients[:, :r] @ self.components[:r]
        out += self.mean
        return out

    def residuals(self, pixels, *, rank=None):
        """``pixels - decode(encode(pixels))`` at `rank`, shape (m, p), float32."""
        pixels = self._pixels(pixels)
        r = self._rank(rank)
        out = np.empty(pixels.shape, dtype=np.float32)
        comps = self.components[:r]
        for start in range(0, len(pixels), _CHUNK_ROWS):
            chunk = np.subtract(pixels[start:start + _CHUNK_ROWS], self.mean,
                                dtype=np.float32)
            chunk -= (chunk @ comps.T) @ comps
            out[start:start + len(chunk)] = chunk
        return out

    # -- compatibility ---------------------------------------------------------------
    def describe(self):
        """One-phrase description of the images this basis expects, for messages."""
        return _describe(self.image_shape, self.metadata.get("color"),
                         self.metadata.get("bit_depth"))

    def check_compatible(self, stack, *, what="images"):
        """Raise ModelMismatchError unless `stack` matches the training images.

        Parameters
        ----------
        stack : ImageStack or dict
            Images (or their ``policy()``) to compare: shape, colour and bit depth.
        what : str
            How to name the images in the message (a folder, say).
        """
        policy = stack.policy() if hasattr(stack, "policy") else dict(stack)
        theirs = (tuple(policy.get("image_shape", ())), policy.get("color"),
                  policy.get("bit_depth"))
        mine = (self.image_shape, self.metadata.get("color"), self.metadata.get("bit_depth"))
        problems = []
        if theirs[0][:2] != mine[0][:2]:
            problems.append("size")
        if (mine[1] is not None and theirs[1] != mine[1]) or len(theirs[0]) != len(mine[0]):
            problems.append("colour")
        if mine[2] is not None and theirs[2] != mine[2]:
            problems.append("bit depth")
        if problems:
            fixes = []
            if "size" in problems and len(mine[0]) >= 2:
                fixes.append(f"--size {mine[0][1]}x{mine[0][0]}")
            if "colour" in problems and mine[1]:
                fixes.append(f"--color {mine[1]}")
            fix = (" (read them with " + " ".join(fixes) + ", or fit a new basis)"
                   if fixes else " (fit a new basis on images like these)")
            raise ModelMismatchError(
                f"{what} are {_describe(*theirs)}, but the basis was fitted on "
                f"{_describe(*mine)}: {' and '.join(problems)} "
                f"{'differ' if len(problems) > 1 else 'differs'}{fix}")

    # -- files -----------------------------------------------------------------------
    def save(self, path):
        """Write the basis to an ``.npz`` file atomically.

        The file holds arrays ``mean`` (p,), ``components`` (k, p), ``singular_values``
        (k,) and ``metadata``, a JSON string (format name and version, image shape, colour
        and size policy, bit depth, fit parameters, counts, total variance and SHA-256
        checksums of the arrays). See ``docs/basis-format.md``.
        """
        path = Path(path)
        arrays = {"mean": self.mean, "components": self.components,
                  "singular_values": self.singular_values}
        for key, value in self.extra.items():
            if key in arrays or key == "metadata":
                raise ValueError(f"extra array name {key!r} is reserved")
            arrays[key] = value
        meta = dict(self.metadata)
        meta.update(format=FORMAT_NAME, format_version=FORMAT_VERSION,
                    image_shape=list(self.image_shape), n_samples=self.n_samples,
                    rank=self.rank, total_variance=self.total_variance,
                    checksums={k: _sha256(v) for k, v in arrays.items()})
        meta.setdefault("tool_version", __version__)
        with atomic_path(path) as tmp, open(tmp, "wb") as fh:
            np.savez(fh, metadata=np.array(json.dumps(meta, sort_keys=True)), **arrays)

    @classmethod
    def load(cls, path):
        """Read a basis written by :meth:`save` (never unpickles anything).

        Raises
        ------
        BasisFileError
            When the file is missing, not an ``.npz`` archive, not a basis, truncated,
            corrupted (checksum mismatch) or of a newer format version.
        """
        path = Path(path)
        name = str(path)
        if not path.exists():
            raise BasisFileError(f"{name}: no such file (give the basis written by "
                                 "'imgreduce fit ... -o BASIS.npz')")
        if path.is_dir():
            raise BasisFileError(f"{name} is a folder; give the basis .npz file")
        try:
            # Open the file ourselves: np.load leaks its handle when the zip is truncated.
            with open(path, "rb") as fh, np.load(fh, allow_pickle=False) as data:
                if "metadata" not in data.files:
                    raise BasisFileError(f"{name} is an .npz archive but not an imgreduce "
                                         "basis (it has no 'metadata' entry)")
                meta = json.loads(str(data["metadata"]))
                if meta.get("format") != FORMAT_NAME:
                    kind = meta.get("format", "unknown")
                    raise BasisFileError(f"{name} is not an imgreduce basis (it is a "
                                         f"'{kind}' file)")
                if int(meta.get("format_version", 0)) > FORMAT_VERSION:
                    raise BasisFileError(
                        f"{name} has basis format version {meta['format_version']}; this "
                        f"imgreduce ({__version__}) reads up to {FORMAT_VERSION} (upgrade "
                        "imgreduce)")
                arrays = {k: data[k] for k in ("mean", "components", "singular_values")}
                extra = {k: data[k] for k in data.files
                         if k not in arrays and k != "metadata"}
        except BasisFileError:
            raise
        except KeyError as exc:
            raise BasisFileError(f"{name} is not a complete imgreduce basis (missing "
                                 f"{exc})") from None
        except (zipfile.BadZipFile, EOFError, OSError, ValueError, json.JSONDecodeError) as exc:
            raise BasisFileError(f"{name} is not a readable imgreduce basis file "
                                 f"(truncated or not an .npz archive: {exc})") from None
        for key, expected in meta.get("checksums", {}).items():
            value = arrays.get(key, extra.get(key))
            if value is not None and _sha256(value) != expected:
                raise BasisFileError(f"{name} is corrupted: the checksum of '{key}' does not "
                                     "match (restore it from a copy or fit again)")
        fields = ("image_shape", "n_samples", "total_variance")
        missing = [f for f in fields if f not in meta]
        if missing:
            raise BasisFileError(f"{name} lacks metadata fields {missing}")
        meta_rest = {k: v for k, v in meta.items() if k not in fields}
        try:
            return cls(arrays["mean"], arrays["components"], arrays["singular_values"],
                       n_samples=meta["n_samples"], total_variance=meta["total_variance"],
                       image_shape=meta["image_shape"], metadata=meta_rest, extra=extra)
        except ValueError as exc:
            raise BasisFileError(f"{name} is inconsistent: {exc}") from None


def _sha256(array):
    return hashlib.sha256(np.ascontiguousarray(array).tobytes()).hexdigest()


def _describe(image_shape, color, bit_depth):
    shape = tuple(image_shape or ())
    if len(shape) >= 2:
        text = f"{shape[1]}x{shape[0]}"
    else:
        text = f"{shape[0] if shape else '?'}-value"
    if color:
        text += f" {color}"
    if bit_depth:
        text += f" {bit_depth}-bit"
    return text + " images"


def fit_basis(data, *, rank=None, seed=0, exact=None, oversample=10, power_iterations=2,
              progress=False):
    """Fit an eigen-image basis by randomized (or exact) SVD of the centred images.

    Parameters
    ----------
    data : ImageStack or ndarray, shape (n, p)
        Training images, one per row, float32 in [0, 1]. Never copied or centred in place.
    rank : int, optional
        Number of components; default ``min(n - 1, 100)``. At most ``n - 1``.
    seed : int
        Seed of the random test matrix: the same seed gives the same basis.
    exact : bool, optional
        ``True`` forces the exact float64 path, ``False`` the randomized one; by default
        the exact path is taken when the sketch would be at least a quarter as wide as
        the smaller side of the matrix (randomization then saves nothing).
    oversample : int
        Extra sketch columns (Halko, Martinsson & Tropp 2011).
    power_iterations : int
        Subspace iterations, each followed by re-orthonormalization; each costs two
        passes over the data. With the default 2 the reconstruction error stayed within
        0.15% of the optimum where the signal meets the noise floor just past `rank`
        (``benchmarks/fit_vs_reference.py``). Spectra with no gap at all and a flat
        noise floor need more: 4 brought such a case from 0.5% to 0.12%.
    progress : bool or object
        Progress bar on stderr (see :mod:`imgreduce._progress`).

    Returns
    -------
    EigenBasis

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> x = (0.5 + 0.1 * rng.standard_normal((30, 64))).astype(np.float32)
    >>> b = fit_basis(x, rank=5, seed=0)
    >>> b.rank, round(float(b.explained_variance_ratio.sum()), 2) < 1
    (5, True)
    """
    started = time.perf_counter()
    metadata = {}
    image_shape = None
    if hasattr(data, "pixels"):
        x = data.pixels
        image_shape = tuple(data.image_shape)
        metadata.update(data.policy())
        metadata["source_count"] = len(data.paths)
        metadata["source_digest"] = hashlib.sha256(
            "\n".join(str(p) for p in data.paths).encode()).hexdigest()
    else:
        x = data
        if not isinstance(x, np.ndarray):
            x = np.asarray(x)
        if x.dtype != np.float32 and not np.issubdtype(x.dtype, np.floating):
            x = x.astype(np.float32)
    check_matrix(x)
    n, p = x.shape
    rank = min(n - 1, p, 100) if rank is None else check_rank(rank, n, p)
    for name, value, low in (("oversample", oversample, 0),
                             ("power_iterations", power_iterations, 0)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
            raise ParameterError(f"{name} must be a whole number >= {low}, got {value!r}")
    width = min(rank + oversample, n, p)
    if exact is None:
        exact = 4 * width >= min(n, p)
    passes = 2 + (1 if exact else 2 * power_iterations + 2)
    bar = progress_bar(progress, total=passes, desc="fit", unit="pass")
    try:
        stats = _PassCounter(bar, n)
        mean, total = column_mean_and_total(x, progress=stats)
        if total <= 0:
            raise ParameterError("all training images are identical: there is no variation "
                                 "to model (check the input folder)")
        if exact:
            res = exact_svd(x, rank, mean=mean, total=total, progress=bar)
        else:
            res = randomized_svd(x, rank, oversample=oversample,
                                 power_iterations=power_iterations, seed=seed, mean=mean,
                                 total=total, progress=bar)
    finally:
        bar.close()
    metadata.update(
        method=res.method, seed=int(seed), oversample=int(oversample),
        power_iterations=int(power_iterations), rank_requested=int(rank),
        created=datetime.now(timezone.utc).isoformat(timespec="seconds"),
        fit_seconds=round(time.perf_counter() - started, 3),
        tool_version=__version__)
    return EigenBasis(res.mean, res.components, res.singular_values, n_samples=n,
                      total_variance=total / (n - 1), image_shape=image_shape,
                      metadata=metadata)


class _PassCounter:
    """Turns row counts of the two statistics passes into two whole-pass ticks."""

    def __init__(self, bar, n):
        self.bar, self.n, self.rows = bar, n, 0

    def update(self, rows):
        before = self.rows // self.n
        self.rows += rows
        if self.rows // self.n > before:
            self.bar.update(self.rows // self.n - before)
