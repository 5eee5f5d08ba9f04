"""HEALPix pixel functions for the computation layer.

The pixel index of a position and the bilinear interpolation weights, the two calls made
for millions of tracers or targets, are written here in numpy from the HEALPix formulas
(Gorski et al. 2005, ApJ 622, 759) and run in cache-sized blocks on the CPU's cores; the
tests check them against healpy, the reference library, pixel for pixel. The rest
(neighbours, pixel centres, cone searches, RING <-> NESTED) comes from astropy-healpix
(the same pixelisation). healpy itself is not imported here because importing it also
imports matplotlib.pyplot, which the computation layer must not pull in.
"""

import os
import warnings
from concurrent.futures import ThreadPoolExecutor

import numpy as np
from astropy import units as u

# astropy-healpix is imported where it is used: it imports astropy.coordinates (0.2 s), which a
# build from Galactic l, b never needs

__all__ = [
    "nside2npix", "pixarea_deg2", "work_buffers", "ring_pixel", "ring_to_nested", "pixel_from_z",
    "ang2pix", "pix2ang", "interp_weights", "neighbours", "query_disc",
]

def nside2npix(nside):
    """Number of pixels, 12 NSIDE^2 (Gorski et al. 2005, ApJ 622, 759)."""
    return 12 * nside * nside


def pixarea_deg2(nside):
    """Area of one pixel in deg^2: the sphere's 4 pi sr over 12 NSIDE^2 pixels of equal area."""
    return float(4.0 * np.pi / (12 * nside * nside) * np.rad2deg(1.0) ** 2)


_PARALLEL_MIN = 200_000  # positions above which the work is split over the CPU's cores
_BLOCK = 32_768          # positions per block of element-wise work


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


def work_buffers(shape):
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
        work = work_buffers(l.shape)
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
    sub = work_buffers(m)
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
    import astropy_healpix.core as _ahcore

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
    """Galactic (l, b) in deg of pixel centres; RING in numpy, NESTED through astropy-healpix."""
    if nest:
        from astropy_healpix import healpy as _hp

        l, b = _hp.pix2ang(nside, np.asarray(pixels), nest=nest, lonlat=True)
        return np.asarray(l, float), np.asarray(b, float)
    return _ring_centres(nside, np.asarray(pixels, np.int64))


def _ring_centres(nside, p):
    """Centres of RING pixels ``p``: ring i and position j in the ring, then z and phi
    (Gorski et al. 2005, ApJ 622, 759, eqs. 4-9 and the RING numbering of their Fig. 4)."""
    npix = 12 * nside * nside
    ncap = 2 * nside * (nside - 1)
    z = np.empty(p.shape)
    phi = np.empty(p.shape)
    north, south = p < ncap, p >= npix - ncap
    equator = ~(north | south)
    q = p[north]
    i = np.floor((1 + np.sqrt(1 + 2 * q)) / 2).astype(np.int64)
    j = q - 2 * i * (i - 1) + 1
    z[north] = 1 - i * i / (3.0 * nside * nside)
    phi[north] = (j - 0.5) * np.pi / (2 * i)
    q = p[equator] - ncap
    i = q // (4 * nside) + nside
    j = q % (4 * nside) + 1
    shift = (i - nside + 1) % 2
    z[equator] = 4.0 / 3.0 - 2.0 * i / (3.0 * nside)
    phi[equator] = (j - 1 + shift / 2.0) * np.pi / (2 * nside)
    q = npix - p[south]
    i = np.floor((1 + np.sqrt(2 * q - 1)) / 2).astype(np.int64)
    j = 4 * i + 1 - (q - 2 * i * (i - 1))
    z[south] = -1 + i * i / (3.0 * nside * nside)
    phi[south] = (j - 0.5) * np.pi / (2 * i)
    return np.rad2deg(phi), np.rad2deg(np.arcsin(np.clip(z, -1.0, 1.0)))


_RINGS = {}


