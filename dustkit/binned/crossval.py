"""Cross-validation: choose the sky passes, distance kernel and random-walk strength on held-out tracers.

Cross-validation works on the rows each fold's held-out tracers need: the nodes of their 4
interpolation pixels, computed from the other tracers (all minus the fold), for all folds
stacked into one set of rows. One more row stands for every other pixel (no tracers:
residual 0, prior variance), so predictions at held-out tracers are one sparse product
with fixed interpolation weights. The settings are found by a coordinate search: each
parameter in turn over its candidates, the others held, until nothing improves.
"""

import numpy as np
from scipy import sparse

from .._lib.isotonic import isotonic_rows
from .smoothing import distance_kernel, kalman_smooth, node_observations, prior_variance, smooth_distance, smooth_sky

__all__ = ["CACHE_BYTES", "prediction_matrix", "HeldOutRows", "choose_smoothing"]

CACHE_BYTES = 768 * 2**20  # smoothed statistics kept during cross-validation when they fit


def prediction_matrix(grid, pos, n_rows, l, b, d, sky_weights=None):
    """Sparse (n, (P + 1) * n_edges) matrix from flattened node arrays to values at (l, b, d).

    Bilinear on the sky, linear in distance (as :func:`dustkit.answers.interpolate`);
    ``pos`` maps each HEALPix pixel to its row among the P = ``n_rows`` rows of the node
    arrays, or to row P (one shared row for all other pixels). ``sky_weights`` are the
    positions' (pixels, weights) from ``grid.interp_weights`` when already known.
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


class HeldOutRows:
    """The node rows the held-out tracers need, their training statistics and predictions there.

    Parameters
    ----------
    grid : Grid
    heldout : dustkit.binned.folds.HeldOut
    active : ndarray of int
        Pixels within reach of the tracers through the widest sky kernel.
    total, fold_stats : ndarray
        Statistics of all tracers and of each fold's held-out tracers, on ``active`` pixels.
    kernels : dict
        Sky kernels on ``active`` pixels by number of passes (``smoothing.sky_kernels``).
    sigmas : sequence of float
        Candidate distance-kernel widths (pc).
    """

    def __init__(self, grid, heldout, active, total, fold_stats, kernels, sigmas):
        self.grid = grid
        self.heldout = heldout
        self.edges = grid.distance_edges
        self.total = total
        self.stats = fold_stats
        folds = fold_stats.shape[1]
        fold = heldout.fold
        self.members = [np.nonzero(fold == f)[0] for f in range(folds)]
        self.sky_w = [grid.interp_weights(heldout.l[i], heldout.b[i]) for i in self.members]
        in_active = np.full(grid.npix, -1)
        in_active[active] = np.arange(active.size)
        self.fold_rows = [np.unique(in_active[pix][in_active[pix] >= 0]) for pix, _ in self.sky_w]
        start = np.concatenate([[0], np.cumsum([r.size for r in self.fold_rows])])
        self.n_rows = int(start[-1])
        self.row_pixels = active[np.concatenate(self.fold_rows)] if self.fold_rows else active[:0]
        self.maps = []
        for f, r in enumerate(self.fold_rows):
            m = np.full(grid.npix, self.n_rows)
            m[active[r]] = start[f] + np.arange(r.size)
            self.maps.append(m)
        self.dkern = {sd: distance_kernel(self.edges, sd) for sd in sigmas}
        h = heldout
        self.weights = [prediction_matrix(grid, self.maps[f], self.n_rows, h.l[i], h.b[i], h.distance[i], self.sky_w[f])
                        for f, i in enumerate(self.members)]
        self.row_kernels = {p: None if k is None else [(k[0][r].tocsr(), k[1][r].tocsr()) for r in self.fold_rows]
                            for p, k in kernels.items()}
        # small grids keep every smoothing they make; large ones one at a time
        self.keep_all = len(kernels) * 5 * self.n_rows * self.edges.size * 8 < CACHE_BYTES
        self.sky_cache = {}
        self.obs_cache = {}

    def extend(self, values, fill):
        """Node rows plus the one shared row of uninformed pixels (``fill``), flattened."""
        return np.concatenate([values, np.reshape(fill, (1, -1)) * np.ones((1, self.edges.size))]).ravel()

    def sky(self, p):
        """Sky-smoothed statistics of each fold's training tracers at its rows, stacked (5, n_rows, E)."""
        if p not in self.sky_cache:
            if not self.keep_all:
                self.sky_cache.clear()
            parts = []
            for f, r in enumerate(self.fold_rows):
                train = self.total - self.stats[:, f]  # the fold's training tracers
                parts.append(train[:, r] if self.row_kernels[p] is None else smooth_sky(train, self.row_kernels[p][f]))
            self.sky_cache[p] = np.concatenate(parts, axis=1)
        return self.sky_cache[p]

    def observations(self, p, sd):
        """Node means, variances and effective counts at the rows for sky passes ``p`` and kernel ``sd``."""
        if (p, sd) not in self.obs_cache:
            if not self.keep_all:
                self.obs_cache.clear()
            self.obs_cache[(p, sd)] = node_observations(smooth_distance(self.sky(p), self.dkern[sd]))
        return self.obs_cache[(p, sd)]

    def smoothed(self, p, sd, q):
        """Smoothed residual and its variance at the rows (flattened, with the shared row)."""
        m, ov, _ = self.observations(p, sd)
        r, pv = kalman_smooth(m, ov, self.edges, q)
        return self.extend(r, 0.0), self.extend(pv, q * self.edges / 1000.0)

    def monotone(self, p, sd, q, layer):
        """The rows after the monotone step, as the final model: residual and variance, flattened.

        Each row's sight line (the layer at its pixel centre plus the smoothed residual) is
        made non-decreasing by the same weighted isotonic regression as the final model, and
        clipped at 0; its variance is the smoother's plus the square of that shift, the
        distance the monotone step moved it (the shared row of uninformed pixels keeps
        residual 0 and the prior variance).
        """
        m, ov, _ = self.observations(p, sd)
        r, pv = kalman_smooth(m, ov, self.edges, q)
        _, bc = self.grid.pixel_centres(self.row_pixels)
        layer_c = layer.av_pc(np.asarray(bc, float)[:, None], self.edges[None, :])
        raw = layer_c + r
        a = np.maximum(isotonic_rows(raw, 1.0 / (pv + 1e-6)), 0.0)
        return self.extend(a - layer_c, 0.0), self.extend(pv + (a - raw) ** 2, prior_variance(q, self.edges))

    def release(self):
        """Drop the cached smoothings (the finishing step needs the memory next)."""
        self.sky_cache.clear()
        self.obs_cache.clear()
        self.stats = None


