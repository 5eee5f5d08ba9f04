"""DensityModel: the 3-D log-normal dust density model behind the answers interface."""

import time

import numpy as np
from astropy import units as u
from astropy.table import Table
from scipy import optimize
from scipy.spatial import cKDTree

from .. import _healpix
from .._errors import CatalogError, ModelNotFittedError
from .._progress import progress
from .._validation import check_int, check_nside, check_real, param_error, to_value
from ..grid import Grid
from ..layer import fit_layer
from ..model import ExtinctionModel
from .lattice import Lattice, active_pixels, chord, unit_vectors
from .solver import NU, cumulative_at_nodes, draw_samples, fit_posterior, tracer_terms

__all__ = ["DensityModel", "default_distance_edges"]

#: Floor on a tracer's A_V error (mag): no measurement of reddening is better than this.
AV_ERR_FLOOR = 0.02


def default_distance_edges(distance_max=6000.0, near_step=50.0, growth=0.1):
    """Distance edges (pc): ``near_step`` steps while they are finer than ``growth`` x distance, then geometric.

    The bins grow like typical distance errors of clusters (8%), which set the depth
    resolution a catalogue can support.
    """
    edges = [0.0]
    while edges[-1] < distance_max - 1e-6:
        step = max(near_step, growth * edges[-1])
        edges.append(min(edges[-1] + step, distance_max))
    if distance_max - edges[-2] < 0.3 * max(near_step, growth * edges[-2]):
        edges.pop(-2)
    return np.asarray(edges)


