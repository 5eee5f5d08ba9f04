"""HEALPix pixel functions for the computation layer.

Computation modules use astropy-healpix (Greenfield/Robitaille et al., BSD; the same
pixelisation as healpy, Gorski et al. 2005) because importing healpy also imports
matplotlib.pyplot, which the computation layer must not pull in.
"""

import warnings

import numpy as np
import astropy_healpix as _ah
from astropy import units as u
from astropy_healpix import healpy as _hp

__all__ = []

nside2npix = _hp.nside2npix


def pixarea_deg2(nside):
    return float(_hp.nside2pixarea(nside, degrees=True))


def ang2pix(nside, l_deg, b_deg, nest=False):
    return np.asarray(_hp.ang2pix(nside, np.asarray(l_deg, float), np.asarray(b_deg, float), nest=nest, lonlat=True))


def pix2ang(nside, pixels, nest=False):
    l, b = _hp.pix2ang(nside, np.asarray(pixels), nest=nest, lonlat=True)
    return np.asarray(l, float), np.asarray(b, float)


def interp_weights(nside, l_deg, b_deg, nest=False):
    """Bilinear interpolation pixels and weights, each (4, n) (as healpy.get_interp_weights)."""
    p, w = _hp.get_interp_weights(nside, np.asarray(l_deg, float), np.asarray(b_deg, float), nest=nest, lonlat=True)
    return np.asarray(p), np.asarray(w)


def neighbours(nside, pixels, nest=False):
    """The 8 neighbours of each pixel, shape (8, n); -1 where a pixel has only 7."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.asarray(_ah.neighbours(np.asarray(pixels), nside, order="nested" if nest else "ring"))


def query_disc(nside, l_deg, b_deg, radius_deg, nest=False):
    """Pixels whose centres lie within ``radius_deg`` of (l, b)."""
    hp = _ah.HEALPix(nside=nside, order="nested" if nest else "ring")
    return np.asarray(hp.cone_search_lonlat(l_deg * u.deg, b_deg * u.deg, radius_deg * u.deg))
