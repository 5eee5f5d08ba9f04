"""Transmission curves given by the user: arrays or two-column text files, as (micron, throughput)."""

import os

import numpy as np
from astropy import units as u
from astropy.table import Table

from .._lib.validation import param_error
from ..laws import wavelength_micron

__all__ = ["read_transmission"]


def read_transmission(transmission, unit=u.AA):
    """Read a transmission curve.

    Parameters
    ----------
    transmission : tuple, str, path or Band
        ``(wavelength, throughput)`` arrays (wavelength a Quantity, or numbers in
        ``unit``); or a path to a text file with two columns (wavelength in ``unit``,
        throughput), ``#`` comments allowed; or a :class:`Band` with a curve.
    unit : Unit, optional
        Wavelength unit of a file or of bare numbers. Default Angstrom.

    Returns
    -------
    wavelength, throughput : ndarray
        Wavelength in micron (non-decreasing) and throughput (>= 0), plain floats.
    """
    if callable(getattr(transmission, "curve", None)):  # a Band
        curve = transmission.curve()
        if curve is None:
            raise param_error(
                "transmission", f"a curve; band {transmission.name!r} has only an effective wavelength",
                transmission.name,
            )
        transmission = (curve[0] * u.micron, curve[1])
    if isinstance(transmission, (str, os.PathLike)):
        path = os.fspath(transmission)
        if not os.path.exists(path):
            raise param_error("transmission", "an existing two-column text file", path)
        try:
            table = Table.read(path, format="ascii.no_header", comment="#")
        except Exception as exc:  # noqa: BLE001 - report any parse failure the same way
            raise param_error(
                "transmission", f"a readable two-column text file (wavelength, throughput) ({exc})", path
            ) from None
        if len(table.colnames) < 2:
            raise param_error("transmission", "a file with two columns (wavelength, throughput)", path)
        lam_raw = np.asarray(table.columns[0], dtype=float)
        thr = np.asarray(table.columns[1], dtype=float)
        lam = (lam_raw * u.Unit(unit)).to_value(u.micron, equivalencies=u.spectral())
    else:
        try:
            lam_in, thr = transmission
        except (TypeError, ValueError):
            raise param_error(
                "transmission", "a (wavelength, throughput) pair or a path to a two-column file",
                transmission,
            ) from None
        if isinstance(lam_in, u.Quantity):
            lam = wavelength_micron(lam_in, "transmission wavelength")
        else:
            lam = (np.asarray(lam_in, dtype=float) * u.Unit(unit)).to_value(
                u.micron, equivalencies=u.spectral()
            )
        thr = np.asarray(thr, dtype=float)
    lam = np.asarray(lam, dtype=float).ravel()
    thr = np.asarray(thr, dtype=float).ravel()
    if lam.size != thr.size or lam.size < 2:
        raise param_error(
            "transmission", "wavelength and throughput of equal length, at least 2 points",
            f"{lam.size} wavelengths and {thr.size} throughputs",
        )
    if not (np.all(np.isfinite(lam)) and np.all(np.isfinite(thr))):
        raise param_error("transmission", "finite wavelengths and throughputs", "non-finite values")
    if np.any(thr < 0):
        raise param_error("transmission", "a non-negative throughput", float(thr[thr < 0][0]))
    if np.any(lam <= 0):
        raise param_error("transmission", "positive wavelengths", float(lam[lam <= 0][0]))
    if lam[0] > lam[-1]:  # given in decreasing wavelength (e.g. a frequency grid)
        lam, thr = lam[::-1], thr[::-1]
    if np.any(np.diff(lam) < 0):
        raise param_error("transmission", "wavelengths sorted in increasing order", "unsorted values")
    if not np.any(thr > 0):
        raise param_error("transmission", "a throughput that is positive somewhere", "all zero")
    return lam, thr