def duplicate_weights(l, b, d, av, av_err):
    """Likelihood weight of each tracer: 1 / the size of its group of near-duplicates.

    Tracers closer than 1% of their distance (at least 2 pc) in 3-D whose A_V agree within
    twice their combined error are one measurement listed more than once (as when two
    compilations are merged); each such group counts as one tracer, so that duplicating a
    catalogue does not shrink the uncertainties.
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    xyz = unit_vectors(l, b) * np.asarray(d, float)[:, None]
    pairs = cKDTree(xyz).query_pairs(r=max(2.0, 0.01 * float(np.median(d))), output_type="ndarray")
    if pairs.size:
        i, j = pairs[:, 0], pairs[:, 1]
        close = np.linalg.norm(xyz[i] - xyz[j], axis=1) <= np.maximum(2.0, 0.01 * np.minimum(d[i], d[j]))
        agree = np.abs(av[i] - av[j]) <= 2.0 * np.hypot(av_err[i], av_err[j])
        i, j = i[close & agree], j[close & agree]
    else:
        i = j = np.zeros(0, np.int64)
    n = np.size(l)
    graph = coo_matrix((np.ones(i.size), (i, j)), shape=(n, n))
    _, label = connected_components(graph, directed=False)
    size = np.bincount(label)
    return 1.0 / size[label], int(np.sum(size > 1))


def _blocks(l, b, d, n_folds, random_state):
    """Spatially blocked folds: HEALPix NSIDE 16 sky cells x 25%-deep shells, hashed to folds."""
    pix = _healpix.ang2pix(16, l, b)
    shell = np.floor(np.log(np.maximum(d, 1.0)) / 0.25).astype(np.int64)
    key = pix * 1000 + shell
    uniq, inv = np.unique(key, return_inverse=True)
    rng = np.random.default_rng(random_state)
    return rng.integers(0, n_folds, uniq.size)[inv]


class DensityModel(ExtinctionModel):
    """3-D model of the dust density: log-normal, spatially correlated, with posterior uncertainties.

    The density in each cell (HEALPix pixel x distance bin) is the fitted smooth layer times
    ``exp(f)``, with ``f`` a Gaussian field correlated along and across sight
    lines (amplitude ``s``, correlation length ``L``), so cumulative A_V is non-decreasing
    by construction. The amplitude and correlation length are chosen by cross-validation in
    spatially blocked folds; the fraction ``tau`` of extinction the cells cannot resolve is
    fitted by maximum likelihood on the held-out tracers. Answers come from samples of the
    Laplace approximation of the posterior and widen to the prior where there are no
    tracers.

    Parameters
    ----------
    nside : int
        HEALPix NSIDE of the cells (default 32, 1.8 deg).
    distance_max : Quantity['length']
        Far edge of the grid (default 6 kpc); the bins grow from 50 pc with distance
        (see :func:`default_distance_edges`) unless ``distance_edges`` is given.
    distance_edges : Quantity['length'], optional
    amplitudes : sequence of float
        Candidate prior standard deviations ``s`` of the log-density contrast.
    lengths : Quantity['length'] sequence
        Candidate correlation lengths ``L``.
    n_folds : int
        Spatially blocked cross-validation folds.
    n_samples : int
        Posterior samples kept for the answers.
    active_radius : Quantity['angle']
        Pixels within this angle of a tracer carry free parameters; the rest keep the prior.
    random_state : int
    quiet : bool, optional

    Attributes
    ----------
    grid_, layer_, tracers_
    amplitude_, length_, tau_ : chosen prior amplitude, correlation length (pc), unresolved fraction
    av_, av_err_ : ndarray (npix, n_edges)
        Posterior mean and standard deviation of cumulative A_V at pixel centres (the prior
        where no tracer informs).
    support_ : ndarray (npix, n_edges)
        ``1 - posterior variance / prior variance``: 0 where the answer is the prior.
    n_tracers_ : ndarray (npix, n_edges)
        Tracers in front of each node within the sky correlation width (kernel weighted).
    samples_ : ndarray (n_active, n_edges, n_samples)
        Posterior samples of cumulative A_V at the active pixels.
    cv_ : astropy.table.Table
        Cross-validation score of each candidate.
    """

    def __init__(
        self,
        nside=32,
        distance_max=6000 * u.pc,
        distance_edges=None,
        amplitudes=(0.3, 0.6, 1.2),
        lengths=(150,) * u.pc,
        n_folds=3,
        n_samples=48,
        active_radius=4 * u.deg,
        random_state=0,
        quiet=None,
    ):
        self.nside = nside
        self.distance_max = distance_max
        self.distance_edges = distance_edges
        self.amplitudes = amplitudes
        self.lengths = lengths
        self.n_folds = n_folds
        self.n_samples = n_samples
        self.active_radius = active_radius
        self.random_state = random_state
        self.quiet = quiet
        self.ordering = "ring"

    # -- parameters
    def _make_grid(self):
        check_nside(self.nside)
        if self.distance_edges is not None:
            edges = to_value("distance_edges", self.distance_edges, u.pc, default_unit=u.pc)
        else:
            dmax = float(to_value("distance_max", self.distance_max, u.pc, default_unit=u.pc))
            check_real("distance_max", dmax, 100.0, 1e5)
            edges = default_distance_edges(dmax)
        return Grid(self.nside, edges, "ring")

    def _candidates(self):
        amps = [check_real("amplitudes", float(a), 0.0, 5.0, low_inclusive=False) for a in np.atleast_1d(self.amplitudes)]
        lens = np.atleast_1d(to_value("lengths", self.lengths, u.pc, default_unit=u.pc)).astype(float)
        for x in lens:
            check_real("lengths", float(x), 1.0, 1e5)
        return [(a, float(L)) for a in amps for L in lens]

    # -- fitting
    def fit(self, tracers):
        """Fit the density model to a :class:`~dustkit.tracers.TracerSet`; returns ``self``."""
        t_start = time.perf_counter()
        grid = self._make_grid()
        folds_n = check_int("n_folds", self.n_folds, 2, 20)
        n_samples = check_int("n_samples", self.n_samples, 4, 4096)
        radius = float(to_value("active_radius", self.active_radius, u.deg, default_unit=u.deg))
        cands = self._candidates()
        n = len(tracers)
        if n < 5:
            raise CatalogError(f"The density model needs at least 5 tracers; got {n}. Hint: widen the region or add tracers.")
        l = np.asarray(tracers.l, float)
        b = np.asarray(tracers.b, float)
        d = np.asarray(tracers.distance, float)
        de = np.asarray(tracers.distance_err, float)
        av = np.asarray(tracers.av, float)
        ae = np.asarray(tracers.av_err, float)
        floored = int(np.sum(ae < AV_ERR_FLOOR))
        ae = np.maximum(ae, AV_ERR_FLOOR)
        layer = fit_layer(tracers)
        pixels = active_pixels(grid, l, b, radius)
        col = np.searchsorted(pixels, grid.pixel(l, b))
        fold = _blocks(l, b, d, folds_n, self.random_state)
        weight, n_groups = duplicate_weights(l, b, d, av, ae)
        rng = np.random.default_rng(self.random_state)
        rows = []
        best = None
        bar = progress(total=len(cands) * (folds_n + 1) + 1, desc="density model", quiet=self.quiet)
        with bar:
            for amp, length in cands:
                lat = Lattice(grid, pixels, amp, length)
                terms = tracer_terms(lat, layer._av, col, b, d, de, av, ae, weight)
                full = fit_posterior(lat, terms, tau=0.1)  # fold fits start from it
                resid, pvar, base = np.empty(n), np.empty(n), np.empty(n)
                for k in range(folds_n):
                    train = fold != k
                    test = ~train
                    if not test.any() or not train.any():
                        bar.update(1)
                        continue
                    post = fit_posterior(lat, terms.subset(train), tau=0.1, xi0=full.xi, max_iter=4)
                    xs = draw_samples(lat, post, 8, rng)
                    mean, var, var_d = _predict_terms(lat, terms.subset(test), xs, post.f)
                    resid[test] = av[test] - mean
                    pvar[test] = var + var_d
                    base[test] = mean
                    bar.update(1)
                ok = ~terms.censored
                tau, score = _fit_tau(resid[ok], pvar[ok], ae[ok], base[ok])
                rows.append((amp, length, tau, score, float(np.sqrt(np.mean(resid[ok] ** 2))),
                             float(np.mean(np.abs(resid[ok]) <= np.sqrt(pvar[ok] + ae[ok] ** 2 + (tau * base[ok]) ** 2)))))
                if best is None or score < best[3]:
                    best, best_xi = rows[-1], full.xi
                bar.update(1)
            amp, length, tau = best[0], best[1], best[2]
            lat = Lattice(grid, pixels, amp, length)
            terms = tracer_terms(lat, layer._av, col, b, d, de, av, ae, weight)
            post = fit_posterior(lat, terms, tau=tau, xi0=best_xi, max_iter=20)
            xs = draw_samples(lat, post, n_samples, rng)
            bar.update(1)
        self._store(grid, layer, lat, terms, post, xs, tau, tracers)
        self.cv_ = Table(rows=rows, names=("amplitude", "length", "tau", "score", "rms", "coverage"))
        self.cv_["length"].unit = u.pc
        self.cv_["rms"].unit = u.mag
        self.cv_.meta["validation"] = (f"{folds_n} folds of spatial blocks (HEALPix NSIDE 16 cells x 25%-deep "
                                       "distance shells): neighbouring and duplicated tracers share a fold")
        self.build_report_ = {
            "scheme": "3-D log-normal density", "n_tracers": n, "n_active_pixels": int(pixels.size),
            "amplitude": amp, "length_pc": length, "tau": tau, "errors_floored": floored, "duplicate_groups": n_groups,
            "converged": bool(post.converged), "seconds": time.perf_counter() - t_start,
        }
        self.uncertainty_scheme_ = "posterior"
        return self

    def _store(self, grid, layer, lat, terms, post, xs, tau, tracers):
        e = grid.distance_edges
        npix = grid.npix
        lc_all, bc_all = grid.pixel_centres()
        inc = _layer_increments(layer, bc_all, e)                          # (npix, K)
        prior_var = _prior_cumulative_var(inc, lat.bin_correlation(), lat.amplitude)  # (npix, E)
        av_prior = np.concatenate([np.zeros((npix, 1)), np.cumsum(inc, axis=1)], axis=1)
        # point estimate: the posterior mode (monotone: the density is positive); spread: the
        # Laplace approximation propagated linearly to cumulative A_V (the delta method)
        g = np.exp(post.f)                                                  # (K, P)
        inc_act = inc[lat.pixels].T * g                                     # (K, P)
        mode = np.concatenate([np.zeros((1, lat.n_pix)), np.cumsum(inc_act, axis=0)], axis=0)
        dev = inc_act[:, :, None] * (lat.forward(xs) - post.f[:, :, None])  # (K, P, S)
        cum = np.concatenate([np.zeros((1, *dev.shape[1:])), np.cumsum(dev, axis=0)], axis=0)  # (E, P, S)
        av = av_prior.copy()
        var = prior_var.copy()
        av[lat.pixels] = mode.T
        var[lat.pixels] = np.mean(cum**2, axis=2).T
        self.grid_ = grid
        self.layer_ = layer
        self.tracers_ = tracers
        self.amplitude_, self.length_, self.tau_ = float(lat.amplitude), float(lat.length), float(tau)
        self.av_ = av
        self.av_err_ = np.sqrt(var)
        self.prior_err_ = np.sqrt(prior_var)
        with np.errstate(invalid="ignore", divide="ignore"):
            self.support_ = np.clip(1.0 - var / np.where(prior_var > 0, prior_var, np.inf), 0.0, 1.0)
        self.active_pixels_ = lat.pixels
        self.samples_ = np.ascontiguousarray(np.transpose(cum, (1, 0, 2))).astype(np.float32)  # deviations
        self.differential_ = np.diff(av, axis=1) / (np.diff(e) / 1000.0)
        counts = np.zeros((npix, e.size - 1), np.int64)
        k, _ = grid.edge_position(np.asarray(tracers.distance, float))
        np.add.at(counts, (grid.pixel(np.asarray(tracers.l, float), np.asarray(tracers.b, float)), np.minimum(k, e.size - 2)), 1)
        self.counts_ = counts
        self.n_tracers_ = _informing(lat, counts, npix)
        self._resid_ = av - av_prior
        self._post_var_ = var

    # -- answers (the interface of ExtinctionModel)
    def _av_arrays(self, l, b, d, distance_err=None):
        grid = self.grid_
        e = grid.distance_edges
        pix, wgt = grid.interp_weights(l, b)
        k, f = grid.edge_position(np.minimum(d, e[-1]))
        k = np.minimum(k, e.size - 2)
        f = np.clip(f, 0.0, 1.0)
        a_lo, a_hi = self.av_[pix, k], self.av_[pix, k + 1]
        v_lo, v_hi = self.av_err_[pix, k] ** 2, self.av_err_[pix, k + 1] ** 2
        a_node = np.sum(wgt * ((1 - f) * a_lo + f * a_hi), axis=0)
        v_node = np.sum(wgt * ((1 - f) * v_lo + f * v_hi), axis=0)
        _, bc = grid.pixel_centres(pix.ravel())
        dd = np.minimum(d, e[-1])
        lay_c = np.sum(wgt * self.layer_._av(bc.reshape(pix.shape), np.broadcast_to(dd, pix.shape)), axis=0)
        lay_t = self.layer_._av(b, dd)
        ratio = np.where(lay_c > 0, lay_t / np.maximum(lay_c, 1e-300), 1.0)
        a = a_node * ratio
        var = v_node * ratio**2
        beyond = d > e[-1]
        if np.any(beyond):
            extra = np.maximum(self.layer_._av(b[beyond], d[beyond]) - lay_t[beyond], 0.0)
            a[beyond] += extra
            var[beyond] += (extra * self.amplitude_) ** 2
        var = var + (self.tau_ * a) ** 2
        if distance_err is not None:
            var = var + (self._slope(l, b, d) * distance_err) ** 2
        return a, np.sqrt(var)

    def _slope(self, l, b, d):
        grid = self.grid_
        e = grid.distance_edges
        k, _ = grid.edge_position(np.minimum(d, e[-1]))
        k = np.minimum(k, e.size - 2)
        pix, wgt = grid.interp_weights(l, b)
        rise = np.sum(wgt * (self.av_[pix, k + 1] - self.av_[pix, k]), axis=0)
        return np.maximum(rise, 0.0) / (e[k + 1] - e[k])

    def support(self, l, b=None, distance=None):
        """How far each answer is informed by tracers: ``(support, n_tracers, prior_only)``.

        ``support`` is ``1 - posterior variance / prior variance`` (0: the answer is the prior);
        ``n_tracers`` the kernel-weighted number of tracers in front; ``prior_only`` flags
        support below 0.1.
        """
        self._check_fitted()
        lv, bv, dv, shape = self._positions(l, b, distance)
        grid = self.grid_
        e = grid.distance_edges
        pix, wgt = grid.interp_weights(lv, bv)
        k, f = grid.edge_position(np.minimum(dv, e[-1]))
        k = np.minimum(k, e.size - 2)
        f = np.clip(f, 0.0, 1.0)
        s = np.sum(wgt * ((1 - f) * self.support_[pix, k] + f * self.support_[pix, k + 1]), axis=0)
        nt = np.sum(wgt * ((1 - f) * self.n_tracers_[pix, k] + f * self.n_tracers_[pix, k + 1]), axis=0)
        return s.reshape(shape), nt.reshape(shape), (s < 0.1).reshape(shape)

    def __repr__(self):
        if not hasattr(self, "av_"):
            return f"DensityModel(nside={self.nside}, not fitted)"
        return (f"DensityModel({self.grid_!r}, {len(self.tracers_)} tracers, {self.layer_}, "
                f"s={self.amplitude_:.2f}, L={self.length_:.0f} pc, tau={self.tau_:.3f})")


def _layer_increments(layer, b_deg, edges):
    n = np.size(b_deg)
    cum = layer._av(np.repeat(b_deg, edges.size), np.tile(edges, n)).reshape(n, edges.size)
    return np.maximum(np.diff(cum, axis=1), 0.0)


def _prior_cumulative_var(inc, corr, amplitude):
    """Prior variance of cumulative A_V at every edge for layer increments ``inc`` (npix, K)."""
    m = amplitude**2 * corr  # covariance of the linearised density contrast between bins
    npix, k = inc.shape
    out = np.zeros((npix, k + 1))
    # V_e = sum_{i,j<e} inc_i inc_j m_ij, accumulated edge by edge
    partial = np.zeros(npix)
    for j in range(k):
        lower = inc[:, :j] @ m[:j, j] if j else 0.0
        partial = partial + 2.0 * inc[:, j] * lower + inc[:, j] ** 2 * m[j, j]
        out[:, j + 1] = partial
    return out


def _informing(lat, counts, npix):
    """Kernel-weighted number of tracers in front of each node, for all pixels (npix, n_edges)."""
    k = counts.shape[1]
    act = counts[lat.pixels].T.astype(float)  # (K, P)
    smoothed = np.empty_like(act)
    for j in range(k):
        kern = lat.kernels[j]
        smoothed[j] = (kern @ (kern.T @ act[j]))
    out = np.zeros((npix, k + 1))
    out[lat.pixels, 1:] = np.cumsum(smoothed, axis=0).T
    return out


def _predict_terms(lat, terms, xs, f_mode):
    """Mean, posterior variance and distance variance of held-out tracers' A (mode + linearised samples)."""
    g = np.exp(f_mode)
    a_nodes = cumulative_at_nodes(terms, g)     # (n, q)
    mean = a_nodes @ terms.weights
    var_d = np.maximum((a_nodes**2) @ terms.weights - mean**2, 0.0)
    dev = g[:, :, None] * (lat.forward(xs) - f_mode[:, :, None])
    lin = np.einsum("ik,kis->is", terms.mean_coef, dev[:, terms.col])
    return mean, np.mean(lin**2, axis=1), var_d


def _fit_tau(resid, pvar, err, base):
    """Unresolved fraction ``tau`` by maximum Student-t likelihood of held-out residuals; returns (tau, score)."""
    def nll(t):
        v = pvar + err**2 + (t * base) ** 2
        z2 = resid**2 / v
        return float(np.mean(0.5 * np.log(v) + 0.5 * (NU + 1.0) * np.log1p(z2 / NU)))

    res = optimize.minimize_scalar(nll, bounds=(0.0, 1.0), method="bounded", options={"xatol": 1e-4})
    return float(res.x), float(res.fun)
