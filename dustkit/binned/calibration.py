"""Calibration of the predictive uncertainty on held-out tracers (maximum likelihood).

The predictive variance of the binned model is
``scale^2 (kappa * post_var + root^2 * A_V + (frac * A_V)^2)``: the smoother's own variance
times a fitted factor, plus the unresolved scatter of extinction on scales the model cannot
resolve; :func:`predictive_variance` evaluates it, :func:`calibrate_scatter` fits it.
"""

import numpy as np

from .crossval import prediction_matrix

__all__ = ["STUDENT_NU", "calibrate_scatter", "calibrate_on_heldout", "predictive_variance"]

STUDENT_NU = 8.0  # degrees of freedom of the predictive distribution


def predictive_variance(scatter, post_var, av):
    """Predictive variance (mag^2) from the calibrated ``scatter`` dict, the smoother's variance and A_V."""
    s = scatter
    av = np.asarray(av)
    return s["scale"] ** 2 * (s["kappa"] * post_var + s["root"] ** 2 * av + (s["frac"] * av) ** 2)


def calibrate_on_heldout(rows, layer, setting, rng, max_tracers=5000):
    """The calibrated scatter (see :func:`calibrate_scatter`) from the held-out tracers.

    Each held-out tracer (at most ``max_tracers``, a random subset drawn with ``rng``) is
    predicted from its fold's training tracers with the chosen ``setting`` (sky passes,
    distance kernel, walk strength), integrating over its distance uncertainty with
    7 Gauss-Hermite nodes in log distance. ``rows`` is a
    :class:`dustkit.binned.crossval.HeldOutRows`.
    """
    h = rows.heldout
    l, b, d, de, fold = h.l, h.b, h.distance, h.distance_err, h.fold
    gh_x, gh_w = np.polynomial.hermite_e.hermegauss(7)
    gh_w = gh_w / gh_w.sum()
    rows.obs_cache.clear()
    take = np.arange(l.size)
    if take.size > max_tracers:  # a few thousand held-out tracers pin down three numbers
        take = np.sort(rng.choice(take, max_tracers, replace=False))
    frac_err = np.where(d[take] > 0, de[take] / d[take], 0.0)
    node_pred = np.empty((gh_x.size, take.size))
    node_var = np.empty((gh_x.size, take.size))
    r, pv = rows.smoothed(*setting)
    for f in range(len(rows.members)):
        isel = np.nonzero(fold[take] == f)[0]
        sel = take[isel]
        at = np.searchsorted(rows.members[f], sel)  # sel is part of fold f: reuse its sky weights
        pix_w = (rows.sky_w[f][0][:, at], rows.sky_w[f][1][:, at])
        for j, xj in enumerate(gh_x):
            dj = d[sel] * np.exp(xj * frac_err[isel])
            wj = prediction_matrix(rows.grid, rows.maps[f], rows.n_rows, l[sel], b[sel], dj, pix_w)
            node_pred[j, isel] = np.maximum(layer.av_pc(b[sel], dj) + wj @ r, 0.0)
            node_var[j, isel] = wj @ pv
    return calibrate_scatter(h.av[take], h.av_err[take], node_pred, node_var, gh_w)


def calibrate_scatter(av, av_err, node_pred, node_var, node_weight):
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

    nu = STUDENT_NU
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
