"""The extinction model: smooth dust layer + HEALPix x distance binned cumulative A_V.

How a model is built (``ExtinctionModel.fit``):

1. Fit the smooth exponential dust layer to the tracers (:func:`dustkit.layer.fit_layer`;
   a random 50 000 of them in larger catalogues).
2. Take each tracer's residual from the layer (the extinction the layer does not explain)
   and spread it over Monte Carlo draws of its distance (log-normal) and A_V (normal), so
   a tracer informs the cumulative extinction at its own uncertain distance. Large
   catalogues skip the draws and use the scatter within bins instead
   (``uncertainty_scheme_`` records which).
3. Accumulate weighted sums of the residuals per (pixel, distance edge): the sufficient
   statistics of the model. Monte Carlo draws are split between the two edges around
   them with linear (cloud-in-cell) weights and spread bilinearly over the 4 nearest
   pixels; in the bin-scatter scheme each tracer goes whole to its own pixel and nearest
   edge, in one fast pass (:mod:`dustkit._sums`).
4. Smooth the statistics on the sky with a neighbour kernel (HEALPix 8-neighbours,
   repeated passes) and combine along each sight line with a random-walk state-space model
   of the cumulative residual (Kalman filter + Rauch-Tung-Striebel smoother; Rauch, Tung &
   Striebel 1965, AIAA J. 3, 1445). Where a pixel has no tracers the residual relaxes to 0,
   i.e. the model falls back to the layer, with an uncertainty that grows with distance;
   beyond the last tracer the residual is carried forward with growing uncertainty.
5. Choose the sky kernel width, the distance kernel width and the random-walk strength by
   cross-validation on held-out tracers (K-fold up to 50 000 tracers; above, one random
   held-out set of 50 000, the others training), and calibrate the predictive
   uncertainty (the scatter of extinction around the model on scales it cannot resolve)
   by maximum likelihood on held-out tracers, integrating over their distance errors, so
   that 1-sigma intervals cover about 68% of the truth. The held-out tracers are
   predicted only where they are: the nodes of their interpolation pixels, computed from
   the training tracers' sums (``cv_.meta["validation"]`` records the scheme).
6. Enforce non-decreasing cumulative A_V along every pixel's sight line by weighted
   isotonic regression (Barlow et al. 1972).

Answers at any (l, b, d) evaluate the layer at the exact position and add the binned
residual interpolated bilinearly on the sky (the HEALPix interpolation of
``healpy.get_interp_weights``, computed in numpy blocks by :mod:`dustkit._lib.healpix`) and
linearly in distance, so the answer is not constant across a pixel.
"""

import os
from concurrent.futures import ThreadPoolExecutor

import numpy as np
from astropy import units as u
from astropy.coordinates import SkyCoord
from astropy.table import QTable
from scipy import sparse

from ._lib import healpix
from .exceptions import CatalogError, ModelNotFittedError
from ._lib.isotonic import isotonic_rows
from ._sums import tracer_sums
from ._lib.progress import progress
from ._lib.sky import separation_deg
from ._lib.validation import check_choice, check_int, check_real, param_error, to_value
from .grid import Grid
from .layer import DustLayer, fit_layer

__all__ = ["ExtinctionModel", "CAUTION", "model_state", "model_from_state"]

#: Shown wherever model answers are reported.
CAUTION = (
    "Extinction estimates from a model are statistical: they describe the average dust "
    "toward a direction and distance, with an uncertainty that includes the typical "
    "small-scale scatter. Check them against local data before using them for science or "
    "for planning instrument time."
)

_WEIGHT_FLOOR_MAG = 0.05  # mag; keeps a few very precise tracers from dominating a node
_NEIGHBOUR_WEIGHT = 0.25  # weight of each of the 8 neighbours in one sky-smoothing pass
_PRIOR_COUNT = 2.0        # pseudo-count pooling a node's scatter toward its edge's median
_STUDENT_NU = 8.0         # degrees of freedom of the predictive distribution
_MC_LIMIT = 300_000       # above this many tracers "auto" switches to the bin-scatter scheme
_HELDOUT_MAX = 50_000     # above this many tracers, one held-out set of at most this size
_CACHE_BYTES = 768 * 2**20  # smoothed statistics kept during cross-validation when they fit


# ----------------------------------------------------------------------------- internals

def _tracer_arrays(tracers):
    return tuple(np.asarray(getattr(tracers, k), float) for k in ("l", "b", "distance", "distance_err", "av", "av_err"))


def _draw_residuals(layer, b, d, d_err, av, av_err, n_draws, rng):
    """Monte Carlo draws of each tracer's distance, with its residual from the layer.

    Each tracer's residual from the layer at its catalogued distance (its A_V drawn within
    its error) is spread over ``n_draws`` log-normal draws of its distance: the residual,
    the part of the extinction the smooth layer does not explain, is what is placed at the
    tracer's uncertain distance. (Differencing the layer at each drawn distance instead adds
    the layer's own slope times the distance error as noise to every draw.)

    Returns distances (n_draws, n) and residuals (n_draws, n).
    """
    base = av - layer._av(b, d)
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
    f = np.clip(f, 0.0, 1.0)  # beyond the last edge: all weight on the last edge
    wt = np.broadcast_to(weight, dist.shape)
    pix = np.asarray(pix)[:, None, :]
    sky_weight = np.asarray(sky_weight)[:, None, :]
    row = (np.asarray(fold).reshape(1, 1, -1) * grid.npix + pix) * E  # (4, 1, n)
    for shift, c in ((0, 1.0 - f), (1, f)):
        c = c * per_draw  # (draws, n)
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


def _weight_floor(layer):
    """mag added in quadrature to each tracer's A_V error in its weight."""
    return max(layer.scatter, _WEIGHT_FLOOR_MAG)


