"""Posterior of the log-normal dust density given tracers: MAP, Laplace samples, prediction.

The tracers' likelihood: tracer ``i`` measures the cumulative extinction ``A_i`` out to its
own, uncertain distance. Its distance is marginalised on Gauss-Hermite nodes in log
distance (log-normal distance errors), which gives a predicted mean and an extra variance
(the extinction gained across the distance uncertainty). The residual follows a Student-t
distribution (a few per cent of wrong members or bad photometry do not pull the map), with
variance ``sigma_A^2 + V_distance + (tau A)^2``; ``tau`` is the fraction of extinction the
cells cannot resolve (structure below the pixel and bin size). A tracer beyond the grid's
far edge bounds the extinction at that edge from above only (a one-sided, censored term).

The posterior mode is found by Gauss-Newton in the white-noise coordinates ``xi`` with
conjugate gradients; the posterior is approximated by a Gaussian there (Laplace) and
sampled exactly from that Gaussian by perturbation-optimisation: each sample solves the
same linear system with the data and the prior perturbed by their own noise (Papandreou &
Yuille 2010; the linearised form of randomise-then-optimise, Bardsley et al. 2014), all
samples at once in one block of conjugate gradients.
"""

from dataclasses import dataclass

import numpy as np
from scipy import sparse

from ..layer import distance_nodes, log_distance_sigma

__all__ = ["TracerTerms", "Posterior", "fit_posterior", "draw_samples", "cumulative_at_nodes", "sample_distance_shift",
           "log_evidence"]

#: Student-t degrees of freedom of the tracer likelihood.
NU = 4.0
#: Gauss-Hermite nodes in log distance per tracer.
N_NODES = 5
DEBUG = False


@dataclass
class TracerTerms:
    """Per-tracer arrays of the likelihood (plain numpy; extinctions in mag).

    ``coef`` (n, n_nodes, n_bins): layer extinction of each bin crossed up to each distance
    node (the node's share of a partly crossed bin); ``weights`` (n_nodes,); ``col``: the
    tracer's active-pixel index; ``obs``/``obs_err``: A_V and its error; ``censored``:
    tracers beyond the far edge (``coef`` then holds the whole sight line).
    """

    coef: np.ndarray
    weights: np.ndarray
    col: np.ndarray
    obs: np.ndarray
    obs_err: np.ndarray
    censored: np.ndarray
    weight: np.ndarray = None  # likelihood weight: 1 / size of the tracer's near-duplicate group
    corr: np.ndarray = None    # correlation of the A_V error with the log-distance error
    nodes: np.ndarray = None   # the standardised log-distance offsets of the nodes

    def __post_init__(self):
        if self.weight is None:
            self.weight = np.ones(self.obs.size)
        if self.corr is None:
            self.corr = np.zeros(self.obs.size)
        if self.nodes is None:
            self.nodes = np.zeros(self.weights.size)

    @property
    def mean_coef(self):
        return np.einsum("q,iqk->ik", self.weights, self.coef)

    def subset(self, mask):
        return TracerTerms(self.coef[mask], self.weights, self.col[mask], self.obs[mask], self.obs_err[mask],
                           self.censored[mask], self.weight[mask], self.corr[mask], self.nodes)


def tracer_terms(lattice, layer_av, col, b, distance, distance_err, av, av_err, weight=None, corr=None,
                 n_nodes=N_NODES, log_shift=None):
    """Build :class:`TracerTerms` for tracers on ``lattice``.

    ``layer_av(b_deg, d_pc)`` is the smooth layer's cumulative A_V (plain arrays).
    ``log_shift`` (per tracer, in ln distance) moves the centre of each tracer's distance
    nodes from its measured distance to the mean of its true distance given the
    catalogue's distance distribution (:func:`sample_distance_shift`).
    """
    e = lattice.grid.distance_edges
    d = np.asarray(distance, float)
    sig_ln = log_distance_sigma(d, distance_err)
    x, w = distance_nodes(n_nodes) if n_nodes > 1 else (np.zeros(1), np.ones(1))
    centre = np.zeros(d.size) if log_shift is None else np.asarray(log_shift, float)
    dq = d[:, None] * np.exp(centre[:, None] + sig_ln[:, None] * x[None, :])  # (n, q)
    censored = d > e[-1]
    dq = np.where(censored[:, None], e[-1], np.minimum(dq, e[-1]))
    n, q = dq.shape
    lo, hi = e[:-1], e[1:]
    bb = np.asarray(b, float)
    # layer extinction at each bin's near edge and at min(max(d, near), far) along the tracer's own line
    near = layer_av(np.repeat(bb, lo.size), np.tile(lo, n)).reshape(n, 1, -1)
    reach = np.clip(dq[:, :, None], lo[None, None, :], hi[None, None, :])
    coef = layer_av(np.repeat(bb, q * lo.size), reach.ravel()).reshape(n, q, -1) - near
    coef = np.maximum(coef, 0.0)
    corr = None if corr is None else np.clip(np.asarray(corr, float), -0.99, 0.99)
    return TracerTerms(coef, w, np.asarray(col, np.int64), np.asarray(av, float), np.asarray(av_err, float), censored,
                       None if weight is None else np.asarray(weight, float), corr, x)


