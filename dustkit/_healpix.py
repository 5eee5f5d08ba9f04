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
import astropy_healpix.core as _ahcore
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


def _work(shape):
    """Buffers for :func:`ring_pixel`: three float and three int64 arrays."""
    return tuple(np.empty(shape) for _ in range(3)) + tuple(np.empty(shape, np.int64) for _ in range(3))


def _equatorial(nside, tt, z, work):
    """RING pixels of points with |z| <= 2/3 from ``tt = l / 90 deg`` and ``z``, on buffers.

    ``work`` is (f1, f2, f3, i1, i2, i3): three float and three int64 arrays of the input's size;
    ``tt`` may be ``f1`` itself. Returns ``i3``. Nothing is allocated, so blocks of millions
    of tracers run at memory speed.
    """
    f1, f2, f3, i1, i2, i3 = work
    np.add(tt, 0.5, out=f1)
    np.multiply(f1, nside, out=f1)                    # t1 = nside (1/2 + tt)
    np.multiply(z, 0.75 * nside, out=f2)              # t2 = 3/4 nside z
    np.subtract(f1, f2, out=f3)
    np.copyto(i1, f3, casting="unsafe")               # jp = floor(t1 - t2), ascending edge line (>= 0)
    np.add(f1, f2, out=f3)
    np.copyto(i2, f3, casting="unsafe")               # jm = floor(t1 + t2), descending edge line
    np.subtract(i1, i2, out=i3)
    i3 += nside + 1                                   # ring counted from z = 2/3, 1 .. 2 nside + 1
    i1 += i2
    i1 += 2 - nside
    np.bitwise_and(i3, 1, out=i2)
    i1 -= i2
    i1 >>= 1
    i1 &= 4 * nside - 1                               # place in the ring, modulo 4 nside
    i3 -= 1
    i3 *= 4 * nside
    i3 += 2 * nside * (nside - 1)
    i3 += i1
    return i3


def ring_pixel(nside, l_deg, z, work=None):
    """RING pixel index from Galactic longitude (deg) and ``z = sin(b)``, in plain numpy.

    The HEALPix point-to-pixel formulas of Gorski et al. (2005, ApJ 622, 759; section 4,
    equatorial zone and polar caps), vectorised. Taking ``z = sin(b)`` lets a build share
    it with the dust layer; the pixels equal ``healpy.ang2pix`` away from pixel boundaries
    (tests/test_model.py). ``work`` (see :func:`_equatorial`) are buffers for 1-D inputs of
    one size (:func:`_work`); the result is then ``work[5]``.
    """
    nside = int(nside)
    l, z = np.broadcast_arrays(np.asarray(l_deg, float), np.asarray(z, float))
    if work is None or l.ndim != 1:
        work = _work(l.shape)
    tt = work[0]
    if l.size and (l.min() < 0.0 or l.max() >= 360.0):
        l = np.mod(l, 360.0)
    np.multiply(l, 1.0 / 90.0, out=tt)  # in [0, 4]
    if l.size and tt.max() >= 4.0:  # l a hair below 360 can round up to 4
        np.copyto(tt, 0.0, where=tt >= 4.0)
    if not l.size or max(z.max(), -z.min()) <= 2.0 / 3.0:  # near the plane: all equatorial
        return _equatorial(nside, tt, z, work)
    out = np.empty(l.shape, dtype=np.int64)
    za = np.abs(z)
    eq = np.nonzero(za <= 2.0 / 3.0)
    m = eq[0].size if l.ndim == 1 else int(np.count_nonzero(za <= 2.0 / 3.0))
    sub = _work(m)
    out[eq] = _equatorial(nside, tt[eq], z[eq], sub)
    # polar caps
    cap = np.nonzero(za > 2.0 / 3.0)
    zz, t = z[cap], tt[cap]
    tp = t - np.floor(t)
    tmp = nside * np.sqrt(3.0 * (1.0 - np.abs(zz)))
    jp = (tp * tmp).astype(np.int64)
    jm = ((1.0 - tp) * tmp).astype(np.int64)
    ir = jp + jm + 1  # ring counted from the nearer pole
    ip = (t * ir).astype(np.int64) % (4 * ir)
    out[cap] = np.where(zz > 0, 2 * ir * (ir - 1) + ip, 12 * nside * nside - 2 * ir * (ir + 1) + ip)
    return out


_RING_TO_NEST = {}


def ring_to_nested(nside, pixels, out=None):
    """NESTED index of RING pixels (a lookup table for NSIDE <= 256)."""
    if nside > 256:
        return np.asarray(_ahcore.ring_to_nested(np.asarray(pixels), nside))
    table = _RING_TO_NEST.get(nside)
    if table is None:
        table = _RING_TO_NEST[nside] = np.asarray(_ahcore.ring_to_nested(np.arange(12 * nside * nside), nside))
    return np.take(table, pixels, out=out)


def pixel_from_z(nside, l_deg, z, nest=False, work=None):
    """Pixel index from longitude (deg) and ``z = sin(b)``; RING or NESTED."""
    pix = ring_pixel(nside, l_deg, z, work)
    if not nest:
        return pix
    out = work[4] if (work is not None and pix is work[5]) else None
    return ring_to_nested(nside, pix, out=out)


def ang2pix(nside, l_deg, b_deg, nest=False):
    l = np.asarray(l_deg, float)
    b = np.asarray(b_deg, float)

    def one(x, y):
        return pixel_from_z(nside, x, np.sin(np.deg2rad(y)), nest)

    if l.ndim != 1 or l.shape != b.shape:
        return one(l, b)
    return _split(one, l.size, l, b)


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
