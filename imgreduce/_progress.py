"""Progress bars on stderr (tqdm), silent unless asked for and stderr is a terminal."""

import sys

__all__ = ["progress_bar"]


class _Silent:
    def update(self, n=1):
        pass

    def close(self):
        pass

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


def progress_bar(progress, *, total, desc, unit="it"):
    """Return an object with ``update(n)`` and ``close()``.

    Parameters
    ----------
    progress : bool or object
        ``True`` shows a tqdm bar on stderr when stderr is a terminal; ``False`` shows
        nothing; any other object with ``update`` and ``close`` methods is returned as is.
    total : int
        Number of steps.
    desc : str
        Short label shown before the bar.
    unit : str
        Name of one step.
    """
    if progress is False or progress is None:
        return _Silent()
    if progress is True:
        if not sys.stderr.isatty():
            return _Silent()
        from tqdm import tqdm

        return tqdm(total=total, desc=desc, unit=unit, file=sys.stderr, leave=False,
                    dynamic_ncols=True)
    return progress
