"""Sub-pixel translation of frames onto a template, for fixed setups whose parts move.

On an inspection line a part lands a little differently under the camera each time.
PCA cannot represent a translation compactly: a part placed a pixel off leaves residual
all along its edges, as large as a faint scratch. Aligning every frame to a template
first removes that nuisance; how far each frame had to move is then a measurement of
its own (placement), screened like the other statistics.

Shifts are estimated by cross-correlation with the upsampled-DFT refinement of
Guizar-Sicairos, Thurman & Fienup (Opt. Lett. 33(2), 2008), the method of
``skimage.registration.phase_cross_correlation`` (with ``normalization=None``), here
batched over frames in single precision, to 1/`upsample` pixel, on the luma of colour
frames; they are applied with linear interpolation (``scipy.ndimage.shift``, borders
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


def _upsampled_dft(data, region, factor, offsets):
    """Matrix-multiply DFT of each ``data[i]`` on a `region`-point grid 1/`factor` apart.

    The refinement step of Guizar-Sicairos, Thurman & Fienup (Opt. Lett. 33(2), 2008):
    the cross-power spectrum evaluated only near the peak, at the upsampled spacing,
    without an upsampled FFT of the whole frame. `data` is (m, h, w), `offsets` (m, 2):
    where each grid starts, in upsampled pixels.
    """
    m, h, w = data.shape
    grid = np.arange(region)[None, :, None]
    rows = np.exp(-2j * np.pi * (grid - offsets[:, 0, None, None])
                  * np.fft.fftfreq(h, factor)[None, None, :]).astype(data.dtype)
    cols = np.exp(-2j * np.pi * (grid - offsets[:, 1, None, None])
                  * np.fft.fftfreq(w, factor)[None, None, :]).astype(data.dtype)
    return np.einsum("mrh,mhw,mcw->mrc", rows, data, cols, optimize=True)


def estimate_shifts(rows, image_shape, template, *, upsample=20, rounds=2):
    """Shift ``(dy, dx)`` that moves each row's image onto `template`, in pixels.

    Cross-correlation with a Tukey window (flat inside, cosine taper over the outer
    12.5% on each side), the integer peak from batched FFTs, then the upsampled-DFT
    refinement to 1/`upsample` pixel. Without a window the frame borders, which do not
    move, dominate the correlation and pull every estimate towards zero (measured: half
    the true shift on a photograph); a Hann window over the whole frame distorts content
    near the middle. The window stays put while the content moves, which still shrinks
    estimates by about 10%: a second round measures what is left after moving each frame
    (in the Fourier domain) by the first estimate.

    Parameters
    ----------
    rows : ndarray, shape (m, p)
    image_shape : tuple
        ``(h, w)`` or ``(h, w, 3)``.
    template : ndarray, shape (h, w) or (h, w, 3) or (p,)
    upsample : int
        Precision 1/`upsample` pixel.
    rounds : int

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
    from scipy import fft
    from scipy.signal.windows import tukey

    if len(image_shape) < 2:
        raise ParameterError("aligning frames needs 2-D images")
    h, w = tuple(image_shape)[:2]
    window = np.outer(tukey(h, 0.25), tukey(w, 0.25)).astype(np.float32)
    tmpl = _planes(np.asarray(template).reshape(1, -1), image_shape)[0]
    tmpl_f = fft.fft2((tmpl - tmpl.mean()) * window)
    planes = _planes(rows, image_shape)
    fy = np.fft.fftfreq(h).astype(np.float32)[:, None]
    fx = np.fft.fftfreq(w).astype(np.float32)[None, :]
    size = np.array([h, w], dtype=np.float64)
    region = int(np.ceil(upsample * 1.5))
    centre = np.fix(region / 2.0)
    total = np.zeros((len(planes), 2))
    for start in range(0, len(planes), 32):  # single precision, 32 frames at a time
        images = planes[start:start + 32]
        images = images - images.mean(axis=(1, 2), keepdims=True)
        raw_f = fft.fft2(images, axes=(1, 2))
        part = total[start:start + 32]
        for round_ in range(max(1, rounds)):
            if round_:
                ramp = np.exp(-2j * np.pi * (fy[None] * part[:, :1, None].astype(np.float32)
                                             + fx[None] * part[:, 1:, None].astype(np.float32)))
                moved = fft.ifft2(raw_f * ramp, axes=(1, 2)).real
            else:
                moved = images
            product = tmpl_f[None] * fft.fft2(moved * window, axes=(1, 2)).conj()
            corr = fft.ifft2(product, axes=(1, 2))
            flat = np.abs(corr).reshape(len(images), -1).argmax(axis=1)
            shifts = np.stack(np.unravel_index(flat, (h, w)), axis=1).astype(np.float64)
            over = shifts > size // 2
            shifts[over] -= np.broadcast_to(size, shifts.shape)[over]
            coarse = np.round(shifts * upsample) / upsample
            fine = _upsampled_dft(product.conj(), region, upsample,
                                  centre - coarse * upsample).conj()
            flat = np.abs(fine).reshape(len(images), -1).argmax(axis=1)
            peak = np.stack(np.unravel_index(flat, (region, region)), axis=1)
            part += coarse + (peak - centre) / upsample
    # Wrap-around: a shift past half the frame is the same correlation peak from the
    # other side.
    return (total + size / 2) % size - size / 2


