"""Sufficient statistics of the binned model: sums of weights and weighted residuals per node.

Two schemes fill them. Monte Carlo (:func:`monte_carlo_statistics`): each tracer's draws of
distance and A_V, split between the two edges around each draw (cloud-in-cell) and spread
bilinearly over the 4 nearest pixels. Bin-scatter (:func:`nominal_statistics` over
:func:`tracer_sums`): one pass over the tracers, in blocks, described below.

For every tracer: its HEALPix pixel, its nearest distance edge, its residual from the
dust layer and its weight; then weighted sums per (pixel, distance edge). Each tracer goes
whole to its nearest edge ("nearest grid point" assignment; Hockney & Eastwood 1988,
Computer Simulation Using Particles, ch. 5): with millions of tracers the nodes are well
sampled, the distance kernel chosen by cross-validation smooths further, and one sum per
statistic costs half as much as splitting each tracer between the two edges around it
(the cloud-in-cell weights the Monte Carlo scheme uses for its draws). This is the
per-tracer step of builds from millions of tracers
(:meth:`dustkit.model.ExtinctionModel.fit` with ``uncertainty="bin-scatter"``, and the
chunks of :mod:`dustkit.scale`), so it is written for speed:

* element-wise work runs on blocks of ``_BLOCK`` tracers that stay in the CPU cache, in
  threads (numpy releases the GIL there), into buffers reused block after block: nothing
  is allocated per block (allocating and freeing arrays of a few MB costs more than the
  arithmetic on them);
* the sums (``np.bincount``, which holds the GIL) run in the calling thread, once per
  batch of ``_BATCH`` tracers.
"""

import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

from .._lib import healpix
from ..grid import edge_index, edges_info
from ..layer import layer_av_mu

__all__ = [
    "N_STATS", "Statistics", "count_beyond", "weight_floor", "tracer_sums", "nominal_statistics", "monte_carlo_statistics",
    "draw_residuals", "tracer_counts",
]

_BLOCK = 65_536       # tracers per element-wise block (working arrays of 0.5 MB: cache-sized)
_BATCH = 2_097_152    # tracers per batch of sums (one np.bincount call per statistic)
#: statistics, in the order of the model's arrays: sums of w, w r, w r^2, w^2 and of counts
N_STATS = 5


class _Batch:
    """Reusable per-tracer arrays of one batch: node index, count index and 4 weights."""

    def __init__(self, size):
        self.idx = np.empty(size, dtype=np.int64)   # (slot, pixel, nearest edge)
        self.cidx = np.empty(size, dtype=np.int64)  # (pixel, bin) for the counts
        self.q = np.empty((4, size))                # w, w r, w r^2, w^2


class _Scratch:
    """Reusable block-sized work arrays of one thread (nothing is allocated per block)."""

    def __init__(self, size=_BLOCK):
        self.mu = np.empty(size)
        self.u = np.empty(size)
        self.f = np.empty(size)
        self.t = (np.empty(size), np.empty(size))
        self.pix = healpix.work_buffers(size)  # for the pixel index (3 float, 3 int64)
        self.k = np.empty(size, dtype=np.int64)
        self.m = (np.empty(size, dtype=bool), np.empty(size, dtype=bool))

    def view(self, n):
        """The buffers cut to the first ``n`` elements."""
        v = _Scratch.__new__(_Scratch)
        v.mu, v.u, v.f, v.k = self.mu[:n], self.u[:n], self.f[:n], self.k[:n]
        v.t = tuple(a[:n] for a in self.t)
        v.pix = tuple(a[:n] for a in self.pix)
        v.m = tuple(a[:n] for a in self.m)
        return v


