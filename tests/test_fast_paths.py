"""The numpy fast paths of large builds and answers, against reference libraries.

dustkit computes HEALPix pixel indices and interpolation weights itself (plain numpy, in
cache-sized blocks) and sums tracers per (pixel, distance edge) in one buffered pass.
Each is checked here against an outside reference: healpy (the HEALPix reference library,
Gorski et al. 2005), ``np.searchsorted`` and a direct ``np.add.at`` accumulation (common
practice), and scipy's isotonic regression.
"""

import healpy as hp
import numpy as np
import pytest
from astropy import units as u

from dustkit import ExtinctionModel
from dustkit import _healpix
from dustkit._sums import tracer_sums
from dustkit.grid import Grid, edge_index
from dustkit.layer import DustLayer
from dustkit.model import _HELDOUT_MAX, heldout_rows
from dustkit.simulate import DustField, simulate_tracers
from dustkit.tracers import read_tracers


def _sky(n, seed):
    """Positions uniform on the sphere plus awkward ones: poles, l = 0 and a hair below 360."""
    rng = np.random.default_rng(seed)
    l = rng.uniform(0, 360, n)
    b = np.rad2deg(np.arcsin(rng.uniform(-1, 1, n)))
    l[:6] = [0.0, 90.0, np.nextafter(360.0, 0.0), 180.0, 45.0, 300.0]
    b[:6] = [90.0, -90.0, 0.3, 89.9999, -89.99999, 41.8103149]  # 41.81 deg: z = 2/3, the cap boundary
    return l, b


@pytest.mark.parametrize("nside", [1, 2, 4, 32, 64, 1024])
@pytest.mark.parametrize("nest", [False, True])
def test_pixel_index_equals_healpy(nside, nest):
    # healpy.ang2pix is the reference implementation of the HEALPix standard (Gorski et al. 2005)
    l, b = _sky(300_000, nside)
    ours = _healpix.ang2pix(nside, l, b, nest=nest)
    ref = hp.ang2pix(nside, l, b, nest=nest, lonlat=True)
    assert np.array_equal(ours, ref)


@pytest.mark.parametrize("nside", [1, 2, 4, 32, 64, 1024])
def test_pixel_centres_equal_healpy(nside):
    # healpy.pix2ang (the HEALPix reference, Gorski et al. 2005) for every RING pixel: dustkit computes the
    # centres in numpy (no astropy-healpix import for a build); equal to rounding, and each centre lies in its pixel
    pix = np.arange(12 * nside * nside)
    l, b = _healpix.pix2ang(nside, pix)
    ref_l, ref_b = hp.pix2ang(nside, pix, lonlat=True)
    np.testing.assert_allclose(l, ref_l, rtol=0, atol=1e-9)
    np.testing.assert_allclose(b, ref_b, rtol=0, atol=1e-9)
    assert np.array_equal(hp.ang2pix(nside, l, b, lonlat=True), pix)
    assert _healpix.nside2npix(nside) == hp.nside2npix(nside)
    assert _healpix.pixarea_deg2(nside) == pytest.approx(hp.nside2pixarea(nside, degrees=True), rel=1e-14)


@pytest.mark.parametrize("nside", [1, 2, 4, 8, 64, 128, 256])
@pytest.mark.parametrize("nest", [False, True])
def test_neighbours_equal_healpy(nside, nest):
    # healpy.get_all_neighbours (HEALPix reference): the 8 neighbours of every pixel in the order SW, W, NW, N,
    # NE, E, SE, S, -1 where a pixel at a face corner has only 7 (numpy for RING up to NSIDE 128)
    pix = np.arange(12 * nside * nside)
    assert np.array_equal(_healpix.neighbours(nside, pix, nest=nest), hp.get_all_neighbours(nside, pix, nest=nest))


@pytest.mark.parametrize("nside", [1, 4, 32, 256])
@pytest.mark.parametrize("nest", [False, True])
def test_interpolation_weights_equal_healpy(nside, nest):
    # healpy.get_interp_weights (HEALPix reference library): same 4 pixels, same weights
    l, b = _sky(200_000, 10 + nside)
    pix, w = _healpix.interp_weights(nside, l, b, nest=nest)
    ref_pix, ref_w = hp.get_interp_weights(nside, l, b, nest=nest, lonlat=True)
    assert np.array_equal(pix, ref_pix)
    # the weights are angle offsets over the pixel spacing 2 pi / (4 NSIDE): a float64 rounding of
    # the angle (eps * 2 pi) becomes eps * 4 NSIDE in a weight; allow 256 such ulp, which holds on any
    # x86-64 CPU whatever order its libm rounds in (healpy vs numpy differ by ~1e-13 at NSIDE 256)
    tol = 256 * np.finfo(float).eps * 4 * nside
    assert np.max(np.abs(w - ref_w)) <= tol
    assert np.allclose(w.sum(axis=0), 1.0)


@pytest.mark.parametrize("edges", [np.arange(41) * 150.0, np.arange(30) * 0.1 * 7, np.array([0, 100, 300, 700, 1500, 3000.0]),
                                   100.0 + np.arange(12) * 250.0])
