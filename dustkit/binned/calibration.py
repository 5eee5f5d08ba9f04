"""Calibration of the predictive uncertainty on held-out tracers (maximum likelihood).

The predictive variance of the binned model is
``scale^2 (V(kappa) + root^2 * A_V + (frac * A_V)^2)``: the model's own variance ``V``,
whose data part is scaled by a fitted factor ``kappa``, plus the unresolved scatter of
extinction on scales the model cannot resolve; :func:`predictive_variance` evaluates it,
:func:`calibrate_scatter` fits it.

``V`` keeps a prior spread where no tracer informs a node: the information the tracers
add to the smoother's prior, ``1/post_var - 1/prior``, is what ``kappa`` scales (see
:func:`model_variance`), ``kappa`` is at least :data:`KAPPA_MIN`, and where the tracers
add nothing ``V`` is the prior of the errors, a random walk ``prior_walk * d`` whose
strength is measured on the held-out tracers' scatter about the layer
(:func:`prior_walk`), not fitted by the likelihood. (Scaling the whole variance let a
small catalogue, whose likelihood prefers a tiny ``kappa``, shrink the errors of empty sky
far from any tracer to 10^-4 mag. The smoother's own walk strength is chosen for its
predictions by cross-validation and is often ten times the scatter the layer leaves, so it
is not used as the spread of empty sky.)
"""

import numpy as np

from .crossval import prediction_matrix

__all__ = ["STUDENT_NU", "KAPPA_MIN", "calibrate_scatter", "calibrate_on_heldout", "model_variance",
           "predictive_variance", "prior_walk"]

STUDENT_NU = 8.0  # degrees of freedom of the predictive distribution
#: The fitted factor on the data part of the smoother's variance is at least this: held-out
#: tracers may show the node scatter overstates the error of the smoothed estimate, but not
#: by more than a factor 10 in variance (about 3 in sigma).
KAPPA_MIN = 0.1
#: Prior on log(kappa): normal around 0 (the smoother's own variance) with this width. A few
#: thousand held-out tracers outweigh it; a few dozen cannot pin kappa down, and without it
#: the likelihood sent kappa to its bound and 40-tracer catalogues covered 20-50% of the truth.
KAPPA_LOG_SD = 0.5


def prior_walk(distance_pc, residual, own_var):
    """Strength (mag^2/kpc) of the random walk that is the errors' prior where no tracer informs.

    The held-out tracers' residuals about the layer are taken as normal with variance
    ``q d + own_var`` (d in kpc; ``own_var`` the tracer's own: its A_V error squared plus
    the layer's slope times its distance error, squared); ``q`` is the value at which the
    median of ``residual^2 / (q d + own_var)`` is the chi-square(1) median, 0.4549 (a median, so that
    outliers and the few tracers behind clouds do not set the spread of the whole sky),
    plus one standard error of the least-squares estimate from the tracers within 3 sigma,
    so that a small catalogue which cannot pin it down does not claim it is small.
    """
    d = np.maximum(np.asarray(distance_pc, float) / 1000.0, 1e-3)
    r2 = np.asarray(residual, float) ** 2
    ae2 = np.asarray(own_var, float)
    if r2.size == 0:
        return 0.0
    chi2_median = 0.454936  # median of chi-square with 1 degree of freedom (from memory; 0.4549364)
    lo, hi = 0.0, max(float(np.max(r2 / d)), 1e-12)
    if np.median(r2 / (lo * d + ae2 + 1e-12)) <= chi2_median:
        q = 0.0
    else:
        for _ in range(60):  # bisection: the median falls as q grows
            mid = 0.5 * (lo + hi)
            if np.median(r2 / (mid * d + ae2 + 1e-12)) > chi2_median:
                lo = mid
            else:
                hi = mid
        q = 0.5 * (lo + hi)
    keep = r2 <= 9.0 * (q * d + ae2)
    y, dk = r2[keep] - ae2[keep], d[keep]
    dd = max(float(np.sum(dk * dk)), 1e-12)
    se = float(np.sqrt(np.sum(dk * dk * (y - q * dk) ** 2))) / dd
    return q + se


def model_variance(post_var, prior_var, kappa, prior_ratio=1.0):
    """The model's own variance with its data part scaled by ``kappa`` (mag^2).

    ``prior_var`` is the smoother's prior (where ``post_var`` equals it, the tracers added
    nothing); the errors' prior is ``prior_ratio * prior_var``. With
    ``1/V = 1/(ratio prior) + kappa^-1 (1/post - 1/prior)`` for ``post <= prior``: ``V`` is
    the errors' prior where the tracers add nothing and ``~ kappa * post`` where they
    dominate. Any excess of ``post_var`` over the prior (the squared isotonic shift, added
    to it) is data too and is scaled by ``kappa``.
    """
    post = np.asarray(post_var, float)
    prior = np.asarray(prior_var, float)
    p = np.minimum(post, prior)
    pe = prior_ratio * prior
    with np.errstate(divide="ignore", invalid="ignore"):
        v = np.where(prior > 0, kappa * pe * p * prior / np.maximum(kappa * p * prior + pe * (prior - p), 1e-300), 0.0)
    return v + kappa * np.maximum(post - prior, 0.0)


