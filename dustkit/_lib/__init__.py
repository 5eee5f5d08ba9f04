"""Shared internals of dustkit: the helpers every layer uses.

validation
    The one message shape for bad parameters and the shared validators.
units
    Lenient parsing of the units written in catalogue files.
sky
    Sky geometry: the one angular separation on the sphere.
formats
    The file-format registry (suffix -> format) used by every reader and writer, the
    atomic write and the one error for an unknown suffix.
healpix
    HEALPix pixel index and interpolation weights in numpy blocks.
isotonic
    Weighted isotonic regression of many rows at once.
progress
    Progress bars, silent off a terminal.

Contract: nothing here imports the rest of dustkit except :mod:`dustkit.exceptions` (the
bottom of the package). Names inside these modules are public *within* dustkit (other
modules may import them); they are not part of the user-facing API.
"""

__all__ = []
