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