def _fill_block(grid, uniform, layer, weight_floor, l, b, d, av, ae, slot, batch, at, scratch, dump):
    """Per-tracer quantities of one block into ``batch`` rows ``at:at + len(l)``.

    Tracers beyond the last edge go to the node index ``dump`` (one past the statistics),
    which the caller drops: they only bound the extinction at the last edge from above.
    """
    n = l.size
    s = slice(at, at + n)
    sc = scratch.view(n) if n != scratch.mu.size else scratch
    mu, u, f = sc.mu, sc.u, sc.f
    np.multiply(b, np.pi / 180.0, out=mu)
    np.sin(mu, out=mu)
    pix = healpix.pixel_from_z(grid.nside, l, mu, nest=grid.nest, work=sc.pix)
    E, nb = grid.n_edges, grid.n_bins
    k, _ = edge_index(grid.distance_edges, d, sc.k, f, uniform, work=sc.t + sc.pix[3:4] + sc.m)
    # counts per (pixel, bin), with one more bin per pixel for tracers beyond the last edge
    cidx = batch.cidx[s]
    beyond, over = sc.m[1], sc.m[0]
    np.greater(f, 1.0, out=beyond)
    np.multiply(pix, nb + 1, out=cidx)
    cidx += k
    cidx += beyond
    # statistics at the nearest edge (beyond the last edge: the dump node, dropped)
    idx = batch.idx[s]
    if slot is not None:
        np.multiply(slot, grid.npix, out=idx)
        idx += pix
    else:
        idx[...] = pix
    idx *= E
    idx += k
    np.greater_equal(f, 0.5, out=over)
    idx += over
    np.putmask(idx, beyond, dump)
    w, wr, wr2, w2 = batch.q[:, s]
    # residual from the layer, r = A_V - layer, and weight w = 1 / (err^2 + floor^2)
    layer_av_mu(mu, d, layer.a0, layer.h, layer.z_sun, out=u, work=sc.t + sc.m)
    np.subtract(av, u, out=u)
    np.multiply(ae, ae, out=w)
    w += weight_floor**2
    np.reciprocal(w, out=w)
    np.multiply(w, u, out=wr)
    np.multiply(wr, u, out=wr2)
    np.multiply(w, w, out=w2)


def _fill_range(grid, uniform, layer, weight_floor, arrays, slot, lo, hi, batch, at, scratch, dump):
    """Fill ``batch`` rows ``at:`` with tracers ``lo:hi``, block by block."""
    l, b, d, av, ae = arrays
    for s in range(lo, hi, _BLOCK):
        e = min(s + _BLOCK, hi)
        _fill_block(grid, uniform, layer, weight_floor, l[s:e], b[s:e], d[s:e], av[s:e], ae[s:e],
                    None if slot is None else slot[s:e], batch, at + s - lo, scratch, dump)


