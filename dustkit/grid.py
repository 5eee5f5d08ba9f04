"""The model grid: Galactic HEALPix sky pixels x distance edges."""

from dataclasses import dataclass

import numpy as np
from astropy import units as u

from ._lib import healpix
from ._lib.validation import Described, check_choice, check_int, check_nside, check_real, param_error, to_scalar

__all__ = ["Grid", "MAX_GRID_BYTES", "edges_info", "edge_index"]

#: Largest grid dustkit agrees to allocate (bytes), counting the working arrays of a build.
MAX_GRID_BYTES = 8 * 2**30
#: float64 arrays per (pixel, edge) cell held during a build (fold statistics and results).
_ARRAYS_PER_CELL = 32


@dataclass(frozen=True)
class Grid:
    """HEALPix pixels (Galactic, RING or NESTED) x distance edges (pc).

    Cumulative quantities live on the edges (``n_edges`` values per pixel), differential
    ones in the bins between them (``n_bins = n_edges - 1``).
    """

    nside: int
    distance_edges: np.ndarray
    ordering: str = "ring"

    def __post_init__(self):
        check_nside(self.nside)
        object.__setattr__(self, "ordering", check_choice("ordering", self.ordering, ("ring", "nested")))
        e = np.asarray(self.distance_edges, dtype=float)
        if e.ndim != 1 or e.size < 2 or not np.all(np.isfinite(e)):
            raise param_error("distance_edges", "a 1-D array of at least two finite distances", self.distance_edges)
        if e[0] < 0 or np.any(np.diff(e) <= 0):
            raise param_error("distance_edges", "non-negative and strictly increasing", e.tolist())
        object.__setattr__(self, "distance_edges", e)
        need = self.npix * e.size * 8 * _ARRAYS_PER_CELL
        if need > MAX_GRID_BYTES:
            raise param_error(
                "grid",
                f"small enough to build in memory (at most {MAX_GRID_BYTES / 2**30:.0f} GiB); "
                f"NSIDE {self.nside} x {e.size} distance edges needs about {need / 2**30:,.1f} GiB. "
                "Hint: lower nside= or use fewer distance bins (a larger distance_step=, a smaller "
                "distance_max= or fewer distance_edges=)",
                Described(f"NSIDE {self.nside} with {e.size} distance edges"),
            )

    @classmethod
    def linear(cls, distance_max=6000 * u.pc, distance_step=200 * u.pc, nside=32, ordering="ring"):
        """Edges 0, step, 2 step, ... up to ``distance_max`` (inclusive when it falls on a step)."""
        dmax = to_scalar("distance_max", distance_max, u.pc, default_unit=u.pc)
        step = to_scalar("distance_step", distance_step, u.pc, default_unit=u.pc)
        check_real("distance_max", dmax, 0, np.inf, low_inclusive=False)
        check_real("distance_step", step, 0, dmax, low_inclusive=False)
        n = int(np.ceil(dmax / step - 1e-9))
        return cls(nside, np.arange(n + 1) * step, ordering)

    @classmethod
    def log(cls, distance_min=50 * u.pc, distance_max=10000 * u.pc, n_bins=40, nside=32, ordering="ring"):
        """Edges 0 then ``n_bins`` logarithmically spaced bins from ``distance_min`` to ``distance_max``."""
        dmin = to_scalar("distance_min", distance_min, u.pc, default_unit=u.pc)
        dmax = to_scalar("distance_max", distance_max, u.pc, default_unit=u.pc)
        check_real("distance_min", dmin, 0, np.inf, low_inclusive=False)
        check_real("distance_max", dmax, dmin, np.inf, low_inclusive=False)
        n_bins = check_int("n_bins", n_bins, 1, 100_000)
        return cls(nside, np.concatenate([[0.0], np.geomspace(dmin, dmax, n_bins)]), ordering)

    @property
    def nest(self):
        return self.ordering == "nested"

    @property
    def npix(self):
        return healpix.nside2npix(self.nside)

    @property
    def n_edges(self):
        return self.distance_edges.size

    @property
    def n_bins(self):
        return self.distance_edges.size - 1

    @property
    def pixel_area(self):
        """Area of one pixel (Quantity, deg^2)."""
        return healpix.pixarea_deg2(self.nside) * u.deg**2

    def pixel(self, l_deg, b_deg):
        """Pixel index of Galactic positions (plain degrees)."""
        return healpix.ang2pix(self.nside, l_deg, b_deg, nest=self.nest)

    def pixel_centres(self, pixels=None):
        """Galactic (l, b) in degrees of pixel centres (all pixels by default)."""
        if pixels is None:
            pixels = np.arange(self.npix)
        return healpix.pix2ang(self.nside, pixels, nest=self.nest)

    def interp_weights(self, l_deg, b_deg):
        """HEALPix bilinear interpolation pixels and weights, each of shape (4, n)."""
        return healpix.interp_weights(self.nside, l_deg, b_deg, nest=self.nest)

    def edge_position(self, distance_pc):
        """Lower edge index ``k`` and fraction ``f`` in [0, 1] of each distance inside its bin.

        Distances beyond the last edge get the last bin with ``f > 1``.
        """
        return edge_index(self.distance_edges, distance_pc)

    def __repr__(self):
        e = self.distance_edges
        return (
            f"Grid(nside={self.nside}, ordering='{self.ordering}', {self.n_bins} distance bins "
            f"from {e[0]:g} to {e[-1]:g} pc)"
        )