def _ring_table(nside):
    """Per ring 0 .. 4 nside: first pixel, pixels in the ring, colatitude (rad), shifted (0/1).

    HEALPix ring geometry (Gorski et al. 2005, section 4); rings 0 and 4 nside are the
    poles (placeholders, not used for pixels).
    """
    table = _RINGS.get(nside)
    if table is not None:
        return table
    npix = 12 * nside * nside
    ring = np.arange(4 * nside + 1)
    north = np.where(ring > 2 * nside, 4 * nside - ring, ring)
    cap = north < nside
    tmp = north * north * (4.0 / npix)
    theta = np.where(cap, np.arctan2(np.sqrt(tmp * (2 - tmp)), 1 - tmp),
                     np.arccos(np.clip((2 * nside - north) * (8.0 * nside / npix), -1, 1)))
    count = np.where(cap, 4 * north, 4 * nside)
    shifted = np.where(cap, 1, ((north - nside) & 1) == 0).astype(float)
    start = np.where(cap, 2 * north * (north - 1), 2 * nside * (nside - 1) + (north - nside) * 4 * nside)
    south = north != ring
    theta = np.where(south, np.pi - theta, theta)
    start = np.where(south, npix - start - count, start)
    table = _RINGS[nside] = (start.astype(np.int64), count.astype(np.int64), theta, shifted)
    return table


def _interp_ring(nside, l_deg, b_deg):
    """RING pixels and weights (4, n) of bilinear interpolation at (l, b), in numpy.

    The HEALPix interpolation of the reference library: the two rings around the point,
    in each the two pixel centres around its longitude, weights linear in longitude within
    a ring and in colatitude between the rings, with the pole handled by the four pixels
    around it (Gorski et al. 2005). Equal to ``healpy.get_interp_weights`` (checked in the
    tests).
    """
    start, count, ring_theta, shifted = _ring_table(nside)
    npix = 12 * nside * nside
    theta = np.pi / 2 - np.deg2rad(b_deg)
    phi = np.deg2rad(np.mod(l_deg, 360.0))
    z = np.cos(theta)
    az = np.abs(z)
    polar = np.floor(nside * np.sqrt(3 * (1 - az)))
    ir1 = np.where(az <= 2.0 / 3.0, np.floor(nside * (2 - 1.5 * z)),
                   np.where(z > 0, polar, 4 * nside - polar - 1)).astype(np.int64)
    ir2 = ir1 + 1
    pix = np.empty((4,) + theta.shape, dtype=np.int64)
    wgt = np.empty((4,) + theta.shape)
    for j, ir in ((0, ir1), (2, ir2)):
        r = np.clip(ir, 1, 4 * nside - 1)  # rings 0 and 4 nside: the poles, fixed below
        nr = count[r]
        dphi = 2 * np.pi / nr
        tmp = phi / dphi - 0.5 * shifted[r]
        i1 = np.floor(tmp).astype(np.int64)
        w1 = (phi - (i1 + 0.5 * shifted[r]) * dphi) / dphi
        pix[j] = start[r] + np.mod(i1, nr)
        pix[j + 1] = start[r] + np.mod(i1 + 1, nr)
        wgt[j] = 1 - w1
        wgt[j + 1] = w1
    theta1, theta2 = ring_theta[ir1], ring_theta[np.minimum(ir2, 4 * nside)]
    north, south = ir1 == 0, ir2 == 4 * nside
    mid = ~(north | south)
    with np.errstate(divide="ignore", invalid="ignore"):
        wt = np.where(north, theta / theta2, np.where(south, (theta - theta1) / (np.pi - theta1),
                                                      (theta - theta1) / (theta2 - theta1)))
    wgt[0:2] *= np.where(mid | south, 1 - wt, 1.0)
    wgt[2:4] *= np.where(mid | north, wt, 1.0)
    if north.any():  # above the first ring: the pole's share goes to the 4 pixels around it
        fac = (1 - wt[north]) * 0.25
        wgt[0:2, north] = fac
        wgt[2:4, north] += fac
        pix[0:2, north] = (pix[2:4, north] + 2) & 3
    if south.any():
        fac = wt[south] * 0.25
        wgt[0:2, south] += fac
        wgt[2:4, south] = fac
        pix[2:4, south] = ((pix[0:2, south] + 2) & 3) + npix - 4
    return pix, wgt


