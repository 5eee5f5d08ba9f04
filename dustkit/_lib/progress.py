"""Progress reporting for long steps (builds over many tracers, Monte Carlo).

A thin wrapper over tqdm: shown on a terminal, silent when ``quiet`` or when the
output is not a terminal, so logs and notebooks stay clean unless asked. A silent bar
does not import tqdm at all (``tqdm.auto`` looks for IPython, which takes seconds).
"""

import sys

__all__ = ["progress", "extend_total"]


class _Silent:
    """The part of a tqdm bar dustkit uses, doing nothing."""

    def __init__(self, iterable=None):
        self._iterable = iterable

    def __iter__(self):
        return iter(self._iterable)

    def update(self, n=1):
        pass

    def close(self):
        pass

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False


def progress(iterable=None, total=None, desc=None, quiet=None):
    """Wrap ``iterable`` in a progress bar unless quiet or not on a terminal."""
    if quiet is None:
        quiet = not (hasattr(sys.stderr, "isatty") and sys.stderr.isatty())
    if quiet:
        return _Silent(iterable)
    from tqdm.auto import tqdm

    return tqdm(iterable, total=total, desc=desc, leave=False)


def extend_total(bar, n):
    """Add ``n`` steps to a bar's total (work found to be longer than planned); no-op when silent."""
    if getattr(bar, "total", None) is not None:
        bar.total += n
        bar.refresh()