def edges_info(edges):
    """(first edge, step) when the edges are evenly spaced, else None."""
    steps = np.diff(edges)
    step = float(edges[1] - edges[0])
    if np.allclose(steps, step, rtol=1e-12, atol=0.0):
        return float(edges[0]), step
    return None


_edges_info = edges_info  # old name


def edge_index(edges, d, k_out=None, f_out=None, uniform=None, work=None):
    """Lower edge ``k`` and fraction ``f`` of each distance among increasing ``edges``.

    Evenly spaced edges take one division and a floor, then a check against the edges
    themselves, so the result equals ``np.searchsorted(edges, d, side="right") - 1``;
    others use ``np.searchsorted``. Distances beyond the last edge get the last bin with
    ``f > 1``; below the first edge, bin 0 with ``f < 0``. ``work`` is optional buffers
    (two float, one int64, two bool arrays of the size of ``d``).
    """
    d = np.asarray(d, float)
    nb = edges.size - 1
    if work is None:
        work = (np.empty(d.shape), np.empty(d.shape), np.empty(d.shape, np.int64),
                np.empty(d.shape, bool), np.empty(d.shape, bool))
    lo, gap, j, m1, m2 = work
    k = np.empty(d.shape, dtype=np.int64) if k_out is None else k_out
    f = np.empty(d.shape) if f_out is None else f_out
    if uniform is None:
        uniform = edges_info(edges)
    if uniform is not None:
        e0, step = uniform
        np.subtract(d, e0, out=f)
        np.multiply(f, 1.0 / step, out=f)
        np.floor(f, out=f)
        np.clip(f, 0, nb - 1, out=f)
        np.copyto(k, f, casting="unsafe")
        # rounding in d / step can put a distance next to an edge in the wrong bin: check
        np.take(edges, k, out=lo)
        np.less(d, lo, out=m1)
        np.less(0, k, out=m2)
        m1 &= m2
        k -= m1
        np.add(k, 1, out=j)
        np.take(edges, j, out=lo)
        np.greater_equal(d, lo, out=m1)
        np.less(k, nb - 1, out=m2)
        m1 &= m2
        k += m1
    else:
        k[...] = np.searchsorted(edges, d, side="right") - 1
        np.clip(k, 0, nb - 1, out=k)
    np.take(edges, k, out=lo)
    np.take(np.diff(edges), k, out=gap)
    np.subtract(d, lo, out=f)
    np.divide(f, gap, out=f)
    return k, f