def apply_shifts(rows, image_shape, shifts, *, fill=None):
    """Rows shifted by `shifts` ``(dy, dx)`` each (linear interpolation), float32.

    Parameters
    ----------
    fill : ndarray, shape (p,), optional
        Where a shift brings in pixels from outside the frame (a band as wide as the
        shift, rounded up), take them from `fill` (the template) instead of repeating
        the border: repeated borders leave residual no good frame has.

    Examples
    --------
    >>> img = np.zeros((5, 5), np.float32); img[2, 2] = 1
    >>> out = apply_shifts(img.reshape(1, -1), (5, 5), [[1.0, 0.0]])
    >>> [int(i) for i in np.unravel_index(out[0].argmax(), (5, 5))]
    [3, 2]
    >>> apply_shifts(np.ones((1, 4), np.float32), (2, 2), [[0.5, 0.0]],
    ...              fill=np.zeros(4, np.float32)).reshape(2, 2)
    array([[0., 0.],
           [1., 1.]], dtype=float32)
    """
    from scipy import ndimage

    shape = tuple(image_shape)
    images = np.asarray(rows, dtype=np.float32).reshape((len(rows),) + shape)
    template = None if fill is None else np.asarray(fill, np.float32).reshape(shape)
    out = np.empty_like(images)
    h, w = shape[:2]
    for i, (img, s) in enumerate(zip(images, np.asarray(shifts, dtype=np.float64))):
        full = (s[0], s[1]) + (0.0,) * (img.ndim - 2)
        if not np.any(full):
            out[i] = img
            continue
        out[i] = ndimage.shift(img, full, order=1, mode="nearest")
        if template is None:
            continue
        dy, dx = int(np.ceil(abs(s[0]))), int(np.ceil(abs(s[1])))
        if s[0] > 0:
            out[i, :dy] = template[:dy]
        elif s[0] < 0:
            out[i, h - dy:] = template[h - dy:]
        if s[1] > 0:
            out[i, :, :dx] = template[:, :dx]
        elif s[1] < 0:
            out[i, :, w - dx:] = template[:, w - dx:]
    return out.reshape(len(rows), -1)


def align_rows(rows, image_shape, template=None, *, passes=2, upsample=20):
    """Align rows to `template`, or to their own mean refined over `passes`.

    Without a template, the first pass aligns to the plain mean; each further pass
    aligns the original rows to the mean of the last aligned ones (sharper edges, so
    better shifts); the rows returned are measured against the template returned.

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
        return (apply_shifts(rows, image_shape, shifts, fill=template), shifts,
                np.asarray(template))
    template = rows.mean(axis=0, dtype=np.float64).astype(np.float32)
    for _ in range(max(1, passes)):
        shifts = estimate_shifts(rows, image_shape, template, upsample=upsample)
        aligned = apply_shifts(rows, image_shape, shifts, fill=template)
        template = aligned.mean(axis=0, dtype=np.float64).astype(np.float32)
    # Measure the returned rows against the returned template, as later frames will be:
    # shifts measured against an earlier template differ from it by a small common offset
    # that later frames would not share.
    shifts = estimate_shifts(rows, image_shape, template, upsample=upsample)
    aligned = apply_shifts(rows, image_shape, shifts, fill=template)
    return aligned, shifts, template