def heldout_rows(n, n_folds, random_state=0):
    """Rows held out to choose the smoothing and calibrate the errors, or None for K-fold.

    Up to ``_HELDOUT_MAX`` tracers every tracer is held out once (K-fold cross-validation,
    folds from :func:`dustkit.scale.fold_of_rows`). Larger catalogues hold out one random
    set of ``min(_HELDOUT_MAX, n // n_folds)`` rows (sorted) and train on all the others:
    tens of thousands of held-out tracers pin down a handful of smoothing and error
    parameters, and the finishing cost no longer grows with the number of folds.
    """
    if n <= _HELDOUT_MAX:
        return None
    m = min(_HELDOUT_MAX, n // n_folds)
    return np.sort(np.random.default_rng([int(random_state) & 0xFFFFFFFF, 0x4E1D]).choice(n, m, replace=False))


def _nominal_statistics(grid, layer, l, b, d, av, ae, fold=None, n_folds=1, held=None, bar=None, threads=None):
    """Statistics of the bin-scatter scheme: ``(total, fold_stats, counts)`` (see ``_finish``).

    Either ``fold`` (K-fold: the fold of every tracer, ``0 .. n_folds - 1``) or ``held``
    (the rows of one held-out set) is given. Shared by :meth:`ExtinctionModel.fit` and the
    chunks of :mod:`dustkit.scale`.
    """
    wf = _weight_floor(layer)
    if fold is not None:
        stats, counts = tracer_sums(grid, layer, wf, l, b, d, av, ae, fold, n_folds, bar=bar, threads=threads)
        return stats.sum(axis=1), stats, counts
    stats, counts = tracer_sums(grid, layer, wf, l, b, d, av, ae, bar=bar, threads=threads)
    h = np.asarray(held, dtype=np.int64)
    fold_stats, _ = tracer_sums(grid, layer, wf, l[h], b[h], d[h], av[h], ae[h], threads=threads)
    return stats[:, 0], fold_stats, counts


def _chunk_statistics(grid, layer, l, b, d, de, av, ae, fold, draws, rng, out):
    """Add one chunk of tracers' Monte Carlo draws to the per-fold statistics ``out``.

    Each tracer's ``draws`` draws of distance and A_V are spread bilinearly over the 4
    nearest pixels, the transpose of the interpolation that answers queries. (The
    bin-scatter scheme, for very large catalogues, takes nominal values instead and puts
    each tracer in its own pixel, which is cheaper; the sky kernel chosen by
    cross-validation does the spreading: :func:`dustkit._sums.tracer_sums`.)
    """
    weight = 1.0 / (ae**2 + _weight_floor(layer) ** 2)
    dd, rr = _draw_residuals(layer, b, d, de, av, ae, draws, rng)
    sky_pix, sky_w = grid.interp_weights(l, b)
    return _accumulate(grid, out.shape[1], sky_pix, fold, dd, rr, weight[None, :], 1.0 / draws, sky_w, out)


def _counts(grid, l, b, d):
    """Tracers per (pixel, distance bin) from nominal positions, flat (npix * n_bins)."""
    pix = grid.pixel(l, b)
    k, f = grid.edge_position(d)
    inside = f <= 1.0
    return np.bincount(pix[inside] * grid.n_bins + k[inside], minlength=grid.npix * grid.n_bins)


def _neighbour_matrix(grid):
    """Sparse (npix, npix) matrix of one sky-smoothing pass: 1 on the diagonal, beta for neighbours."""
    npix = grid.npix
    nb = healpix.neighbours(grid.nside, np.arange(npix), nest=grid.nest)
    rows = np.repeat(np.arange(npix)[None, :], nb.shape[0], axis=0)
    ok = nb >= 0
    data = np.full(ok.sum(), _NEIGHBOUR_WEIGHT)
    m = sparse.csr_matrix((data, (rows[ok], nb[ok])), shape=(npix, npix))
    return (m + sparse.identity(npix, format="csr")).tocsr()


def _kernels(grid, passes_list, pixels, one):
    """Sky kernels (K, K squared element-wise) for each number of smoothing passes.

    Restricted to ``pixels`` (rows and columns): the rows are computed as ``K[pixels] =
    K_1[pixels] K_1 ... K_1``, so the cost grows with the pixels in use, not the sky; paths
    through other pixels are kept. No smoothing (0 passes) is ``None``. ``one`` is the
    one-pass matrix (:func:`_neighbour_matrix`).
    """
    out = {}
    k = sparse.csr_matrix((np.ones(pixels.size), (np.arange(pixels.size), pixels)), shape=(pixels.size, grid.npix))
    for p in range(max(passes_list) + 1):
        if p in passes_list and p > 0:
            kk = k[:, pixels].tocsr()
            out[p] = (kk, kk.multiply(kk).tocsr())
        elif p in passes_list:
            out[p] = None
        k = (k @ one).tocsr()
    return out


def _smooth(stats, kernel):
    """Apply a sky kernel to statistics of shape (5, ..., npix, E) (``None``: no smoothing)."""
    if kernel is None:
        return stats
    k, k2 = kernel  # (rows, npix): all pixels, or some rows of the kernel
    s = np.moveaxis(stats, -2, 0)  # (npix, 5, ..., E)
    shape = (k.shape[0],) + s.shape[1:]
    flat = s.reshape(s.shape[0], -1)
    sm = (k @ flat).reshape(shape)
    sm2 = (k2 @ s[:, 3].reshape(s.shape[0], -1)).reshape((shape[0],) + shape[2:])
    sm[:, 3] = sm2  # the sum of squared weights takes the squared kernel (Kish effective size)
    return np.ascontiguousarray(np.moveaxis(sm, 0, -2))


def _distance_kernel(edges_pc, sigma_pc):
    """Gaussian smoothing matrices (G, G squared) along the distance edges; None for sigma 0."""
    if sigma_pc <= 0:
        return None
    g = np.exp(-0.5 * ((edges_pc[:, None] - edges_pc[None, :]) / sigma_pc) ** 2)
    g[0] = 0.0
    g[0, 0] = 1.0  # the node at the first edge is not blurred into farther ones
    return g, g * g


def _smooth_distance(stats, kernel):
    """Apply a distance kernel along the last axis of statistics of shape (5, ..., E) (``None``: none)."""
    if kernel is None:
        return stats
    g, g2 = kernel
    E = stats.shape[-1]
    out = (stats.reshape(-1, E) @ g.T).reshape(stats.shape)
    out[3] = (stats[3].reshape(-1, E) @ g2.T).reshape(stats.shape[1:])
    return out


def _pixel_median(values, good):
    """Median of ``values`` over the pixels (axis -2) where ``good``, for each other index; NaN where none."""
    v = np.sort(np.where(good, values, np.inf).swapaxes(-1, -2), axis=-1)  # (..., E, P)
    c = np.count_nonzero(good, axis=-2)  # (..., E)
    lo = np.take_along_axis(v, np.maximum((c - 1) // 2, 0)[..., None], axis=-1)[..., 0]
    hi = np.take_along_axis(v, np.maximum(c // 2, 0)[..., None], axis=-1)[..., 0]
    return np.where(c > 0, 0.5 * (lo + hi), np.nan)


def _node_observations(st):
    """Per-node mean residual, its variance, and effective tracer count from smoothed sums."""
    w, wr, wr2, w2, n = st
    with np.errstate(divide="ignore", invalid="ignore"):
        mean = np.where(w > 0, wr / w, 0.0)
        var = np.where(w > 0, np.maximum(wr2 / w - mean**2, 0.0), 0.0)
        neff = np.where(w2 > 0, w**2 / w2, 0.0)
        neff = np.minimum(neff, n)
    good = neff > 0.05
    # pool each node's scatter with the median scatter at its edge (few tracers -> pooled value)
    vmed = _pixel_median(var, good)  # (..., E)
    finite = np.isfinite(vmed)
    fallback = _pixel_median(vmed[..., None], finite[..., None])  # over the edges: (..., 1)
    fallback = np.where(np.isfinite(fallback), fallback, 0.01)
    vmed = np.where(finite, vmed, fallback)[..., None, :]
    vreg = (neff * var + _PRIOR_COUNT * vmed) / (neff + _PRIOR_COUNT)
    with np.errstate(divide="ignore", invalid="ignore"):
        obs_var = np.where(good, vreg / np.maximum(neff, 1e-12), np.inf)
    return mean, obs_var, neff


def _kalman_smooth(mean, obs_var, edges_pc, q):
    """Random-walk Kalman filter + RTS smoother along the last axis (distance edges).

    State: the cumulative residual R_k; R_k = R_{k-1} + eta, var(eta) = q * (e_k - e_{k-1}) [kpc].
    Nodes without an observation have ``obs_var = inf``. Vectorised over the leading axes
    (pixels); the loop runs over the few tens of distance edges only.
    """
    E = edges_pc.size
    shape = mean.shape
    m = np.ascontiguousarray(mean.reshape(-1, E).T)  # (E, P): each step reads contiguous rows
    ov = np.ascontiguousarray(obs_var.reshape(-1, E).T)  # inf where a node has no observation
    step = q * np.diff(edges_pc) / 1000.0
    P = m.shape[1]
    xf = np.empty((E, P))  # filtered, then (in place) smoothed mean
    pf = np.empty((E, P))  # filtered, then smoothed variance
    pp = np.empty((E, P))  # predicted variance
    x = np.zeros(P)
    p = np.full(P, q * edges_pc[0] / 1000.0)
    gain, tmp = np.empty(P), np.empty(P)
    for k in range(E):  # loop over distance edges, vectorised over pixels
        if k > 0:
            p += step[k - 1]
        pp[k] = p
        np.add(p, ov[k], out=tmp)
        tmp += 1e-300  # no observation: gain p / inf = 0; nothing known yet (p = 0): 0
        np.divide(p, tmp, out=gain)
        np.subtract(m[k], x, out=tmp)
        tmp *= gain
        x += tmp
        np.subtract(1.0, gain, out=tmp)
        p *= tmp
        xf[k] = x
        pf[k] = p
    g, g2 = gain, np.empty(P)
    for k in range(E - 2, -1, -1):  # Rauch-Tung-Striebel pass, in place
        np.add(pp[k + 1], 1e-300, out=tmp)  # a walk of zero strength: pf = pp = 0, gain 0
        np.divide(pf[k], tmp, out=g)
        np.subtract(xf[k + 1], xf[k], out=tmp)
        tmp *= g
        xf[k] += tmp
        np.multiply(g, g, out=g2)
        np.subtract(pf[k + 1], pp[k + 1], out=tmp)
        tmp *= g2
        pf[k] += tmp
    np.maximum(pf, 0.0, out=pf)
    return xf.T.reshape(shape), pf.T.reshape(shape)


def _prediction_matrix(grid, pos, n_rows, l, b, d, sky_weights=None):
    """Sparse (n, (P + 1) * n_edges) matrix from flattened node arrays to values at (l, b, d).

    Bilinear on the sky, linear in distance (as :func:`_interp`); ``pos`` maps each
    HEALPix pixel to its row among the P = ``n_rows`` rows of the node arrays, or to row
    P (one shared row for all other pixels). ``sky_weights`` are the positions' (pixels,
    weights) from ``grid.interp_weights`` when already known.
    """
    pix, w = grid.interp_weights(l, b) if sky_weights is None else sky_weights
    k, f = grid.edge_position(d)
    f = np.clip(f, 0.0, 1.0)
    E = grid.n_edges
    col = pos[pix] * E + k[None, :]
    n = np.asarray(l).size
    data = np.concatenate([(w * (1.0 - f)).ravel(), (w * f).ravel()])
    cols = np.concatenate([col.ravel(), col.ravel() + 1])
    rows = np.tile(np.arange(n), 8)
    return sparse.csr_matrix((data, (rows, cols)), shape=(n, (n_rows + 1) * E))


_ANSWER_BLOCK = 32_768  # positions per block when answering many at once


def _interp(grid, values, l, b, d):
    """Bilinear-on-the-sky, linear-in-distance interpolation of node arrays.

    ``values`` is a tuple of arrays of shape (npix, n_edges). Distances beyond the last edge
    take the last edge's value; the returned fraction ``f`` lets callers extrapolate. Many
    positions are answered in cache-sized blocks, spread over the CPU's cores.
    """
    l, b, d = (np.asarray(x, float) for x in (l, b, d))
    n = l.size
    if n <= _ANSWER_BLOCK or l.ndim != 1:
        return _interp_block(grid, values, l, b, d)
    out = [np.empty(n) for _ in values]
    k, f = np.empty(n, dtype=np.int64), np.empty(n)

    def run(lo_hi):
        for s in range(*lo_hi, _ANSWER_BLOCK):
            e = min(s + _ANSWER_BLOCK, lo_hi[1])
            vals, k[s:e], f[s:e] = _interp_block(grid, values, l[s:e], b[s:e], d[s:e])
            for o, v in zip(out, vals):
                o[s:e] = v

    workers = max(1, min(os.cpu_count() or 1, 8, n // _ANSWER_BLOCK))
    cuts = np.linspace(0, -(-n // _ANSWER_BLOCK), workers + 1).astype(int) * _ANSWER_BLOCK
    spans = [(int(a), int(min(c, n))) for a, c in zip(cuts[:-1], cuts[1:]) if a < min(c, n)]
    with ThreadPoolExecutor(len(spans)) as pool:
        list(pool.map(run, spans))
    return out, k, f


def _interp_block(grid, values, l, b, d):
    pix, wts = grid.interp_weights(l, b)
    k, f = grid.edge_position(d)
    fc = np.clip(f, 0.0, 1.0)
    lin = pix * grid.n_edges + k  # (4, n) flat index of the lower edge
    out = []
    for v in values:
        flat = np.ravel(v)
        lo = np.einsum("ij,ij->j", np.take(flat, lin), wts)
        hi = np.einsum("ij,ij->j", np.take(flat, lin + 1), wts)
        out.append(lo + fc * (hi - lo))
    return out, k, f


# ----------------------------------------------------------------------------- the model

class ExtinctionModel:
    """Binned, monotone, uncertain cumulative A_V model over HEALPix pixels x distance.

    Parameters
    ----------
    nside : int
        HEALPix NSIDE of the sky pixels (power of two, 1-1024). The default, 32 (1.8 deg
        pixels), suits catalogues of a few thousand clusters; the sky kernel chosen by
        cross-validation widens it where tracers are sparse.
    distance_max, distance_step : Quantity['length']
        Linear distance edges 0, step, ..., distance_max (defaults 6 kpc and 200 pc).
    distance_edges : Quantity['length'], optional
        Explicit edges; overrides ``distance_max``/``distance_step``.
    ordering : {'ring', 'nested'}
        HEALPix pixel ordering.
    uncertainty : {'auto', 'monte-carlo', 'bin-scatter'}
        How tracer errors enter: Monte Carlo draws of distance and A_V per tracer
        (``'monte-carlo'``), or the scatter of nominal values within bins
        (``'bin-scatter'``, for very large catalogues). ``'auto'`` uses Monte Carlo up to
        300 000 tracers.
    n_draws : int, optional
        Monte Carlo draws per tracer (default: about 2 million draws in total, 8 to 64 per
        tracer).
    n_folds : int
        Folds of the cross-validation that chooses the smoothing and calibrates the errors
        (up to 50 000 tracers; larger catalogues hold out one set of
        ``min(50 000, n / n_folds)`` tracers instead).
    sky_passes : sequence of int
        Candidate numbers of neighbour-smoothing passes on the sky (0 = none).
    random_state : int
        Seed for the draws and the folds; the same seed gives the same model.
    quiet : bool, optional
        Hide progress bars (default: shown only on a terminal).

    Attributes
    ----------
    grid_ : Grid
    layer_ : DustLayer
    av_ : ndarray (npix, n_edges)
        Cumulative A_V (mag) at each pixel centre and distance edge; non-decreasing.
    av_err_ : ndarray (npix, n_edges)
        Predictive 1-sigma uncertainty (mag) at the nodes.
    n_tracers_ : ndarray (npix, n_edges)
        Effective number of tracers informing each node (after sky smoothing).
    counts_ : ndarray (npix, n_bins) of int
        Tracers whose nominal position and distance fall in each pixel and bin.
    differential_ : ndarray (npix, n_bins)
        Extinction added in each bin per unit distance (mag/kpc).
    tracers_ : TracerSet
        The tracers the model was built from.
    uncertainty_scheme_ : str
    sky_passes_, walk_variance_ : chosen smoothing (passes, mag^2/kpc)
    scatter_ : dict
        Calibrated predictive variance: ``scale^2 (kappa * post_var + root^2 * A_V + (frac * A_V)^2)``.
    cv_ : astropy.table.Table
        Cross-validation score of every candidate setting; ``cv_.meta["validation"]``
        says how the tracers were held out.
    """

    def __init__(
        self,
        nside=32,
        distance_max=6000 * u.pc,
        distance_step=200 * u.pc,
        distance_edges=None,
        ordering="ring",
        uncertainty="auto",
        n_draws=None,
        n_folds=5,
        sky_passes=(0, 1, 2, 4),
        random_state=0,
        quiet=None,
    ):
        self.nside = nside
        self.distance_max = distance_max
        self.distance_step = distance_step
        self.distance_edges = distance_edges
        self.ordering = ordering
        self.uncertainty = uncertainty
        self.n_draws = n_draws
        self.n_folds = n_folds
        self.sky_passes = sky_passes
        self.random_state = random_state
        self.quiet = quiet

    # -- parameters
    def _make_grid(self):
        if self.distance_edges is not None:
            edges = to_value("distance_edges", self.distance_edges, u.pc, default_unit=u.pc)
            return Grid(self.nside, edges, self.ordering)
        return Grid.linear(self.distance_max, self.distance_step, self.nside, self.ordering)

    def _check_params(self, n):
        scheme = check_choice("uncertainty", self.uncertainty, ("auto", "monte-carlo", "bin-scatter"))
        if scheme == "auto":
            scheme = "monte-carlo" if n <= _MC_LIMIT else "bin-scatter"
        if scheme == "monte-carlo":
            if self.n_draws is None:
                draws = int(np.clip(2_000_000 // max(n, 1), 8, 64))
            else:
                draws = check_int("n_draws", self.n_draws, 1, 10_000)
        else:
            draws = 1
        folds = check_int("n_folds", self.n_folds, 2, 50)
        passes = sorted({check_int("sky_passes", p, 0, 64) for p in np.atleast_1d(self.sky_passes)})
        return scheme, draws, folds, passes

    # -- fitting
    def fit(self, tracers):
        """Build the model from a tracer set; returns ``self``.

        Parameters
        ----------
        tracers : TracerSet
            Validated tracers (see :func:`dustkit.tracers.read_tracers`).
        """
        l, b, d, de, av, ae = _tracer_arrays(tracers)
        n = l.size
        if n < 10:
            raise CatalogError(f"A model needs at least 10 tracers; got {n}. Hint: widen the region or add tracers.")
        grid = self._make_grid()
        scheme, draws, folds, passes = self._check_params(n)
        rng = np.random.default_rng(self.random_state)

        layer = fit_layer(tracers, random_state=self.random_state)
        bar = progress(total=n, desc="accumulating tracers", quiet=self.quiet)
        held = heldout_rows(n, folds, self.random_state)
        k_fold = held is None
        if k_fold:
            # every tracer held out once; folds from a hash of the row number, as in the
            # chunked builds (dustkit.scale): the same tracers give the same model whichever
            # way they are read
            from .scale import fold_of_rows

            fold = fold_of_rows(np.arange(n), folds, self.random_state)
            held, held_fold = np.arange(n), fold
        else:
            held_fold = np.zeros(held.size, dtype=np.int64)
        with bar:
            if scheme == "monte-carlo":
                if k_fold:
                    slot, n_slots = fold, folds
                else:  # the held-out set in slot 0, all other tracers in slot 1
                    slot, n_slots = np.ones(n, dtype=np.int64), 2
                    slot[held] = 0
                stats = np.zeros((5, n_slots, grid.npix, grid.n_edges))
                chunk = max(1, 2_000_000 // draws)
                for s in range(0, n, chunk):
                    sl = slice(s, s + chunk)
                    _chunk_statistics(grid, layer, l[sl], b[sl], d[sl], de[sl], av[sl], ae[sl], slot[sl], draws, rng,
                                      out=stats)
                    bar.update(min(chunk, n - s))
                counts = _counts(grid, l, b, d)
                total = stats.sum(axis=1)
                fold_stats = stats if k_fold else stats[:, :1]
                del stats
            else:
                total, fold_stats, counts = _nominal_statistics(
                    grid, layer, l, b, d, av, ae, fold=fold if k_fold else None, n_folds=folds,
                    held=None if k_fold else held, bar=bar)
        self._finish(grid, layer, total, fold_stats, passes,
                     (l[held], b[held], d[held], de[held], av[held], ae[held], held_fold), scheme, draws, rng)
        self.tracers_ = tracers
        self.counts_ = counts.reshape(grid.npix, grid.n_bins)
        return self

    def _finish(self, grid, layer, total, fold_stats, passes, heldout, scheme, draws, rng):
        """Choose smoothing by cross-validation, calibrate errors, and fill learned arrays.

        ``total`` (5, npix, n_edges) holds the statistics of all tracers, ``fold_stats``
        (5, n_folds, npix, n_edges) those of the held-out tracers of each fold, and
        ``heldout`` their arrays (l, b, d, d_err, A_V, A_V_err, fold). Fold ``f`` is
        predicted from ``total - fold_stats[:, f]``.
        """
        l, b, d, de, av, ae, fold = heldout
        folds = fold_stats.shape[1]
        _, bc = grid.pixel_centres()
        edges = grid.distance_edges
        layer_c = layer._av(bc[:, None], edges[None, :])
        # work only on pixels within reach of the tracers through the widest kernel
        reach = (total[0].sum(axis=1) > 0).astype(float)
        one = _neighbour_matrix(grid)
        for _ in range(max(passes)):
            reach = one @ reach
        active = np.nonzero(reach > 0)[0]
        kernels = _kernels(grid, passes, active, one)
        stats = fold_stats[:, :, active, :]
        total = total[:, active, :]
        lay_held = layer._av(b, d)  # the layer at the held-out tracers
        resid_var = float(np.var(av - lay_held))
        span_kpc = max(float(np.median(d)) / 1000.0, 0.1)
        walk = resid_var / span_kpc * np.array([0.1, 0.3, 1.0, 3.0, 10.0])

        def full(values, fill):
            out = np.broadcast_to(fill, (grid.npix, edges.size)).copy()
            out[active] = values
            return out

        # Cross-validation works on the rows each fold's held-out tracers need: the nodes of
        # their 4 interpolation pixels, computed from the other tracers (all minus the fold),
        # for all folds stacked into one set of rows. One more row stands for every other
        # pixel (no tracers: residual 0, prior variance), so predictions at held-out tracers
        # are one sparse product with fixed interpolation weights.
        members = [np.nonzero(fold == f)[0] for f in range(folds)]
        sky_w = [grid.interp_weights(l[i], b[i]) for i in members]
        in_active = np.full(grid.npix, -1)
        in_active[active] = np.arange(active.size)
        fold_rows = [np.unique(in_active[pix][in_active[pix] >= 0]) for pix, _ in sky_w]
        start = np.concatenate([[0], np.cumsum([r.size for r in fold_rows])])
        n_rows = int(start[-1])
        maps = []
        for f, r in enumerate(fold_rows):
            m = np.full(grid.npix, n_rows)
            m[active[r]] = start[f] + np.arange(r.size)
            maps.append(m)

        def extend(values, fill):
            return np.concatenate([values, np.reshape(fill, (1, -1)) * np.ones((1, edges.size))]).ravel()

        rows = []
        dkern = {sd: _distance_kernel(edges, sd) for sd in self._distance_sigmas(edges)}
        sigmas = sorted(dkern)
        weights = [_prediction_matrix(grid, maps[f], n_rows, l[i], b[i], d[i], sky_w[f]) for f, i in enumerate(members)]
        row_kernels = {p: None if k is None else [(k[0][r].tocsr(), k[1][r].tocsr()) for r in fold_rows]
                       for p, k in kernels.items()}
        obs_cache = {}
        sky_cache = {}
        # small grids keep every smoothing they make; large ones one at a time
        keep_all = len(passes) * 5 * n_rows * edges.size * 8 < _CACHE_BYTES

        def sky(p):
            """Sky-smoothed statistics of each fold's training tracers at its rows, stacked (5, n_rows, E)."""
            if p not in sky_cache:
                if not keep_all:
                    sky_cache.clear()
                parts = []
                for f, r in enumerate(fold_rows):
                    train = total - stats[:, f]  # the fold's training tracers
                    parts.append(train[:, r] if row_kernels[p] is None else _smooth(train, row_kernels[p][f]))
                sky_cache[p] = np.concatenate(parts, axis=1)
            return sky_cache[p]

        def observations(p, sd):
            if (p, sd) not in obs_cache:
                if not keep_all:
                    obs_cache.clear()
                obs_cache[(p, sd)] = _node_observations(_smooth_distance(sky(p), dkern[sd]))
            return obs_cache[(p, sd)]

        scores = {}

        def score(p, sd, q):
            if (p, sd, q) in scores:
                return scores[(p, sd, q)]
            m, ov, _ = observations(p, sd)
            r = extend(_kalman_smooth(m, ov, edges, q)[0], 0.0)  # all folds at once
            pred = np.empty(l.size)
            for f, i in enumerate(members):
                pred[i] = np.maximum(lay_held[i] + weights[f] @ r, 0.0)
            mse = float(np.mean((av - pred) ** 2))
            scores[(p, sd, q)] = mse
            rows.append((p, sd, q, mse))
            return mse

        # coordinate search over (sky passes, distance kernel, random-walk strength): each
        # parameter in turn over its candidates, the others held, until nothing improves
        current = [passes[0], sigmas[min(1, len(sigmas) - 1)], walk[len(walk) // 2]]
        candidates = [passes, sigmas, list(walk)]
        for _ in range(2):
            before = tuple(current)
            for i, cand in enumerate(candidates):
                trial = {c: score(*(current[:i] + [c] + current[i + 1:])) for c in cand}
                current[i] = min(trial, key=trial.get)
            if tuple(current) == before:
                break
        p_best, sd_best, q_best = current

        # calibrate the unresolved scatter on held-out tracers, integrating over each one's
        # distance uncertainty (Gauss-Hermite nodes in log distance)
        gh_x, gh_w = np.polynomial.hermite_e.hermegauss(7)
        gh_w = gh_w / gh_w.sum()
        obs_cache.clear()
        take = np.arange(l.size)
        if take.size > 5000:  # a few thousand held-out tracers pin down three numbers
            take = np.sort(rng.choice(take, 5000, replace=False))
        frac_err = np.where(d[take] > 0, de[take] / d[take], 0.0)
        node_pred = np.empty((gh_x.size, take.size))
        node_var = np.empty((gh_x.size, take.size))
        prior = q_best * edges / 1000.0
        m, ov, _ = observations(p_best, sd_best)
        r, pv = _kalman_smooth(m, ov, edges, q_best)
        r, pv = extend(r, 0.0), extend(pv, prior)
        for f in range(folds):
            isel = np.nonzero(fold[take] == f)[0]
            sel = take[isel]
            at = np.searchsorted(members[f], sel)  # sel is part of fold f: reuse its sky weights
            pix_w = (sky_w[f][0][:, at], sky_w[f][1][:, at])
            for j, xj in enumerate(gh_x):
                dj = d[sel] * np.exp(xj * frac_err[isel])
                wj = _prediction_matrix(grid, maps[f], n_rows, l[sel], b[sel], dj, pix_w)
                node_pred[j, isel] = np.maximum(layer._av(b[sel], dj) + wj @ r, 0.0)
                node_var[j, isel] = wj @ pv
        self.scatter_ = _calibrate_scatter(av[take], ae[take], node_pred, node_var, gh_w)
        sm_total = _smooth_distance(_smooth(total, kernels[p_best]), dkern[sd_best])

        # final model from all tracers
        del sky_cache, obs_cache, stats
        m, ov, neff = _node_observations(sm_total)
        r, pv = _kalman_smooth(m, ov, edges, q_best)
        r, pv, neff = full(r, 0.0), full(pv, prior), full(neff, 0.0)
        a_nodes = layer_c + r
        a_iso = isotonic_rows(a_nodes, 1.0 / (pv + 1e-6))
        a_iso = np.maximum(a_iso, 0.0)
        self.grid_ = grid
        self.layer_ = layer
        self.uncertainty_scheme_ = scheme
        self.n_draws_ = draws
        self.sky_passes_ = int(p_best)
        self.walk_variance_ = float(q_best)
        self.distance_smoothing_ = float(sd_best)
        self._resid_ = a_iso - layer_c
        self._post_var_ = pv
        self.av_ = a_iso
        self.av_err_ = np.sqrt(self._predictive_var(pv, a_iso))
        self.n_tracers_ = neff
        self.differential_ = np.diff(a_iso, axis=1) / (np.diff(edges) / 1000.0)[None, :]
        from astropy.table import Table

        self.cv_ = Table(rows=rows, names=("sky_passes", "distance_smoothing", "walk_variance", "cv_mse"))
        self.cv_.meta["validation"] = (f"{folds}-fold cross-validation over all {l.size} tracers" if folds > 1 else
                                       f"one held-out set of {l.size} tracers")
        self.cv_["distance_smoothing"].unit = u.pc
        self.cv_["walk_variance"].unit = u.mag**2 / u.kpc
        self.cv_["cv_mse"].unit = u.mag**2

    @staticmethod
    def _distance_sigmas(edges):
        step = float(np.median(np.diff(edges)))
        unit = max(150.0, step)
        return (0.0, unit, 2 * unit, 3 * unit)

    def _predictive_var(self, post_var, av):
        s = self.scatter_
        av = np.asarray(av)
        return s["scale"] ** 2 * (s["kappa"] * post_var + s["root"] ** 2 * av + (s["frac"] * av) ** 2)

    # -- answers
    def _check_fitted(self):
        if not hasattr(self, "av_"):
            raise ModelNotFittedError(
                "This ExtinctionModel is not fitted yet. Call fit(tracers) first, or load a saved model "
                "with dustkit.load_model(path)."
            )

    def _positions(self, l, b=None, distance=None):
        if isinstance(l, SkyCoord):
            c = l.galactic
            lv = np.atleast_1d(c.l.deg).astype(float)
            bv = np.atleast_1d(c.b.deg).astype(float)
            if distance is None:
                if c.distance.unit.physical_type != "length":
                    raise param_error("coords", "a SkyCoord with distances (or pass distance=)", "SkyCoord without distance")
                distance = c.distance
            dv = np.atleast_1d(to_value("distance", distance, u.pc)).astype(float)
        else:
            if b is None or distance is None:
                raise param_error("l, b, distance", "given together (or pass one SkyCoord with distances)", "missing values")
            lv = np.atleast_1d(to_value("l", l, u.deg)).astype(float)
            bv = np.atleast_1d(to_value("b", b, u.deg)).astype(float)
            dv = np.atleast_1d(to_value("distance", distance, u.pc)).astype(float)
        shape = np.broadcast_shapes(
            np.shape(getattr(l, "value", l)) if not isinstance(l, SkyCoord) else l.shape,
            np.shape(getattr(b, "value", b)) if b is not None else (),
            np.shape(getattr(distance, "value", distance)),
        )
        lv, bv, dv = (np.ravel(x) for x in np.broadcast_arrays(lv, bv, dv))
        if np.any(np.abs(bv) > 90) or not np.all(np.isfinite(bv)):
            raise param_error("b", "a latitude in [-90, 90] deg", bv[~(np.abs(bv) <= 90)][:3].tolist())
        if np.any(dv < 0) or not np.all(np.isfinite(dv)):
            raise param_error("distance", "finite and non-negative", dv[~(dv >= 0)][:3].tolist())
        return np.mod(lv, 360.0), bv, dv, shape

    def _av_arrays(self, l, b, d, distance_err=None):
        grid = self.grid_
        (r, pv), k, f = _interp(grid, (self._resid_, self._post_var_), l, b, d)
        beyond = np.maximum(d - grid.distance_edges[-1], 0.0) / 1000.0
        pv = pv + self.walk_variance_ * beyond  # carried forward with growing uncertainty
        a = np.maximum(self.layer_._av(b, d) + r, 0.0)
        var = self._predictive_var(pv, a)
        if distance_err is not None:
            slope = self._slope(l, b, d)
            var = var + (slope * distance_err) ** 2
        return a, np.sqrt(var)

    def _slope(self, l, b, d):
        """Local dA_V/dd (mag/pc) from the binned model at the given positions."""
        grid = self.grid_
        k, _ = grid.edge_position(d)
        e = grid.distance_edges
        (r_near,), _, _ = _interp(grid, (self._resid_,), l, b, e[k])
        (r_far,), _, _ = _interp(grid, (self._resid_,), l, b, e[k + 1])
        near = self.layer_._av(b, e[k]) + r_near
        far = self.layer_._av(b, e[k + 1]) + r_far
        return np.maximum(far - near, 0.0) / (e[k + 1] - e[k])

    def av(self, l, b=None, distance=None, distance_err=None):
        """A_V and its predictive 1-sigma uncertainty at arbitrary positions.

        Parameters
        ----------
        l : Quantity['angle'] or SkyCoord
            Galactic longitude, or a SkyCoord (any frame) with distances.
        b : Quantity['angle'], optional
        distance : Quantity['length'], optional
        distance_err : Quantity['length'], optional
            The targets' own distance uncertainty, propagated through the local slope.

        Returns
        -------
        av, av_err : Quantity['mag']
        """
        self._check_fitted()
        lv, bv, dv, shape = self._positions(l, b, distance)
        de = None if distance_err is None else np.broadcast_to(to_value("distance_err", distance_err, u.pc), shape).ravel()
        a, e = self._av_arrays(lv, bv, dv, de)
        return a.reshape(shape) * u.mag, e.reshape(shape) * u.mag

    def layer_av(self, l, b=None, distance=None):
        """A_V (mag) of the fitted smooth layer alone at the given positions."""
        self._check_fitted()
        lv, bv, dv, shape = self._positions(l, b, distance)
        return self.layer_._av(bv, dv).reshape(shape) * u.mag

    def query(self, l, b=None, distance=None, distance_err=None, bands=(), law=None, rv=None):
        """A table of answers: position, A_V, its error, the layer's A_V, and A in each band.

        Band extinctions use the model's law and R_V unless ``law``/``rv`` are given
        (:func:`dustkit.bands.av_to_band`).
        """
        self._check_fitted()
        lv, bv, dv, shape = self._positions(l, b, distance)
        de = None if distance_err is None else np.broadcast_to(to_value("distance_err", distance_err, u.pc), shape).ravel()
        a, e = self._av_arrays(lv, bv, dv, de)
        t = QTable()
        t["l"] = lv * u.deg
        t["b"] = bv * u.deg
        t["distance"] = dv * u.pc
        t["av"] = a * u.mag
        t["av_err"] = e * u.mag
        t["av_layer"] = self.layer_._av(bv, dv) * u.mag
        if bands:
            from .bands import av_to_band

            law = law or self.law
            rv = self.rv if rv is None else rv
            for band in bands:
                ab, abe = av_to_band(a, e, band, law=law, rv=rv)
                t[f"a_{band}"] = np.asarray(ab) * u.mag
                t[f"a_{band}_err"] = np.asarray(abe) * u.mag
        t.meta["caution"] = CAUTION
        return t

    @property
    def law(self):
        """Extinction law of the tracers the model was built from."""
        return getattr(getattr(self, "tracers_", None), "law", "ccm89")

    @property
    def rv(self):
        """R_V of the tracers the model was built from."""
        return float(getattr(getattr(self, "tracers_", None), "rv", 3.1))

    def profile(self, l, b, radius=None, distances=None):
        """Cumulative A_V against distance along one sight line (or averaged over a cone).

        Parameters
        ----------
        l, b : Quantity['angle']
            Centre of the sight line.
        radius : Quantity['angle'], optional
            Cone radius: the profile is averaged over the model's pixels inside the cone and
            the tracers inside it are listed in ``meta['tracers']``.
        distances : Quantity['length'], optional
            Where to evaluate (default: 0 to the last edge in 200 steps).

        Returns
        -------
        QTable
            ``distance``, ``av``, ``av_err``, ``av_layer``; cumulative A_V is non-decreasing.
        """
        self._check_fitted()
        lv = float(to_value("l", l, u.deg)) % 360.0
        bv = float(to_value("b", b, u.deg))
        check_real("b", bv, -90, 90)
        e = self.grid_.distance_edges
        if distances is None:
            dv = np.linspace(0.0, e[-1], 201)
        else:
            dv = np.sort(np.atleast_1d(to_value("distances", distances, u.pc)).astype(float))
        if radius is None:
            pts_l, pts_b = np.array([lv]), np.array([bv])
            rad = 0.0
        else:
            rad = float(to_value("radius", radius, u.deg))
            check_real("radius", rad, 0, 90)
            fine = max(self.grid_.nside * 4, 64)
            pp = healpix.query_disc(fine, lv, bv, rad)
            if pp.size == 0:
                pp = np.atleast_1d(healpix.ang2pix(fine, lv, bv))
            pts_l, pts_b = healpix.pix2ang(fine, pp)
        L = np.repeat(pts_l, dv.size)
        B = np.repeat(pts_b, dv.size)
        D = np.tile(dv, pts_l.size)
        a, err = self._av_arrays(L, B, D)
        a = a.reshape(pts_l.size, dv.size)
        err = err.reshape(pts_l.size, dv.size)
        lay = self.layer_._av(B, D).reshape(pts_l.size, dv.size)
        av_mean = np.maximum.accumulate(a.mean(axis=0))
        # spread across the cone adds to the uncertainty of a single target inside it
        av_err = np.sqrt(np.mean(err**2, axis=0) + a.var(axis=0))
        t = QTable()
        t["distance"] = dv * u.pc
        t["av"] = av_mean * u.mag
        t["av_err"] = av_err * u.mag
        t["av_layer"] = lay.mean(axis=0) * u.mag
        t.meta.update({"l": lv, "b": bv, "radius": rad, "caution": CAUTION})
        tr = getattr(self, "tracers_", None)
        if tr is not None:
            sep = separation_deg(tr.l, tr.b, lv, bv)
            inside = sep <= max(rad, self.grid_pixel_radius())
            t.meta["tracers"] = tr.subset(inside).to_table() if inside.any() else None
        return t

    def grid_pixel_radius(self):
        """Approximate angular radius of one sky pixel (deg)."""
        return float(np.sqrt(self.grid_.pixel_area.to_value(u.deg**2) / np.pi))

    def to_table(self, pixels=None):
        """The binned model as a table: one row per pixel and distance bin.

        Columns: ``pixel``, ``l``, ``b`` (pixel centre, deg), ``distance_min``,
        ``distance_max`` (pc), ``av``, ``av_err`` (cumulative at the bin's far edge, mag),
        ``av_near`` (cumulative at the near edge), ``differential`` (mag/kpc), ``n_tracers``
        (tracers in the pixel and bin). Only pixels informed by tracers are listed unless
        ``pixels`` is given.
        """
        self._check_fitted()
        g = self.grid_
        if pixels is None:
            pixels = self.informed_pixels()
        pixels = np.asarray(pixels, int)
        lc, bc = g.pixel_centres(pixels)
        nb = g.n_bins
        e = g.distance_edges
        t = QTable()
        t["pixel"] = np.repeat(pixels, nb)
        t["l"] = np.repeat(lc, nb) * u.deg
        t["b"] = np.repeat(bc, nb) * u.deg
        t["distance_min"] = np.tile(e[:-1], pixels.size) * u.pc
        t["distance_max"] = np.tile(e[1:], pixels.size) * u.pc
        t["av_near"] = self.av_[pixels, :-1].ravel() * u.mag
        t["av"] = self.av_[pixels, 1:].ravel() * u.mag
        t["av_err"] = self.av_err_[pixels, 1:].ravel() * u.mag
        t["differential"] = self.differential_[pixels].ravel() * (u.mag / u.kpc)
        t["n_tracers"] = self.counts_[pixels].ravel()
        t.meta.update(
            {
                "nside": g.nside,
                "ordering": g.ordering.upper(),
                "coordsys": "G",
                "law": self.law,
                "rv": self.rv,
                **{f"layer_{k}": v for k, v in self.layer_.as_dict().items()},
                "caution": CAUTION,
            }
        )
        return t

    def informed_pixels(self):
        """Pixels whose estimate is informed by at least a tenth of a tracer (after smoothing)."""
        self._check_fitted()
        return np.nonzero(self.n_tracers_.max(axis=1) >= 0.1)[0]

    def __repr__(self):
        if not hasattr(self, "av_"):
            return f"ExtinctionModel(nside={self.nside}, not fitted)"
        return (
            f"ExtinctionModel({self.grid_!r}, {len(self.tracers_) if hasattr(self, 'tracers_') else '?'} tracers, "
            f"{self.layer_}, uncertainty '{self.uncertainty_scheme_}')"
        )


def _calibrate_scatter(av, av_err, node_pred, node_var, node_weight):
    """Fit the scatter of extinction the model cannot resolve, by maximum likelihood.

    Each held-out tracer's likelihood is a mixture over its distance uncertainty
    (quadrature nodes ``j`` with weights ``node_weight``) of Student-t densities (8 degrees
    of freedom: clouds give heavier tails than a normal) centred on the model's prediction
    at that distance, with squared scale ``kappa * node_var + av_err^2 + sigma_u^2``, where
    ``sigma_u^2 = root^2 * A + (frac * A)^2`` is the unresolved scatter (A in mag): a term
    growing like the square root of the column, as for many small clouds, and one
    proportional to it, as for a few large ones; both vanish where A_V does (near the Sun). Integrating over the
    distance (rather than linearising it with a slope) keeps the tracers' distance errors
    from being mistaken for, or hiding, the model's own error. The model's own variance
    enters with a fitted factor ``kappa``: the node variances come from the spread of
    tracers within a node, which need not equal the error of its smoothed estimate. The
    reported 1-sigma error is the half-width of the central 68.27% interval of that
    t distribution (``scale`` = 1.07 x the t scale).
    """
    from scipy import optimize, special

    nu = _STUDENT_NU
    resid2 = (av[None, :] - node_pred) ** 2 / nu
    ae2 = av_err[None, :] ** 2 + 1e-8
    pred2 = node_pred**2
    c = float(np.exp(special.gammaln((nu + 1) / 2) - special.gammaln(nu / 2) - 0.5 * np.log(nu * np.pi)))
    assert nu == 8.0  # (1 + x)^-(nu+1)/2 below is written out as 1 / ((1 + x)^4 sqrt(1 + x))
    s2 = np.empty_like(node_pred)
    t = np.empty_like(node_pred)
    u = np.empty_like(node_pred)
    g = np.empty_like(node_pred)

    def nll(theta):
        """Negative log-likelihood and its gradient in theta = log(kappa, root^2, frac^2)."""
        kappa, root2, frac2 = np.exp(theta)
        # squared scale S and the t density c (1 + R/S)^-(nu+1)/2 / sqrt(S), R = r^2 / nu
        np.multiply(node_var, kappa, out=s2)
        np.add(s2, ae2, out=s2)
        np.add(s2, root2 * node_pred, out=s2)
        np.add(s2, frac2 * pred2, out=s2)
        np.divide(resid2, s2, out=u)
        np.add(u, 1.0, out=u)                 # 1 + R/S
        np.sqrt(u, out=t)
        np.multiply(t, u, out=t)
        np.multiply(t, u, out=t)
        np.multiply(t, u, out=t)
        np.multiply(t, u, out=t)              # (1 + R/S)^(9/2)
        np.reciprocal(u, out=u)
        np.negative(u, out=u)
        np.add(u, 1.0, out=u)                 # (R/S) / (1 + R/S)
        np.multiply(u, (nu + 1) / 2, out=u)
        np.subtract(u, 0.5, out=u)
        np.divide(u, s2, out=g)               # d log(density) / dS
        np.sqrt(s2, out=u)
        np.multiply(t, u, out=t)
        np.reciprocal(t, out=t)               # density / c
        dens = node_weight @ t
        dens = np.maximum(dens, 1e-300 / c)
        np.multiply(g, t, out=g)
        grad = np.array([
            -np.sum((node_weight @ (g * node_var)) / dens) * kappa,
            -np.sum((node_weight @ (g * node_pred)) / dens) * root2,
            -np.sum((node_weight @ (g * pred2)) / dens) * frac2,
        ])
        return -np.sum(np.log(c * dens)), grad

    # the likelihood has more than one basin (the model's own variance and the unresolved
    # scatter can trade places): start a gradient search from the best points of a coarse grid
    grid = np.log(np.array(np.meshgrid([1e-3, 1e-2, 0.1, 1.0, 10.0], [1e-6, 1e-3, 1e-2, 0.1],
                                       [1e-6, 1e-4, 1e-3, 1e-2, 0.1], indexing="ij")).reshape(3, -1).T)
    values = np.array([nll(theta)[0] for theta in grid])
    best = None
    for start in grid[np.argsort(values)[:3]]:
        res = optimize.minimize(nll, start, jac=True, method="L-BFGS-B",
                                bounds=[(-12.0, 6.0), (-25.0, 3.0), (-25.0, 3.0)])
        if best is None or res.fun < best.fun:
            best = res
    kappa, root2, frac2 = np.exp(best.x)
    # the reported 1-sigma error is the half-width of the central 68.27% interval
    scale = float(special.stdtrit(nu, 0.5 + 0.6827 / 2))
    return {"kappa": float(kappa), "root": float(np.sqrt(root2)), "frac": float(np.sqrt(frac2)), "scale": scale}


# ----------------------------------------------------------------------------- lossless state

_STATE_ARRAYS = ("av_", "av_err_", "_resid_", "_post_var_", "n_tracers_", "counts_", "differential_")
_STATE_SCALARS = ("uncertainty_scheme_", "n_draws_", "sky_passes_", "walk_variance_", "distance_smoothing_")
_PARAMS = ("nside", "ordering", "uncertainty", "n_draws", "n_folds", "random_state")


def model_state(model):
    """Everything a fitted model needs to answer, as plain numbers and arrays.

    Returns a dict with ``params`` (constructor parameters), ``grid`` (nside, ordering,
    distance_edges), ``layer`` (parameters, errors, covariance), ``scatter``, ``scalars``,
    ``arrays`` (name -> ndarray) and ``tracers`` (name -> ndarray, plus law, rv and
    excess_kind). :func:`model_from_state` rebuilds a model that answers bit for bit the same.
    """
    model._check_fitted()
    g = model.grid_
    params = {k: getattr(model, k) for k in _PARAMS}
    params["sky_passes"] = [int(p) for p in np.atleast_1d(model.sky_passes)]
    t = model.tracers_
    tracers = {k: np.asarray(getattr(t, k)) for k in ("l", "b", "distance", "distance_err", "av", "av_err", "name")}
    for k in ("excess", "excess_err"):
        v = getattr(t, k, None)
        if v is not None:
            tracers[k] = np.asarray(v, float)
    return {
        "params": params,
        "grid": {"nside": g.nside, "ordering": g.ordering, "distance_edges": g.distance_edges.copy()},
        "layer": {**model.layer_.as_dict(), "scatter": model.layer_.scatter, "n_used": model.layer_.n_used,
                  "covariance": np.asarray(model.layer_.covariance, float)},
        "scatter": dict(model.scatter_),
        "scalars": {k: getattr(model, k) for k in _STATE_SCALARS},
        "arrays": {k: np.asarray(getattr(model, k)) for k in _STATE_ARRAYS},
        "tracers": tracers,
        "tracer_info": {"law": t.law, "rv": float(t.rv), "excess_kind": getattr(t, "excess_kind", "A_V"),
                        "meta": dict(getattr(t, "meta", {}) or {})},
        "cv": model.cv_.copy() if hasattr(model, "cv_") else None,
    }


def model_from_state(state):
    """Rebuild a fitted :class:`ExtinctionModel` from :func:`model_state` output."""
    from .tracers import TracerSet

    p = dict(state["params"])
    m = ExtinctionModel(**{k: p[k] for k in _PARAMS if k in p}, sky_passes=tuple(p.get("sky_passes", (0,))))
    g = state["grid"]
    m.distance_edges = np.asarray(g["distance_edges"], float) * u.pc
    m.grid_ = Grid(int(g["nside"]), np.asarray(g["distance_edges"], float), g["ordering"])
    lay = state["layer"]
    m.layer_ = DustLayer(
        a0=float(lay["a0"]), h=float(lay["h"]), z_sun=float(lay["z_sun"]),
        a0_err=float(lay["a0_err"]), h_err=float(lay["h_err"]), z_sun_err=float(lay["z_sun_err"]),
        scatter=float(lay.get("scatter", 0.0)), n_used=int(lay.get("n_used", 0)),
        covariance=np.asarray(lay.get("covariance", np.zeros((3, 3))), float),
    )
    m.scatter_ = {k: float(v) for k, v in state["scatter"].items()}
    for k, v in state["scalars"].items():
        setattr(m, k, v)
    for k, v in state["arrays"].items():
        setattr(m, k, np.asarray(v))
    tr = state["tracers"]
    info = state["tracer_info"]
    ts = TracerSet.from_arrays(tr["l"], tr["b"], tr["distance"], tr["distance_err"], tr["av"], tr["av_err"],
                               name=tr.get("name"), law=info["law"], rv=info["rv"])
    m.tracers_ = ts
    if state.get("cv") is not None:
        m.cv_ = state["cv"]
    return m
