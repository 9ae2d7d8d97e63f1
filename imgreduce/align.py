"""Sub-pixel translation of frames onto a template, for fixed setups whose parts move.

On an inspection line a part lands a little differently under the camera each time.
PCA cannot represent a translation compactly: a part placed a pixel off leaves residual
all along its edges, as large as a faint scratch. Aligning every frame to a template
first removes that nuisance; how far each frame had to move is then a measurement of
its own (placement), screened like the other statistics.

Shifts are estimated by cross-correlation with the upsampled-DFT refinement of
Guizar-Sicairos, Thurman & Fienup (Opt. Lett. 33(2), 2008), as implemented by
``skimage.registration.phase_cross_correlation`` (to 1/`upsample` pixel), on the luma of
colour frames, and applied with linear interpolation (``scipy.ndimage.shift``, borders
extended with the nearest pixel). Only translation is corrected: rotation, scale and
perspective changes stay in the images.
"""

import numpy as np

from .errors import ParameterError

__all__ = ["estimate_shifts", "apply_shifts", "align_rows"]

_LUMA = np.array([0.299, 0.587, 0.114], dtype=np.float32)


def _planes(rows, image_shape):
    """Rows as gray planes (luma for colour), shape (m, h, w), float32."""
    images = np.asarray(rows, dtype=np.float32).reshape((len(rows),) + tuple(image_shape))
    if images.ndim == 4:
        images = images @ _LUMA
    return images


def estimate_shifts(rows, image_shape, template, *, upsample=20):
    """Shift ``(dy, dx)`` that moves each row's image onto `template`, in pixels.

    Parameters
    ----------
    rows : ndarray, shape (m, p)
    image_shape : tuple
        ``(h, w)`` or ``(h, w, 3)``.
    template : ndarray, shape (h, w) or (h, w, 3) or (p,)
    upsample : int
        Precision 1/`upsample` pixel.

    Returns
    -------
    ndarray, shape (m, 2), float64

    Examples
    --------
    >>> from scipy import ndimage
    >>> yy, xx = np.mgrid[0:32, 0:32]
    >>> tmpl = np.exp(-((yy - 15.0) ** 2 + (xx - 16.0) ** 2) / 20.0).astype(np.float32)
    >>> moved = ndimage.shift(tmpl, (1.25, -2.5), order=3)
    >>> estimate_shifts(moved.reshape(1, -1), (32, 32), tmpl).round(3)
    array([[-1.25,  2.5 ]])
    """
    from scipy import fft, ndimage
    from skimage.registration import phase_cross_correlation

    if len(image_shape) < 2:
        raise ParameterError("aligning frames needs 2-D images")
    plane_shape = tuple(image_shape)[:2]
    # A Tukey window (flat inside, cosine taper over the outer 12.5% on each side):
    # without one the frame borders, which do not move, dominate the correlation and pull
    # every estimate towards zero (measured: half the true shift on a photograph); a Hann
    # window over the whole frame distorts content near the middle (1.25 px read as 1.05).
    from scipy.signal.windows import tukey

    window = np.outer(tukey(plane_shape[0], 0.25), tukey(plane_shape[1], 0.25))
    window = window.astype(np.float32)
    tmpl = _planes(np.asarray(template).reshape(1, -1), image_shape)[0]
    tmpl_f = fft.fft2((tmpl - tmpl.mean()) * window)
    images = _planes(rows, image_shape)
    out = np.zeros((len(images), 2))
    for i, img in enumerate(images):
        # Two rounds: the second measures what is left after the first shift, so the
        # estimator's shrinkage towards zero (about 10% of the shift) applies only to a
        # small remainder.
        moved = img
        for _ in range(2):
            img_f = fft.fft2((moved - moved.mean()) * window)
            shift, _, _ = phase_cross_correlation(tmpl_f, img_f, upsample_factor=upsample,
                                                  space="fourier", normalization=None)
            out[i] += shift
            if not np.any(shift):
                break
            moved = ndimage.shift(img, out[i], order=3, mode="nearest")
    # Wrap-around: a shift past half the frame is the same correlation peak from the
    # other side.
    size = np.array(plane_shape, dtype=np.float64)
    out = (out + size / 2) % size - size / 2
    return out


def apply_shifts(rows, image_shape, shifts):
    """Rows shifted by `shifts` ``(dy, dx)`` each (linear interpolation), float32.

    Examples
    --------
    >>> img = np.zeros((5, 5), np.float32); img[2, 2] = 1
    >>> out = apply_shifts(img.reshape(1, -1), (5, 5), [[1.0, 0.0]])
    >>> [int(i) for i in np.unravel_index(out[0].argmax(), (5, 5))]
    [3, 2]
    """
    from scipy import ndimage

    shape = tuple(image_shape)
    images = np.asarray(rows, dtype=np.float32).reshape((len(rows),) + shape)
    out = np.empty_like(images)
    for i, (img, s) in enumerate(zip(images, np.asarray(shifts, dtype=np.float64))):
        full = (s[0], s[1]) + (0.0,) * (img.ndim - 2)
        if not np.any(full):
            out[i] = img
        else:
            out[i] = ndimage.shift(img, full, order=1, mode="nearest")
    return out.reshape(len(rows), -1)


def align_rows(rows, image_shape, template=None, *, passes=2, upsample=20):
    """Align rows to `template`, or to their own mean refined over `passes`.

    Without a template, the first pass aligns to the plain mean; each further pass
    aligns the original rows to the mean of the last aligned ones (sharper edges, so
    better shifts).

    Returns
    -------
    aligned : ndarray (m, p) float32
    shifts : ndarray (m, 2)
    template : ndarray (p,) float32
        The template used last.
    """
    rows = np.asarray(rows)
    if template is not None:
        shifts = estimate_shifts(rows, image_shape, template, upsample=upsample)
        return apply_shifts(rows, image_shape, shifts), shifts, np.asarray(template)
    template = rows.mean(axis=0, dtype=np.float64).astype(np.float32)
    for _ in range(max(1, passes)):
        shifts = estimate_shifts(rows, image_shape, template, upsample=upsample)
        aligned = apply_shifts(rows, image_shape, shifts)
        template = aligned.mean(axis=0, dtype=np.float64).astype(np.float32)
    return aligned, shifts, template