def sample_distance_shift(distance, distance_err, weight=None, bandwidth=0.08, max_sigma=1.0):
    """Shift (in ln distance) from each measured distance to its true distance's mean under the sample's distribution.

    A tracer measured at ``d`` with a log-normal error ``sigma`` is more likely to lie
    where the catalogue has more tracers: with the catalogue's density of ln distance
    ``n`` locally ``exp(beta ln d)``, the true ln distance is normal with mean
    ``ln d + beta sigma^2`` (for a sample uniform in a disc, ``beta = 2``: the tracers
    lie further than measured; near the catalogue's far limit ``beta < 0``). ``n`` is the
    catalogue's own distribution of measured ln distances (a Gaussian kernel density of
    ``bandwidth``), the empirical-Bayes form of the Lutz & Kelker (1973, PASP 85, 573)
    correction; being the true distribution blurred by the errors, it errs towards
    smaller shifts. Capped at ``max_sigma`` sigma.
    """
    d = np.asarray(distance, float)
    sig = log_distance_sigma(d, distance_err)
    x = np.log(np.maximum(d, 1e-9))
    w = np.ones(d.size) if weight is None else np.asarray(weight, float)
    h = float(bandwidth)
    grid = np.arange(x.min() - 4 * h, x.max() + 4 * h + h / 4, h / 4)
    idx = np.clip(np.searchsorted(grid, x), 0, grid.size - 1)
    hist = np.bincount(idx, w, minlength=grid.size)
    k = np.exp(-0.5 * (np.arange(-16, 17) / 4.0) ** 2)
    dens = np.convolve(hist, k / k.sum(), mode="same") + 1e-3 * w.sum() / grid.size
    beta = np.gradient(np.log(dens), grid)
    shift = np.interp(x, grid, beta) * sig**2
    return np.clip(shift, -max_sigma * sig, max_sigma * sig)


def cumulative_at_nodes(terms, g):
    """A at every distance node (n, n_nodes) for multipliers ``g`` (n_bins, n_pix[, m])."""
    gi = g[:, terms.col]  # (K, n[, m])
    if gi.ndim == 2:
        return np.einsum("iqk,ki->iq", terms.coef, gi)
    return np.einsum("iqk,kim->iqm", terms.coef, gi)


@dataclass
class Posterior:
    """Posterior mode and the linearised system around it."""

    xi: np.ndarray          # white-noise coordinates at the mode (n_bins, n_pix)
    f: np.ndarray           # log-density contrast at the mode
    jac: sparse.csr_matrix  # d(mean A_i)/d f at the mode (n, n_bins * n_pix)
    fisher: np.ndarray      # per-tracer curvature weight of the Laplace approximation (1/mag^2)
    predicted: np.ndarray   # mean A_i at the mode
    iterations: int
    converged: bool


def _noise(terms, a_nodes, tau):
    mean = a_nodes @ terms.weights
    # the extinction gained across the distance error, and (for correlated errors, as from an
    # apparent modulus) its covariance with the A_V error: E[e_A | node] = -rho sigma_A x
    cov = a_nodes @ (terms.weights * terms.nodes)
    var_d = np.maximum((a_nodes**2) @ terms.weights - mean**2 - 2.0 * terms.corr * terms.obs_err * cov, 0.0)
    return mean, terms.obs_err**2 + var_d + (tau * mean) ** 2