def test_edge_index_equals_searchsorted(edges):
    # the definition: k = searchsorted(edges, d, side="right") - 1 clipped to a bin (common practice)
    rng = np.random.default_rng(0)
    d = np.concatenate([rng.uniform(0, edges[-1] * 1.2, 50_000), edges, np.nextafter(edges, 0), [0.0]])
    k, f = edge_index(edges, d)
    ref = np.clip(np.searchsorted(edges, d, side="right") - 1, 0, edges.size - 2)
    assert np.array_equal(k, ref)
    # the fraction's rounding: eps * |d| over the bin width, times 64 ulp of head-room (float64 resolution)
    tol = 64 * np.finfo(float).eps * d.max() / np.diff(edges).min()
    assert np.max(np.abs(f - (d - edges[ref]) / (edges[ref + 1] - edges[ref]))) <= tol
    assert np.array_equal(Grid(8, edges).edge_position(d)[0], ref)


def _direct_sums(grid, layer, floor, l, b, d, av, ae, slot, n_slots):
    """The definition of the statistics, one tracer at a time with np.add.at (common practice)."""
    pix = hp.ang2pix(grid.nside, l, b, nest=grid.nest, lonlat=True)
    e = grid.distance_edges
    k = np.clip(np.searchsorted(e, d, side="right") - 1, 0, e.size - 2)
    nearest = np.argmin(np.abs(d[:, None] - e[None, :]), axis=1)
    r = av - layer._av(b, d)
    w = 1.0 / (ae**2 + floor**2)
    inside = (d - e[k]) / (e[k + 1] - e[k]) <= 1.0
    # tracers beyond the last edge are left out: their A_V is only an upper bound there (common practice
    # for censored data: a bound is not a measurement)
    out = np.zeros((5, n_slots, grid.npix, grid.n_edges))
    for j, q in enumerate((w, w * r, w * r * r, w * w, np.ones_like(w))):
        np.add.at(out[j], (slot[inside], pix[inside], nearest[inside]), q[inside])
    counts = np.zeros((grid.npix, grid.n_bins), dtype=np.int64)
    np.add.at(counts, (pix[inside], k[inside]), 1)
    return out, counts.ravel()


@pytest.mark.parametrize("ordering", ["ring", "nested"])
def test_tracer_sums_equal_direct_accumulation(ordering):
    # each tracer's weight, weighted residual etc. summed at its nearest distance edge
    rng = np.random.default_rng(7)
    n = 300_000  # more than one batch of blocks, several threads
    l, b = rng.uniform(0, 360, n), np.rad2deg(np.arcsin(rng.uniform(-0.9, 0.9, n)))
    d = rng.uniform(0, 7000, n)  # some beyond the last edge (6 kpc)
    d[:41] = np.arange(41) * 150.0  # exactly on edges
    d[41:81] = np.arange(40) * 150.0 + 75.0001  # just past bin midpoints
    av, ae = rng.normal(1.0, 1.0, n), rng.uniform(0.02, 0.2, n)
    slot = rng.integers(0, 3, n)
    grid = Grid(16, np.arange(41) * 150.0, ordering)
    layer = DustLayer(a0=1.1, h=115.0, z_sun=18.0)
    ref, ref_counts = _direct_sums(grid, layer, 0.1, l, b, d, av, ae, slot, 3)
    for threads in (1, 2):
        ours, counts = tracer_sums(grid, layer, 0.1, l, b, d, av, ae, slot, 3, threads=threads)
        assert np.allclose(ours, ref, rtol=1e-10, atol=1e-9)
        assert np.array_equal(counts, ref_counts)
    assert counts.sum() == np.count_nonzero(d <= 6000.0)


def test_large_catalogues_hold_out_one_set():
    assert heldout_rows(_HELDOUT_MAX, 5) is None  # K-fold up to 50 000 tracers
    rows = heldout_rows(60_000, 5, random_state=3)
    assert rows.size == 12_000 and np.all(np.diff(rows) > 0) and rows[-1] < 60_000  # a fold's worth
    assert heldout_rows(10_000_000, 5).size == _HELDOUT_MAX
    assert np.array_equal(rows, heldout_rows(60_000, 5, random_state=3))
    # a 60 000-tracer build validates on that set and says so
    t = simulate_tracers(DustField(), 60_000, l_range=(0, 90), b_range=(-10, 10), distance_max=4000, rng=5)
    m = ExtinctionModel(nside=16, distance_max=4 * u.kpc, distance_step=250 * u.pc, quiet=True).fit(read_tracers(t))
    assert m.uncertainty_scheme_ == "monte-carlo"  # per-tracer draws up to 300 000 tracers ("auto")
    n_far = np.count_nonzero(np.asarray(t["distance"]) > 4000)  # beyond the grid: bounds, not checks
    assert m.cv_.meta["validation"].startswith("one held-out set of 12000 tracers")
    assert m.build_report_["beyond_grid"] == n_far > 0
    assert np.all(np.diff(m.av_, axis=1) >= 0)