def predictive_variance(scatter, post_var, av, prior_var=None):
    """Predictive variance (mag^2) from the calibrated ``scatter`` dict, the model's variance and A_V.

    ``prior_var`` is the random walk's prior variance at the same places
    (:func:`dustkit.binned.smoothing.prior_variance`). A ``scatter`` calibrated before the prior
    was kept (no ``"prior_kept"`` entry, model files of earlier versions) scales all of
    ``post_var``, as it was fitted.
    """
    s = scatter
    av = np.asarray(av)
    if s.get("prior_kept", 0.0) and prior_var is not None:
        v = model_variance(post_var, prior_var, s["kappa"], s.get("prior_ratio", 1.0))
    else:
        v = s["kappa"] * post_var
    return s["scale"] ** 2 * (v + s["root"] ** 2 * av + (s["frac"] * av) ** 2)


def calibrate_on_heldout(rows, layer, setting, rng, use=None, max_tracers=5000, walk_prior=None):
    """The calibrated scatter (see :func:`calibrate_scatter`) from the held-out tracers.

    Each held-out tracer (those where ``use``, default all; at most ``max_tracers``, a
    random subset drawn with ``rng``) is predicted from its fold's training tracers with
    the chosen ``setting`` (sky passes, distance kernel, walk strength) *after* the
    monotone step, as the final model is (:meth:`HeldOutRows.monotone`: isotonic sight
    lines, their variance plus the squared isotonic shift), integrating over its distance
    uncertainty with 7 Gauss-Hermite nodes in log distance. ``rows`` is a
    :class:`dustkit.binned.crossval.HeldOutRows`; ``walk_prior`` (mag^2/kpc) the strength
    of the errors' prior (:func:`prior_walk`; default: the smoother's walk).
    """
    h = rows.heldout
    l, b, d, de, fold = h.l, h.b, h.distance, h.distance_err, h.fold
    gh_x, gh_w = np.polynomial.hermite_e.hermegauss(7)
    gh_w = gh_w / gh_w.sum()
    rows.obs_cache.clear()
    take = np.arange(l.size) if use is None else np.nonzero(use)[0]
    if take.size > max_tracers:  # a few thousand held-out tracers pin down three numbers
        take = np.sort(rng.choice(take, max_tracers, replace=False))
    frac_err = np.where(d[take] > 0, de[take] / d[take], 0.0)
    node_pred = np.empty((gh_x.size, take.size))
    node_var = np.empty((gh_x.size, take.size))
    node_prior = np.empty((gh_x.size, take.size))
    r, pv = rows.monotone(*setting, layer)
    q = setting[2]
    for f in range(len(rows.members)):
        isel = np.nonzero(fold[take] == f)[0]
        sel = take[isel]
        at = np.searchsorted(rows.members[f], sel)  # sel is part of fold f: reuse its sky weights
        pix_w = (rows.sky_w[f][0][:, at], rows.sky_w[f][1][:, at])
        for j, xj in enumerate(gh_x):
            dj = d[sel] * np.exp(xj * frac_err[isel])
            wj = prediction_matrix(rows.grid, rows.maps[f], rows.n_rows, l[sel], b[sel], dj, pix_w)
            node_pred[j, isel] = np.maximum(layer.av_pc(b[sel], dj) + wj @ r, 0.0)
            # as the answers: beyond the last edge the walk's variance keeps growing
            node_var[j, isel] = wj @ pv + q * np.maximum(dj - rows.edges[-1], 0.0) / 1000.0
            node_prior[j, isel] = q * dj / 1000.0
    ratio = 1.0 if walk_prior is None else float(walk_prior) / q if q > 0 else 1.0
    out = calibrate_scatter(h.av[take], h.av_err[take], node_pred, node_var, gh_w, node_prior, ratio)
    out["prior_walk"] = float(ratio * q)
    return out