def _jacobian(lattice, terms, g):
    n, k = terms.col.size, lattice.n_bins
    vals = terms.mean_coef * g[:, terms.col].T  # (n, K)
    rows = np.repeat(np.arange(n), k)
    cols = (np.arange(k)[None, :] * lattice.n_pix + terms.col[:, None]).ravel()
    return sparse.csr_matrix((vals.ravel(), (rows, cols)), shape=(n, lattice.size))


def _hess_op(lattice, jac, jac_t, weight):
    shape = lattice.shape

    def apply(v):
        flat = v.reshape(lattice.size, -1)
        jv = jac @ lattice.forward(flat.reshape(*shape, -1)).reshape(lattice.size, -1)
        back = (jac_t @ (jv * weight[:, None])).reshape(*shape, -1)
        return (lattice.adjoint(back) + v.reshape(*shape, -1)).reshape(v.shape)

    return apply


def conjugate_gradient(apply, rhs, x0=None, tol=1e-4, max_iter=200):
    """Solve ``H x = rhs`` for SPD ``H``; ``rhs`` (K, P) or (K, P, m) solved column by column at once."""
    x = np.zeros_like(rhs) if x0 is None else x0.copy()
    r = rhs - apply(x) if x0 is not None else rhs.copy()
    p = r.copy()
    axes = (0, 1)
    rr = np.sum(r * r, axis=axes)
    stop = tol**2 * np.maximum(np.sum(rhs * rhs, axis=axes), 1e-30)
    it = 0
    for it in range(1, max_iter + 1):
        if np.all(rr <= stop):
            break
        hp = apply(p)
        alpha = rr / np.maximum(np.sum(p * hp, axis=axes), 1e-30)
        x += alpha * p
        r -= alpha * hp
        rr_new = np.sum(r * r, axis=axes)
        p = r + (rr_new / np.maximum(rr, 1e-30)) * p
        rr = rr_new
    return x, it


def _objective(lattice, terms, xi, tau):
    f = lattice.forward(xi)
    g = np.exp(f)
    a_nodes = cumulative_at_nodes(terms, g)
    mean, var = _noise(terms, a_nodes, tau)
    r = terms.obs - mean
    r = np.where(terms.censored & (r > 0), 0.0, r)
    z2 = r**2 / var
    data = 0.5 * (NU + 1.0) * np.sum(terms.weight * np.log1p(z2 / NU))
    return data + 0.5 * float(np.sum(xi**2)), f, g, a_nodes, mean, var, r


def fit_posterior(lattice, terms, tau, xi0=None, max_iter=12, cg_tol=1e-2, cg_iter=150):
    """Posterior mode by damped Gauss-Newton with iteratively reweighted Student-t weights."""
    xi = np.zeros(lattice.shape) if xi0 is None else xi0.copy()
    obj, f, g, a_nodes, mean, var, r = _objective(lattice, terms, xi, tau)
    converged = False
    it = 0
    for it in range(1, max_iter + 1):
        z2 = r**2 / var
        irls = terms.weight * (NU + 1.0) / (NU + z2) / var
        irls = np.where(terms.censored & (r == 0), 0.0, irls)
        jac = _jacobian(lattice, terms, g)
        jac_t = jac.T.tocsr()
        grad_data = lattice.adjoint((jac_t @ (irls * r)).reshape(lattice.shape))
        rhs = grad_data - xi
        step, n_cg = conjugate_gradient(_hess_op(lattice, jac, jac_t, irls), rhs, tol=cg_tol, max_iter=cg_iter)
        if DEBUG:
            print(f"  GN {it}: objective {obj:.2f}, CG {n_cg}")
        t = 1.0
        for _ in range(12):  # backtracking on the true objective
            trial = _objective(lattice, terms, xi + t * step, tau)
            if trial[0] <= obj - 1e-4 * t * float(np.sum(step * rhs)):
                break
            t *= 0.5
        else:
            converged = True
            break
        gain = obj - trial[0]
        xi = xi + t * step
        obj, f, g, a_nodes, mean, var, r = trial
        if gain < 0.5 + 1e-3 * abs(obj):
            converged = True
            break
    z2 = r**2 / var
    # curvature of the Student-t term at the mode in its Gauss-Newton form (the IRLS weight):
    # an outlier (large z) informs the posterior less, a well-fitted tracer as a Gaussian would
    fisher = terms.weight * (NU + 1.0) / (NU + z2) / var
    fisher = np.where(terms.censored & (r == 0), 0.0, fisher)
    jac = _jacobian(lattice, terms, g)
    return Posterior(xi, f, jac, fisher, mean, it, converged)


