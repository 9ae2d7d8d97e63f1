"""Atomic writes: a temporary file in the target folder, then a rename.

An interrupted run never leaves a half-written file under the final name, and an
existing file is replaced only once the new one is complete.
"""

import os
import tempfile
from contextlib import contextmanager
from pathlib import Path

__all__ = ["atomic_path", "write_text", "write_bytes"]


@contextmanager
def atomic_path(path, *, suffix=None):
    """Yield a temporary path beside `path`; rename it onto `path` if the block succeeds.

    Parameters
    ----------
    path : str or Path
        Final file name. Its folder must exist.
    suffix : str, optional
        Suffix of the temporary file (some writers choose the format by suffix).
        Defaults to the suffix of `path`.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> with atomic_path(folder / "a.txt") as tmp:
    ...     _ = tmp.write_text("done")
    >>> (folder / "a.txt").read_text()
    'done'
    """
    path = Path(path)
    if suffix is None:
        suffix = path.suffix
    fd, tmp = tempfile.mkstemp(prefix="." + path.name + ".", suffix=".part" + suffix,
                               dir=path.parent)
    os.close(fd)
    tmp = Path(tmp)
    try:
        yield tmp
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def write_text(path, text):
    """Write `text` (UTF-8) to `path` atomically."""
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")


def write_bytes(path, data):
    """Write `data` to `path` atomically."""
    with atomic_path(path) as tmp:
        tmp.write_bytes(data)


def write_image(path, image, *, bit_depth=8, compress_level=6):
    """Write a float image in [0, 1] (clipped) as an 8- or 16-bit file, atomically.

    Gray ``(h, w)`` and 8-bit RGB ``(h, w, 3)`` images are written as PNG; 16-bit RGB as
    TIFF (PNG writers at hand keep only 8 bits of colour), so `path` must end in .tif
    for it. `compress_level` (0-9, zlib) trades PNG size for speed; it never changes
    the pixels. Values are rounded to the nearest integer level: writing what
    :func:`imgreduce.ingest.read_images` read gives back identical files.

    Examples
    --------
    >>> import tempfile, pathlib, numpy as np
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> write_image(folder / "a.png", np.linspace(0, 1, 6).reshape(2, 3), bit_depth=16)
    >>> sorted(p.name for p in folder.iterdir())
    ['a.png']
    """
    import numpy as np

    from .errors import ParameterError

    path = Path(path)
    if bit_depth not in (8, 16):
        raise ParameterError(f"bit_depth must be 8 or 16, got {bit_depth!r}")
    image = np.asarray(image, dtype=np.float64)
    dtype = np.uint8 if bit_depth == 8 else np.uint16
    levels = np.rint(np.clip(image, 0.0, 1.0) * (2 ** bit_depth - 1)).astype(dtype)
    if image.ndim == 3 and bit_depth == 16:
        if path.suffix.lower() not in (".tif", ".tiff"):
            raise ParameterError(f"{path.name}: 16-bit colour images are written as TIFF; "
                                 "use a .tif name")
        import tifffile

        with atomic_path(path) as tmp:
            tifffile.imwrite(tmp, levels, photometric="rgb")
        return
    from PIL import Image

    if image.ndim not in (2, 3) or (image.ndim == 3 and image.shape[2] != 3):
        raise ParameterError(f"expected an (h, w) or (h, w, 3) image, got shape {image.shape}")
    with atomic_path(path, suffix=".png") as tmp:
        Image.fromarray(levels).save(tmp, format="PNG", compress_level=compress_level)
