"""Writing figures: settle the layout, then an atomic write through the format registry."""

import os

from .._lib.formats import atomic_write, check_target, format_for

__all__ = ["settle_layout", "save_figure"]


def settle_layout(fig, passes=2):
    """Run the constrained layout a few times so it settles before a figure is written.

    The layout depends on the tick labels, which depend on the layout; with equal-aspect
    maps one pass can leave a label partly outside the figure. Extra passes fix that.
    """
    for _ in range(passes):
        fig.draw_without_rendering()
    return fig


def save_figure(fig, path, overwrite=False, dpi=300, **savefig_kwargs):
    """Write a figure to a file atomically (temporary file in the same folder, then rename).

    Parameters
    ----------
    fig : matplotlib Figure (or Axes, whose figure is saved)
    path : str or path-like
        Output file; the format comes from the suffix (``.png``, ``.pdf``, ``.svg``, ``.eps``).
    overwrite : bool
        Replace an existing file. A failed write leaves any existing file untouched.
    dpi : int
        Resolution for raster output (300 suits print).
    **savefig_kwargs
        Passed to ``Figure.savefig``.

    Returns
    -------
    pathlib.Path
        The path written.
    """
    import pathlib

    fig = getattr(fig, "figure", fig) if not hasattr(fig, "savefig") else fig
    path = pathlib.Path(os.fspath(path)).expanduser()
    fmt = format_for(path, "figure")  # FileFormatError (a ParameterError) lists the suffixes
    check_target(path, overwrite)  # OutputFolderError / OutputExistsError before the layout work
    settle_layout(fig)
    atomic_write(path, lambda tmp: fig.savefig(tmp, format=fmt, dpi=dpi, **savefig_kwargs), overwrite,
                 what="figure")
    return path