def interp_weights(nside, l_deg, b_deg, nest=False):
    """Bilinear interpolation pixels and weights, each (4, n) (as healpy.get_interp_weights)."""
    l = np.asarray(l_deg, float)
    b = np.asarray(b_deg, float)

    def one(x, y):
        if x.ndim != 1 or x.size <= _BLOCK:
            p, w = _interp_ring(nside, x, y)
        else:  # in cache-sized blocks: temporaries of the whole array cost more than the arithmetic
            p, w = np.empty((4, x.size), dtype=np.int64), np.empty((4, x.size))
            for s in range(0, x.size, _BLOCK):
                p[:, s:s + _BLOCK], w[:, s:s + _BLOCK] = _interp_ring(nside, x[s:s + _BLOCK], y[s:s + _BLOCK])
        return (ring_to_nested(nside, p) if nest else p), w

    if l.ndim != 1 or l.shape != b.shape:
        return one(l, b)
    return _split(one, l.size, l, b)


def neighbours(nside, pixels, nest=False):
    """The 8 neighbours of each pixel, shape (8, n); -1 where a pixel has only 7.

    RING up to NSIDE 128 in numpy (a build's sky kernels: importing astropy-healpix, with the
    astropy.coordinates it pulls in, costs more than the work); else astropy-healpix. Both equal
    healpy.get_all_neighbours (tests/test_fast_paths.py)."""
    if not nest and nside <= 128:
        return _ring_neighbours(nside, pixels)
    import astropy_healpix as _ah

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.asarray(_ah.neighbours(np.asarray(pixels), nside, order="nested" if nest else "ring"))


def query_disc(nside, l_deg, b_deg, radius_deg, nest=False):
    """Pixels whose centres lie within ``radius_deg`` of (l, b)."""
    import astropy_healpix as _ah

    hp = _ah.HEALPix(nside=nside, order="nested" if nest else "ring")
    return np.asarray(hp.cone_search_lonlat(l_deg * u.deg, b_deg * u.deg, radius_deg * u.deg))


_JRLL = np.array([2, 2, 2, 2, 3, 3, 3, 3, 4, 4, 4, 4])
_JPLL = np.array([1, 3, 5, 7, 0, 2, 4, 6, 1, 3, 5, 7])
_XOFF = np.array([-1, -1, 0, 1, 1, 1, 0, -1])
_YOFF = np.array([0, 1, 1, 1, 0, -1, -1, -1])
_FACES = np.array([[8, 9, 10, 11, -1, -1, -1, -1, 10, 11, 8, 9], [5, 6, 7, 4, 8, 9, 10, 11, 9, 10, 11, 8],
                   [-1, -1, -1, -1, 5, 6, 7, 4, -1, -1, -1, -1], [4, 5, 6, 7, 11, 8, 9, 10, 11, 8, 9, 10],
                   [0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11], [1, 2, 3, 0, 0, 1, 2, 3, 5, 6, 7, 4],
                   [-1, -1, -1, -1, 7, 4, 5, 6, -1, -1, -1, -1], [3, 0, 1, 2, 3, 0, 1, 2, 4, 5, 6, 7],
                   [2, 3, 0, 1, -1, -1, -1, -1, 0, 1, 2, 3]])
_SWAP = np.array([[0, 0, 3], [0, 0, 6], [0, 0, 0], [0, 0, 5], [0, 0, 0], [5, 0, 0], [0, 0, 0], [6, 0, 0], [3, 0, 0]])


def _isqrt(x):
    """Integer square root of int64 values (float estimate, corrected by one)."""
    r = np.floor(np.sqrt(x.astype(float))).astype(np.int64)
    r -= (r * r > x)
    r += ((r + 1) * (r + 1) <= x)
    return r