def choose_smoothing(rows, layer_at_heldout, passes, sigmas, walk, use=None):
    """The (sky passes, distance kernel, walk strength) with the smallest held-out mean squared error.

    The error is taken over the held-out tracers where ``use`` (default all; the others
    are kept to calibrate the errors). Returns the chosen setting and the score of every
    setting tried, as rows ``(sky_passes, distance_smoothing, walk_variance, cv_mse)`` in
    the order tried.
    """
    av = rows.heldout.av
    use = np.ones(av.size, dtype=bool) if use is None else np.asarray(use, dtype=bool)
    tried = []
    scores = {}

    def score(p, sd, q):
        if (p, sd, q) in scores:
            return scores[(p, sd, q)]
        m, ov, _ = rows.observations(p, sd)
        r = rows.extend(kalman_smooth(m, ov, rows.edges, q)[0], 0.0)  # all folds at once
        pred = np.empty(av.size)
        for f, i in enumerate(rows.members):
            pred[i] = np.maximum(layer_at_heldout[i] + rows.weights[f] @ r, 0.0)
        mse = float(np.mean((av[use] - pred[use]) ** 2))
        scores[(p, sd, q)] = mse
        tried.append((p, sd, q, mse))
        return mse

    current = [passes[0], sigmas[min(1, len(sigmas) - 1)], walk[len(walk) // 2]]
    candidates = [passes, sigmas, list(walk)]
    for _ in range(2):
        before = tuple(current)
        for i, cand in enumerate(candidates):
            trial = {c: score(*(current[:i] + [c] + current[i + 1:])) for c in cand}
            current[i] = min(trial, key=trial.get)
        if tuple(current) == before:
            break
    return tuple(current), tried
