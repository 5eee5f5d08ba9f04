"""HEALPix pixel functions for the computation layer.

Computation modules use astropy-healpix (Greenfield/Robitaille et al., BSD; the same
pixelisation as healpy, Gorski et al. 2005) because importing healpy also imports
matplotlib.pyplot, which the computation layer must not pull in.
"""

import os
import warnings
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import astropy_healpix as _ah
from astropy import units as u
from astropy_healpix import healpy as _hp

__all__ = []

nside2npix = _hp.nside2npix


def pixarea_deg2(nside):
    return float(_hp.nside2pixarea(nside, degrees=True))


_PARALLEL_MIN = 200_000  # positions above which the work is split over the CPU's cores


def _split(func, n, *arrays):
    """Run ``func`` on row blocks of ``arrays`` in threads (astropy-healpix releases the GIL).

    Results are concatenated along their last axis, so they equal one call on all rows.
    """
    workers = min(os.cpu_count() or 1, 8)
    if n < _PARALLEL_MIN or workers < 2:
        return func(*arrays)
    edges = np.linspace(0, n, workers + 1).astype(int)
    blocks = [tuple(a[lo:hi] for a in arrays) for lo, hi in zip(edges[:-1], edges[1:])]
    with ThreadPoolExecutor(workers) as pool:
        parts = list(pool.map(lambda blk: func(*blk), blocks))
    if isinstance(parts[0], tuple):
        return tuple(np.concatenate([p[i] for p in parts], axis=-1) for i in range(len(parts[0])))
    return np.concatenate(parts, axis=-1)


def ang2pix(nside, l_deg, b_deg, nest=False):
    l = np.asarray(l_deg, float)
    b = np.asarray(b_deg, float)
    if l.ndim != 1 or l.shape != b.shape:
        return np.asarray(_hp.ang2pix(nside, l, b, nest=nest, lonlat=True))
    return _split(lambda x, y: np.asarray(_hp.ang2pix(nside, x, y, nest=nest, lonlat=True)), l.size, l, b)


def pix2ang(nside, pixels, nest=False):
    l, b = _hp.pix2ang(nside, np.asarray(pixels), nest=nest, lonlat=True)
    return np.asarray(l, float), np.asarray(b, float)


def interp_weights(nside, l_deg, b_deg, nest=False):
    """Bilinear interpolation pixels and weights, each (4, n) (as healpy.get_interp_weights)."""
    l = np.asarray(l_deg, float)
    b = np.asarray(b_deg, float)

    def one(x, y):
        p, w = _hp.get_interp_weights(nside, x, y, nest=nest, lonlat=True)
        return np.asarray(p), np.asarray(w)

    if l.ndim != 1 or l.shape != b.shape:
        return one(l, b)
    return _split(one, l.size, l, b)


def neighbours(nside, pixels, nest=False):
    """The 8 neighbours of each pixel, shape (8, n); -1 where a pixel has only 7."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.asarray(_ah.neighbours(np.asarray(pixels), nside, order="nested" if nest else "ring"))


def query_disc(nside, l_deg, b_deg, radius_deg, nest=False):
    """Pixels whose centres lie within ``radius_deg`` of (l, b)."""
    hp = _ah.HEALPix(nside=nside, order="nested" if nest else "ring")
    return np.asarray(hp.cone_search_lonlat(l_deg * u.deg, b_deg * u.deg, radius_deg * u.deg))