def draw_samples(lattice, post, n_samples, rng, cg_tol=1e-2, cg_iter=200):
    """Samples of ``xi`` from the Laplace posterior (n_bins, n_pix, n_samples).

    The block of conjugate gradients runs in single precision to a relative residual of
    ``cg_tol`` (the draws are random to begin with; the mode itself is found in double
    precision). A truncated solve leaves the draws nearer the prior, i.e. too wide: most
    where the data pin the posterior far inside it.
    """
    jac = post.jac.astype(np.float32)
    jac_t = jac.T.tocsr()
    fisher = post.fisher.astype(np.float32)
    n = jac.shape[0]
    eps_data = (rng.standard_normal((n, n_samples)) * np.sqrt(post.fisher)[:, None]).astype(np.float32)
    eps_prior = rng.standard_normal((*lattice.shape, n_samples)).astype(np.float32)
    # H^-1 (T'J' W^1/2 e1 + e2) = e2 + H^-1 (T'J' W^1/2 e1 - T'J'WJT e2): the right-hand side
    # then lies in the data's subspace, where a relative stopping rule of CG is meaningful
    shape = (*lattice.shape, n_samples)
    jt_e2 = jac @ lattice.forward(eps_prior).reshape(lattice.size, n_samples)
    rhs = lattice.adjoint((jac_t @ (eps_data - fisher[:, None] * jt_e2)).reshape(shape))
    dx, _ = conjugate_gradient(_hess_op(lattice, jac, jac_t, fisher), rhs, tol=cg_tol, max_iter=cg_iter)
    dx += eps_prior
    return post.xi[:, :, None] + dx.astype(np.float64)


def log_evidence(lattice, terms, tau, post, probes=8, steps=12, seed=0):
    """Laplace approximation of the log marginal likelihood of the tracers given the prior (up to a constant).

    ``-(Phi + 1/2 sum_i w_i ln v_i + 1/2 ln det H)`` at the posterior mode: ``Phi`` the
    objective (Student-t data term plus ``|xi|^2 / 2``), ``v_i`` each tracer's predicted
    variance (the likelihood's normalisation, which depends on the mode), ``H = I + T'J'WJT``
    the Gauss-Newton Hessian in the white-noise coordinates (MacKay 1992, Neural Comput. 4,
    415). ``ln det H`` by stochastic Lanczos quadrature (Ubaru, Chen & Saad 2017, SIAM J.
    Matrix Anal. Appl. 38, 1075): ``probes`` Rademacher vectors, ``steps`` Lanczos steps each,
    from a fixed ``seed`` so that candidates compared with each other share their probes.
    """
    obj, _, _, _, _, var, _ = _objective(lattice, terms, post.xi, tau)
    norm = 0.5 * float(np.sum(terms.weight * np.log(var)))
    jac = post.jac
    apply = _hess_op(lattice, jac, jac.T.tocsr(), post.fisher)
    rng = np.random.default_rng(seed)
    shape, size = lattice.shape, lattice.size
    total = 0.0
    for _ in range(probes):
        q = rng.choice([-1.0, 1.0], size=shape) / np.sqrt(size)
        q_prev, beta, alphas, betas = np.zeros(shape), 0.0, [], []
        for j in range(steps):
            w = apply(q) - beta * q_prev
            alpha = float(np.sum(w * q))
            w -= alpha * q
            alphas.append(alpha)
            beta = float(np.linalg.norm(w))
            if beta < 1e-10 or j == steps - 1:
                break
            betas.append(beta)
            q_prev, q = q, w / beta
        ev, vec = np.linalg.eigh(np.diag(alphas) + np.diag(betas, 1) + np.diag(betas, -1))
        total += size * float(np.sum(vec[0] ** 2 * np.log(np.maximum(ev, 1e-12))))
    return -(obj + norm + 0.5 * total / probes)