def _ring2xyf(nside, pix):
    """RING pixel -> (x, y, face) (HEALPix C++ ring2xyf)."""
    npix, ncap, nl2 = 12 * nside * nside, 2 * nside * (nside - 1), 2 * nside
    iring = np.empty_like(pix); iphi = np.empty_like(pix); kshift = np.zeros_like(pix)
    nr = np.empty_like(pix); face = np.empty_like(pix)
    north, south = pix < ncap, pix >= npix - ncap
    eq = ~(north | south)
    p = pix[north]
    ir = (1 + _isqrt(1 + 2 * p)) >> 1
    ip = (p + 1) - 2 * ir * (ir - 1)
    iring[north], iphi[north], nr[north], face[north] = ir, ip, ir, (ip - 1) // ir
    q = pix[eq] - ncap
    tmp = q // (4 * nside)
    ir = tmp + nside
    ip = q - tmp * 4 * nside + 1
    kshift[eq] = (ir + nside) & 1
    ire, irm = tmp + 1, nl2 + 1 - tmp
    ifm = (ip - (ire >> 1) + nside - 1) // nside
    ifp = (ip - (irm >> 1) + nside - 1) // nside
    face[eq] = np.where(ifp == ifm, ifp | 4, np.where(ifp < ifm, ifp, ifm + 8))
    iring[eq], iphi[eq], nr[eq] = ir, ip, nside
    q = npix - pix[south]
    ir = (1 + _isqrt(2 * q - 1)) >> 1
    ip = 4 * ir + 1 - (q - 2 * ir * (ir - 1))
    nr[south], iring[south], iphi[south], face[south] = ir, 2 * nl2 - ir, ip, (ip - 1) // ir + 8
    irt = iring - ((2 + (face >> 2)) * nside) + 1
    ipt = 2 * iphi - _JPLL[face] * nr - kshift - 1
    ipt = np.where(ipt >= nl2, ipt - 8 * nside, ipt)
    return (ipt - irt) >> 1, (-ipt - irt) >> 1, face


def _xyf2ring(nside, ix, iy, face):
    """(x, y, face) -> RING pixel (HEALPix C++ xyf2ring)."""
    npix, ncap = 12 * nside * nside, 2 * nside * (nside - 1)
    jr = _JRLL[face] * nside - ix - iy - 1
    north, south = jr < nside, jr >= 3 * nside
    nrs = np.where(north, jr, np.where(south, 4 * nside - jr, nside))
    start = np.where(north, 2 * jr * (jr - 1), np.where(south, npix - 2 * nrs * (nrs + 1), ncap + (jr - nside) * 4 * nside))
    shifted = np.where(north | south, 1, ((jr - nside) & 1) == 0)
    kshift = 1 - shifted
    jp = (_JPLL[face] * nrs + ix - iy + 1 + kshift) // 2
    jp = np.where(jp < 1, jp + 4 * nrs, jp)
    return start + jp - 1


def _ring_neighbours(nside, pixels):
    """The 8 neighbours of RING pixels in numpy: pixel -> (x, y, face), the offsets of the 8
    directions, across face edges with the HEALPix C++ library's face and swap tables (Gorski et al.
    2005, ApJ 622, 759; order SW, W, NW, N, NE, E, SE, S as healpy.get_all_neighbours)."""
    pix = np.asarray(pixels, np.int64)
    ix, iy, face = _ring2xyf(nside, pix)
    out = np.empty((8,) + pix.shape, np.int64)
    for k in range(8):
        x, y = ix + _XOFF[k], iy + _YOFF[k]
        nb = np.full(pix.shape, 4)
        nb = np.where(x < 0, nb - 1, np.where(x >= nside, nb + 1, nb))
        x = np.where(x < 0, x + nside, np.where(x >= nside, x - nside, x))
        nb = np.where(y < 0, nb - 3, np.where(y >= nside, nb + 3, nb))
        y = np.where(y < 0, y + nside, np.where(y >= nside, y - nside, y))
        f = _FACES[nb, face]
        bits = _SWAP[nb, face >> 2]
        x = np.where(bits & 1, nside - x - 1, x)
        y = np.where(bits & 2, nside - y - 1, y)
        x, y = np.where(bits & 4, y, x), np.where(bits & 4, x, y)
        out[k] = np.where(f >= 0, _xyf2ring(nside, x, y, np.maximum(f, 0)), -1)
    return out