def tracer_sums(grid, layer, weight_floor, l, b, d, av, ae, slot=None, n_slots=1, bar=None, threads=None):
    """Per-slot sufficient statistics and tracer counts of nominal tracers.

    Parameters
    ----------
    grid : Grid
    layer : DustLayer
    weight_floor : float
        mag; each tracer's weight is ``1 / (av_err^2 + weight_floor^2)``.
    l, b, d, av, ae : ndarray
        Galactic longitude and latitude (deg), distance (pc), A_V and its error (mag).
    slot : ndarray of int, optional
        Which set of statistics each tracer adds to (e.g. its cross-validation fold), in
        ``0 .. n_slots - 1``; all in one set by default.
    bar : progress bar, optional
        Advanced by the number of tracers of each batch.
    threads : int, optional
        Threads for the element-wise work (default: the CPU's cores, at most 8). The sums
        run in the calling thread between batches.

    Returns
    -------
    stats : ndarray (5, n_slots, npix, n_edges)
        Sums of w, w r, w r^2, w^2 and of counts, each tracer at its nearest distance
        edge. Tracers beyond the last edge are left out: their A_V is an upper bound on
        the extinction at the last edge, not a measurement of it (taking them as one biased
        the far end high behind distant clouds).
    counts : ndarray (npix * n_bins,) of int64
        Tracers whose distance falls in each (pixel, bin), summed over slots; tracers beyond
        the last edge are not counted.
    """
    arrays = tuple(np.asarray(a, float) for a in (l, b, d, av, ae))
    n = arrays[0].size
    E, npix, nb = grid.n_edges, grid.npix, grid.n_bins
    size = n_slots * npix * E
    uniform = edges_info(grid.distance_edges)
    stats = np.zeros((N_STATS, size + 1))  # one more node: the dump of tracers beyond the last edge
    counts = np.zeros(npix * (nb + 1), dtype=np.int64)
    batch = _Batch(min(_BATCH, max(n, 1)))
    if threads is None:
        threads = min(os.cpu_count() or 1, 8)
    threads = max(1, min(int(threads), -(-n // _BLOCK)))
    scratch = [_Scratch() for _ in range(threads)]
    pool = ThreadPoolExecutor(threads) if threads > 1 else None
    try:
        for lo in range(0, n, _BATCH):
            hi = min(lo + _BATCH, n)
            # split the batch into whole blocks, one contiguous run per thread
            cuts = np.minimum(lo + np.ceil(np.linspace(0, (hi - lo) / _BLOCK, threads + 1)).astype(int) * _BLOCK, hi)
            jobs = [(int(a), int(c), sc) for a, c, sc in zip(cuts[:-1], cuts[1:], scratch) if c > a]
            run = lambda job: _fill_range(grid, uniform, layer, weight_floor, arrays, slot, job[0], job[1],  # noqa: E731
                                          batch, job[0] - lo, job[2], size)
            list(pool.map(run, jobs) if pool is not None else map(run, jobs))
            m = hi - lo
            idx = batch.idx[:m]
            for j in range(4):
                stats[j] += np.bincount(idx, batch.q[j, :m], size + 1)
            stats[4] += np.bincount(idx, minlength=size + 1)
            counts += np.bincount(batch.cidx[:m], minlength=counts.size)
            if bar is not None:
                bar.update(m)
    finally:
        if pool is not None:
            pool.shutdown()
    counts = counts.reshape(npix, nb + 1)[:, :nb]  # the extra bin held tracers beyond the last edge
    return stats[:, :size].reshape(N_STATS, n_slots, npix, E), np.ascontiguousarray(counts).reshape(-1)


#: mag added in quadrature to each tracer's A_V error in its weight, at least (see weight_floor)
WEIGHT_FLOOR_MAG = 0.05  # keeps a few very precise tracers from dominating a node


@dataclass(frozen=True)
class Statistics:
    """The sufficient statistics a model is finished from.

    ``total`` (5, npix, n_edges): sums of w, w r, w r^2, w^2 and n over all tracers;
    ``fold_stats`` (5, n_folds, npix, n_edges): the same for the held-out tracers of each
    fold (fold ``f`` is predicted from ``total - fold_stats[:, f]``); ``counts``
    (npix * n_bins,): tracers per pixel and distance bin from nominal positions;
    ``n_beyond``: tracers beyond the last distance edge, left out of the sums (their A_V
    only bounds the extinction at the last edge from above).
    """

    total: np.ndarray
    fold_stats: np.ndarray
    counts: np.ndarray
    n_beyond: int = 0

    def __iter__(self):  # unpacks as (total, fold_stats, counts)
        return iter((self.total, self.fold_stats, self.counts))


def count_beyond(grid, d):
    """Tracers (or draws) whose distance lies beyond the last distance edge."""
    return int(np.count_nonzero(np.asarray(d) > grid.distance_edges[-1]))


def weight_floor(layer):
    """mag added in quadrature to each tracer's A_V error in its weight."""
    return max(layer.scatter, WEIGHT_FLOOR_MAG)


def draw_residuals(layer, b, d, d_err, av, av_err, n_draws, rng):
    """Monte Carlo draws of each tracer's distance, with its residual from the layer.

    Each tracer's residual from the layer at its catalogued distance (its A_V drawn within
    its error) is spread over ``n_draws`` log-normal draws of its distance: the residual,
    the part of the extinction the smooth layer does not explain, is what is placed at the
    tracer's uncertain distance. (Differencing the layer at each drawn distance instead adds
    the layer's own slope times the distance error as noise to every draw.)

    Returns distances (n_draws, n) and residuals (n_draws, n).
    """
    base = av - layer.av_pc(b, d)
    frac = np.where(d > 0, d_err / d, 0.0)
    dd = d[None, :] * np.exp(rng.standard_normal((n_draws, d.size)) * frac[None, :])
    rr = base[None, :] + rng.standard_normal((n_draws, d.size)) * av_err[None, :]
    return dd, rr


def _accumulate(grid, n_folds, pix, fold, dist, resid, weight, per_draw, sky_weight, out):
    """Add one chunk of draws of tracers to the per-fold sufficient statistics.

    ``out`` has shape (5, n_folds, npix, n_edges): sums of w, w r, w r^2, w^2, n with
    cloud-in-cell weights in distance. ``per_draw`` is 1 / n_draws. ``pix`` and
    ``sky_weight`` have shape (4, n): bilinear assignment on the sky (the transpose of the
    interpolation used to answer queries).
    """
    E = grid.n_edges
    size = n_folds * grid.npix * E
    flat = out.reshape(5, size)
    k, f = grid.edge_position(dist)
    inside = f <= 1.0  # draws beyond the last edge only bound it from above: left out
    f = np.clip(f, 0.0, 1.0)
    wt = np.broadcast_to(weight, dist.shape)
    pix = np.asarray(pix)[:, None, :]
    sky_weight = np.asarray(sky_weight)[:, None, :]
    row = (np.asarray(fold).reshape(1, 1, -1) * grid.npix + pix) * E  # (4, 1, n)
    for shift, c in ((0, 1.0 - f), (1, f)):
        c = c * (per_draw * inside)  # (draws, n)
        idx = (row + (k + shift)[None]).ravel()
        cs = (sky_weight * c[None]).ravel()
        wc = (sky_weight * (wt * c)[None]).ravel()
        rr = np.broadcast_to(resid[None], (sky_weight.shape[0],) + resid.shape).ravel()
        w2 = np.broadcast_to(wt[None], (sky_weight.shape[0],) + wt.shape).ravel()
        flat[0] += np.bincount(idx, wc, size)
        flat[1] += np.bincount(idx, wc * rr, size)
        flat[2] += np.bincount(idx, wc * rr * rr, size)
        flat[3] += np.bincount(idx, w2 * wc, size)
        flat[4] += np.bincount(idx, cs, size)
    return out


def _chunk_statistics(grid, layer, l, b, d, de, av, ae, fold, draws, rng, out):
    """Add one chunk of tracers' Monte Carlo draws to the per-fold statistics ``out``.

    Each tracer's ``draws`` draws of distance and A_V are spread bilinearly over the 4
    nearest pixels, the transpose of the interpolation that answers queries. (The
    bin-scatter scheme, for very large catalogues, takes nominal values instead and puts
    each tracer in its own pixel, which is cheaper; the sky kernel chosen by
    cross-validation does the spreading: :func:`tracer_sums`.)
    """
    weight = 1.0 / (ae**2 + weight_floor(layer) ** 2)
    dd, rr = draw_residuals(layer, b, d, de, av, ae, draws, rng)
    sky_pix, sky_w = grid.interp_weights(l, b)
    return _accumulate(grid, out.shape[1], sky_pix, fold, dd, rr, weight[None, :], 1.0 / draws, sky_w, out)


def tracer_counts(grid, l, b, d):
    """Tracers per (pixel, distance bin) from nominal positions, flat (npix * n_bins)."""
    pix = grid.pixel(l, b)
    k, f = grid.edge_position(d)
    inside = f <= 1.0
    return np.bincount(pix[inside] * grid.n_bins + k[inside], minlength=grid.npix * grid.n_bins)


def nominal_statistics(grid, layer, l, b, d, av, ae, fold=None, n_folds=1, held=None, bar=None, threads=None):
    """Statistics of the bin-scatter scheme (a :class:`Statistics`).

    Either ``fold`` (K-fold: the fold of every tracer, ``0 .. n_folds - 1``) or ``held``
    (the rows of one held-out set) is given. Shared by :meth:`ExtinctionModel.fit` and the
    chunks of :mod:`dustkit.scale`.
    """
    wf = weight_floor(layer)
    n_beyond = count_beyond(grid, d)
    if fold is not None:
        stats, counts = tracer_sums(grid, layer, wf, l, b, d, av, ae, fold, n_folds, bar=bar, threads=threads)
        return Statistics(stats.sum(axis=1), stats, counts, n_beyond)
    stats, counts = tracer_sums(grid, layer, wf, l, b, d, av, ae, bar=bar, threads=threads)
    h = np.asarray(held, dtype=np.int64)
    fold_stats, _ = tracer_sums(grid, layer, wf, l[h], b[h], d[h], av[h], ae[h], threads=threads)
    return Statistics(stats[:, 0], fold_stats, counts, n_beyond)


def monte_carlo_statistics(grid, layer, l, b, d, de, av, ae, slot, n_slots, draws, rng, bar=None):
    """Statistics of the Monte Carlo scheme, (5, n_slots, npix, n_edges), in chunks of about 2 million draws.

    ``slot`` is each tracer's set of statistics (its fold, or 0 for the held-out set and 1
    for the others); ``rng`` draws the distances and A_V (the same generator, in the same
    order, gives the same model).
    """
    n = l.size
    stats = np.zeros((5, n_slots, grid.npix, grid.n_edges))
    chunk = max(1, 2_000_000 // draws)
    for s in range(0, n, chunk):
        sl = slice(s, s + chunk)
        _chunk_statistics(grid, layer, l[sl], b[sl], d[sl], de[sl], av[sl], ae[sl], slot[sl], draws, rng, out=stats)
        if bar is not None:
            bar.update(min(chunk, n - s))
    return stats