def calibrate_scatter(av, av_err, node_pred, node_var, node_weight, node_prior, prior_ratio=1.0):
    """Fit the scatter of extinction the model cannot resolve, by maximum likelihood.

    The fit maximises the likelihood times a normal prior on ``log(kappa)`` around 0
    (:data:`KAPPA_LOG_SD`), which only matters for small held-out sets. Each held-out
    tracer's likelihood is a mixture over its distance uncertainty
    (quadrature nodes ``j`` with weights ``node_weight``) of Student-t densities (8 degrees
    of freedom: clouds give heavier tails than a normal) centred on the model's prediction
    at that distance, with squared scale ``V(kappa) + av_err^2 + sigma_u^2``, where
    ``sigma_u^2 = root^2 * A + (frac * A)^2`` is the unresolved scatter (A in mag): a term
    growing like the square root of the column, as for many small clouds, and one
    proportional to it, as for a few large ones; both vanish where A_V does (near the Sun). Integrating over the
    distance (rather than linearising it with a slope) keeps the tracers' distance errors
    from being mistaken for, or hiding, the model's own error. ``V(kappa)`` is the model's
    own variance (:func:`model_variance` of ``node_var``, the smoother's prior ``node_prior``
    and the errors' prior ``prior_ratio * node_prior``) with
    its data part scaled by a fitted factor ``kappa >= KAPPA_MIN``: the node variances come
    from the spread of tracers within a node, which need not equal the error of its
    smoothed estimate, but the prior where no tracer reaches is not the data's to shrink.
    The reported 1-sigma error is the half-width of the central 68.27% interval of that
    t distribution (``scale`` = 1.07 x the t scale).
    """
    from scipy import optimize, special

    nu = STUDENT_NU
    resid2 = (av[None, :] - node_pred) ** 2 / nu
    ae2 = av_err[None, :] ** 2 + 1e-8
    pred2 = node_pred**2
    # V(kappa) = kappa A / (kappa B + C) + kappa x: A = Pe p P, B = p P, C = Pe (P - p),
    # p = min(var, P), Pe = ratio P the errors' prior, x the excess; dV/dkappa = A C / den^2 + x
    prior = np.asarray(node_prior, float)
    p = np.minimum(node_var, prior)
    excess = np.maximum(node_var - prior, 0.0)
    pb = p * prior
    pa = prior_ratio * prior * pb
    rest = prior_ratio * prior * (prior - p)
    c = float(np.exp(special.gammaln((nu + 1) / 2) - special.gammaln(nu / 2) - 0.5 * np.log(nu * np.pi)))
    assert nu == 8.0  # (1 + x)^-(nu+1)/2 below is written out as 1 / ((1 + x)^4 sqrt(1 + x))
    s2 = np.empty_like(node_pred)
    t = np.empty_like(node_pred)
    u = np.empty_like(node_pred)
    g = np.empty_like(node_pred)
    den = np.empty_like(node_pred)
    dv = np.empty_like(node_pred)

    def nll(theta):
        """Negative log-likelihood and its gradient in theta = log(kappa, root^2, frac^2)."""
        kappa, root2, frac2 = np.exp(theta)
        # the model's variance V and dV/dkappa
        np.multiply(pb, kappa, out=den)
        np.add(den, rest, out=den)                  # kappa B + C
        np.maximum(den, 1e-300, out=den)
        np.divide(pa, den, out=dv)                  # A / den
        np.multiply(dv, kappa, out=s2)              # V without the excess
        np.multiply(dv, rest, out=dv)
        np.divide(dv, den, out=dv)
        np.add(dv, excess, out=dv)                  # dV / dkappa
        np.add(s2, kappa * excess, out=s2)
        # squared scale S and the t density c (1 + R/S)^-(nu+1)/2 / sqrt(S), R = r^2 / nu
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
            -np.sum((node_weight @ (g * dv)) / dens) * kappa,
            -np.sum((node_weight @ (g * node_pred)) / dens) * root2,
            -np.sum((node_weight @ (g * pred2)) / dens) * frac2,
        ])
        lk = theta[0] / KAPPA_LOG_SD**2  # the prior on log(kappa)
        grad[0] += lk
        return -np.sum(np.log(c * dens)) + 0.5 * lk * theta[0], grad

    # the likelihood has more than one basin (the model's own variance and the unresolved
    # scatter can trade places): start a gradient search from the best points of a coarse grid
    lo = float(np.log(KAPPA_MIN))
    grid = np.log(np.array(np.meshgrid([KAPPA_MIN, 0.5, 1.0, 3.0, 10.0], [1e-6, 1e-3, 1e-2, 0.1],
                                       [1e-6, 1e-4, 1e-3, 1e-2, 0.1], indexing="ij")).reshape(3, -1).T)
    values = np.array([nll(theta)[0] for theta in grid])
    best = None
    for start in grid[np.argsort(values)[:3]]:
        res = optimize.minimize(nll, start, jac=True, method="L-BFGS-B",
                                bounds=[(lo, 6.0), (-25.0, 3.0), (-25.0, 3.0)])
        if best is None or res.fun < best.fun:
            best = res
    kappa, root2, frac2 = np.exp(best.x)
    kappa = max(float(kappa), KAPPA_MIN)
    # the reported 1-sigma error is the half-width of the central 68.27% interval
    scale = float(special.stdtrit(nu, 0.5 + 0.6827 / 2))
    return {"kappa": float(kappa), "root": float(np.sqrt(root2)), "frac": float(np.sqrt(frac2)), "scale": scale,
            "prior_kept": 1.0, "prior_ratio": float(prior_ratio)}
