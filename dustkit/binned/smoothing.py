"""Smoothing of the sufficient statistics: on the sky, along distance, and the Kalman/RTS smoother.

Sky: repeated passes of a HEALPix 8-neighbour kernel (the sum of squared weights takes the
squared kernel, so effective tracer counts stay right). Distance: a Gaussian kernel along
the edges. Sight line: a random-walk state-space model of the cumulative residual, a
Kalman filter and Rauch-Tung-Striebel smoother (Rauch, Tung & Striebel 1965, AIAA J. 3,
1445), vectorised over pixels; the loop runs over the few tens of distance edges only.
"""

import numpy as np
from scipy import sparse

from .._lib import healpix

__all__ = [
    "NEIGHBOUR_WEIGHT", "PRIOR_COUNT", "neighbour_matrix", "sky_kernels", "smooth_sky", "distance_kernel",
    "smooth_distance", "distance_sigmas", "pixel_median", "node_observations", "kalman_smooth", "prior_variance",
]

NEIGHBOUR_WEIGHT = 0.25  # weight of each of the 8 neighbours in one sky-smoothing pass
PRIOR_COUNT = 2.0        # pseudo-count pooling a node's scatter toward its edge's median


def neighbour_matrix(grid):
    """Sparse (npix, npix) matrix of one sky-smoothing pass: 1 on the diagonal, beta for neighbours."""
    npix = grid.npix
    nb = healpix.neighbours(grid.nside, np.arange(npix), nest=grid.nest)
    rows = np.repeat(np.arange(npix)[None, :], nb.shape[0], axis=0)
    ok = nb >= 0
    data = np.full(ok.sum(), NEIGHBOUR_WEIGHT)
    m = sparse.csr_matrix((data, (rows[ok], nb[ok])), shape=(npix, npix))
    return (m + sparse.identity(npix, format="csr")).tocsr()


def sky_kernels(grid, passes_list, pixels, one):
    """Sky kernels (K, K squared element-wise) for each number of smoothing passes.

    Restricted to ``pixels`` (rows and columns): the rows are computed as ``K[pixels] =
    K_1[pixels] K_1 ... K_1``, so the cost grows with the pixels in use, not the sky; paths
    through other pixels are kept. No smoothing (0 passes) is ``None``. ``one`` is the
    one-pass matrix (:func:`neighbour_matrix`).
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


def smooth_sky(stats, kernel):
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


def distance_kernel(edges_pc, sigma_pc):
    """Gaussian smoothing matrices (G, G squared) along the distance edges; None for sigma 0."""
    if sigma_pc <= 0:
        return None
    g = np.exp(-0.5 * ((edges_pc[:, None] - edges_pc[None, :]) / sigma_pc) ** 2)
    g[0] = 0.0
    g[0, 0] = 1.0  # the node at the first edge is not blurred into farther ones
    return g, g * g


def smooth_distance(stats, kernel):
    """Apply a distance kernel along the last axis of statistics of shape (5, ..., E) (``None``: none)."""
    if kernel is None:
        return stats
    g, g2 = kernel
    E = stats.shape[-1]
    out = (stats.reshape(-1, E) @ g.T).reshape(stats.shape)
    out[3] = (stats[3].reshape(-1, E) @ g2.T).reshape(stats.shape[1:])
    return out


def pixel_median(values, good):
    """Median of ``values`` over the pixels (axis -2) where ``good``, for each other index; NaN where none."""
    v = np.sort(np.where(good, values, np.inf).swapaxes(-1, -2), axis=-1)  # (..., E, P)
    c = np.count_nonzero(good, axis=-2)  # (..., E)
    lo = np.take_along_axis(v, np.maximum((c - 1) // 2, 0)[..., None], axis=-1)[..., 0]
    hi = np.take_along_axis(v, np.maximum(c // 2, 0)[..., None], axis=-1)[..., 0]
    return np.where(c > 0, 0.5 * (lo + hi), np.nan)


def node_observations(st):
    """Per-node mean residual, its variance, and effective tracer count from smoothed sums."""
    w, wr, wr2, w2, n = st
    with np.errstate(divide="ignore", invalid="ignore"):
        mean = np.where(w > 0, wr / w, 0.0)
        var = np.where(w > 0, np.maximum(wr2 / w - mean**2, 0.0), 0.0)
        neff = np.where(w2 > 0, w**2 / w2, 0.0)
        neff = np.minimum(neff, n)
    good = neff > 0.05
    # pool each node's scatter with the median scatter at its edge (few tracers -> pooled value)
    vmed = pixel_median(var, good)  # (..., E)
    finite = np.isfinite(vmed)
    fallback = pixel_median(vmed[..., None], finite[..., None])  # over the edges: (..., 1)
    fallback = np.where(np.isfinite(fallback), fallback, 0.01)
    vmed = np.where(finite, vmed, fallback)[..., None, :]
    vreg = (neff * var + PRIOR_COUNT * vmed) / (neff + PRIOR_COUNT)
    with np.errstate(divide="ignore", invalid="ignore"):
        obs_var = np.where(good, vreg / np.maximum(neff, 1e-12), np.inf)
    return mean, obs_var, neff


def kalman_smooth(mean, obs_var, edges_pc, q):
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


def distance_sigmas(edges):
    """Candidate widths (pc) of the distance kernel: none, and 1, 2, 3 times max(150 pc, the median step)."""
    step = float(np.median(np.diff(edges)))
    unit = max(150.0, step)
    return (0.0, unit, 2 * unit, 3 * unit)


def prior_variance(walk_variance, edges_pc):
    """Variance (mag^2) of the cumulative residual where no tracer informs it: the random walk's, q d [kpc]."""
    return walk_variance * edges_pc / 1000.0
