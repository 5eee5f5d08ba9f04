"""Progress reporting for long steps (builds over many tracers, Monte Carlo).

A thin wrapper over tqdm: shown on a terminal, silent when ``quiet`` or when the
output is not a terminal, so logs and notebooks stay clean unless asked.
"""

import sys

__all__ = []


def progress(iterable=None, total=None, desc=None, quiet=None):
    """Wrap ``iterable`` in a progress bar unless quiet or not on a terminal."""
    from tqdm.auto import tqdm

    if quiet is None:
        quiet = not (hasattr(sys.stderr, "isatty") and sys.stderr.isatty())
    return tqdm(iterable, total=total, desc=desc, disable=bool(quiet), leave=False)
