"""Steps in A_V against distance along one sight line: the fit, the scan, the bootstrap (find_steps).

See :mod:`dustkit.features` for the method and its references.
"""

import warnings

import numpy as np
from astropy import units as u
from astropy.table import QTable
from scipy.special import ndtr

from ..exceptions import AssumptionWarning, RowsRejectedWarning
from .._lib.validation import check_int, check_real, check_seed, param_error, to_scalar, to_value
from ..answers import CAUTION

__all__ = [
    "STEP_METHOD", "Line", "find_steps_arrays", "check_common", "steps_table", "find_steps", "reject_rows",
    "find_steps_plain",
]


#: One-line description of the method, stored in table metadata.
STEP_METHOD = (
    "step in cumulative A_V against distance, smeared by each tracer's distance error "
    "(after Schlafly et al. 2014, ApJ 786, 29); bootstrap errors; BIC significance"
)


_OUTLIER_FRACTION = 0.05   # prior fraction of tracers that fit no smooth profile


_OUTLIER_WIDTH = 1.0       # mag; spread of the outlier component


_SCATTER_FLOOR = 0.02      # mag; smallest intrinsic scatter assumed along a sight line


_MIN_FRAC_ERR = 0.01       # smallest fractional distance error (keeps the smearing finite)


_MAX_CANDIDATES = 64       # candidate step distances per scan


_N_REFINE = 17             # points of the local refinement of the best candidate


_N_WINDOW = 25             # candidate points of the bootstrap window


_WINDOW_FACTOR = 2.0       # the step's own checks and size use the tracers within this factor of it


_GAMMA_SPAN = 0.4          # ln-distance span over which the local slope of the tracer counts is taken


_GAMMA_RANGE = (-1.0, 3.0) # allowed count slope per ln distance in the step's smearing


_EDGE_GAMMA = 6.0          # largest |count slope| in the correction of the smooth part


_N_ITER_BOOT = 5           # EM iterations per bootstrap resample (the best distance is settled by then)


_N_ITER = 8                # EM iterations (converged to ~0.01 in ln L from the median start)


def _density_factors(var):
    """Normalising factors of the good and outlier components (prior weights included)."""
    var_o = var + _OUTLIER_WIDTH**2
    return (1.0 - _OUTLIER_FRACTION) / np.sqrt(2.0 * np.pi * var), _OUTLIER_FRACTION / np.sqrt(2.0 * np.pi * var_o), var_o


def _solve(cols, w, y, delta_col=None):
    """Weighted least squares, batched: coefficients of ``cols`` (and of ``delta_col``).

    ``cols`` is a list of arrays broadcasting to ``w``'s shape (..., n). With ``delta_col``
    (the responsibilities r of the behind component) the last unknown is the step, whose
    normal-equation diagonal is sum w r^2 + w r (1 - r) = sum w r (the EM M-step of the
    two-component mixture). Returns (..., K) coefficients.
    """
    allc = list(cols) + ([delta_col] if delta_col is not None else [])
    k = len(allc)
    m = np.empty(w.shape[:-1] + (k, k))
    rhs = np.empty(w.shape[:-1] + (k,))
    for i in range(k):
        wi = w * allc[i]
        rhs[..., i] = (wi * y).sum(-1)
        for j in range(i, k):
            last = delta_col is not None and i == j == k - 1
            m[..., i, j] = m[..., j, i] = (wi if last else wi * allc[j]).sum(-1)
    ridge = 1e-9 * np.trace(m, axis1=-2, axis2=-1)[..., None, None] + 1e-12
    return np.linalg.solve(m + np.eye(k) * ridge, rhs[..., None])[..., 0]


def _baseline_cols(dk, dc, kind):
    """Columns of the smooth baseline around distance ``dc`` (kpc).

    ``kind`` is 'line' (1, d - D) or 'bend' (1, min(d - D, 0), max(d - D, 0), (d - D)^2): a
    change of slope and a curvature, the smooth shapes a step must beat.
    """
    u_ = dk - dc
    one = np.ones_like(u_)
    if kind == "line":
        return [one, u_]
    return [one, np.minimum(u_, 0.0), np.maximum(u_, 0.0), u_ * u_]


def _fit_null(dk, y, var, n_iter=_N_ITER, mask=1.0):
    """Straight line in distance with an outlier component, by EM.

    Arrays of shape (..., n); returns the log-likelihood (...,) and the fitted mean (..., n).
    """
    cg, co, var_o = _density_factors(var)
    cols = _baseline_cols(dk, 0.0, "line")
    good = np.ones(np.broadcast_shapes(np.shape(y), np.shape(mask)))
    for _ in range(n_iter):
        beta = _solve(cols, good * mask / var, y)
        mu = sum(beta[..., k:k + 1] * c for k, c in enumerate(cols))
        r2 = (y - mu) ** 2
        lg = cg * np.exp(-0.5 * r2 / var)
        like = np.maximum(lg + co * np.exp(-0.5 * r2 / var_o), 1e-300)
        good = lg / like
    return (mask * np.log(like)).sum(-1), mu


def _fit_step(dk, x, f, y, var, lc, mu0, n_iter=_N_ITER, mask=1.0, free_delta=True, kind="line"):
    """The smeared-step mixture fitted by EM at each candidate distance.

    Front component: the smooth baseline (:func:`_baseline_cols`, ``kind``); behind
    component: the same plus ``delta >= 0``; outlier component: broad, centred between.
    ``dk`` (distance, kpc), ``x`` (ln distance), ``f`` (fractional distance error), ``y``
    (A_V), ``var`` (noise variance) and ``mu0`` (the step-free fit, used to start) have
    shape (..., 1, n); ``lc`` (ln candidate distance) has shape (..., C, 1); ``mask``
    (..., C, n) selects the tracers that count. Returns the log-likelihood and ``delta``
    at each candidate, shape (..., C). With ``free_delta=False`` the step is held at 0.
    """
    # chance that each tracer lies behind the candidate: its true ln distance is normal around
    # the observed one, shifted by gamma f^2 for a local tracer density ~ d^gamma per ln d
    nb = ((x > lc) & (x <= lc + _GAMMA_SPAN)).sum(-1)[..., None]
    nf = ((x <= lc) & (x > lc - _GAMMA_SPAN)).sum(-1)[..., None]
    gamma = np.clip(np.log((nb + 1.0) / (nf + 1.0)) / _GAMMA_SPAN, *_GAMMA_RANGE)
    p = ndtr((x + gamma * f * f - lc) / f)
    q = 1.0 - p
    cg, co, var_o = _density_factors(var)
    half_iv = -0.5 / var
    half_ivo = -0.5 / var_o
    cols = _baseline_cols(dk, np.exp(lc) / 1000.0, kind)
    # robust start: the step-free fit, shifted by the median residuals in front and behind
    r0 = y - mu0
    behind = x > lc
    inside = np.broadcast_to(mask, behind.shape) > 0
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN slices: no tracer on one side
        med_b = np.nan_to_num(np.nanmedian(np.where(behind & inside, r0, np.nan), axis=-1)[..., None])
        med_f = np.nan_to_num(np.nanmedian(np.where(~behind & inside, r0, np.nan), axis=-1)[..., None])
    mean = mu0 + med_f
    delta = np.maximum(med_b - med_f, 0.0) if free_delta else np.zeros_like(med_f)
    nk = len(cols)
    for it in range(n_iter + 1):
        r = y - mean
        lf = cg * q * np.exp(half_iv * r * r)
        rb = r - delta
        lb = cg * p * np.exp(half_iv * rb * rb)
        ro = r - p * delta
        lfb = lf + lb
        like = np.maximum(lfb + co * np.exp(half_ivo * ro * ro), 1e-300)
        if it == n_iter:
            break
        w = lfb / like / var * mask                                  # not an outlier, over variance
        base = _solve(cols, w, y)                                    # delta held at 0
        if free_delta:
            rr = np.where(lfb > 0, lb / np.where(lfb > 0, lfb, 1.0), p)  # behind, given not an outlier
            sol = _solve(cols, w, y, rr)
            neg = sol[..., nk:] < 0                                  # delta would go negative
            base = np.where(neg, base, sol[..., :nk])
            delta = np.where(neg, 0.0, sol[..., nk:])
        mean = sum(base[..., k:k + 1] * c for k, c in enumerate(cols))
    return (mask * np.log(like)).sum(-1), delta[..., 0]


def _intrinsic_scatter(x, y, base_var):
    """Scatter (mag) beyond the tracers' own noise, from successive differences in distance order.

    A step adds one large difference only, so the median absolute difference ignores it.
    """
    if y.size < 3:
        return _SCATTER_FLOOR
    order = np.argsort(x, kind="stable")
    diff = np.diff(y[order])
    sig_diff = 1.4826 * np.median(np.abs(diff))
    tau2 = sig_diff**2 / 2.0 - np.median(base_var)
    return float(np.sqrt(max(tau2, _SCATTER_FLOOR**2)))


class Line:
    """The tracers of one sight line as plain arrays (distance pc, A_V mag).

    Each tracer's noise variance is its A_V error squared, plus its distance error times
    the local slope of the smooth extinction squared (``slope``, mag/pc; estimated from a
    robust straight-line fit when not given), plus an intrinsic scatter common to the
    sight line.
    """

    def __init__(self, distance, distance_err, av, av_err, slope=None):
        self.d = distance
        self.dk = distance / 1000.0
        self.x = np.log(distance)
        self.f = np.maximum(distance_err / distance, _MIN_FRAC_ERR)
        self.y = av
        self.n = distance.size
        if slope is None:
            if self.n >= 3:
                _, mu = _fit_null(self.dk, av, av_err**2 + _SCATTER_FLOOR**2)
                order = np.argsort(self.dk)
                grad = np.gradient(mu[order], self.dk[order]) if np.ptp(self.dk) > 0 else np.zeros(self.n)
                slope = np.empty(self.n)
                slope[order] = np.maximum(np.nan_to_num(grad), 0.0) / 1000.0
            else:
                slope = 0.0
        slope = np.broadcast_to(np.asarray(slope, float), (self.n,))
        if self.n >= 3:
            # the smooth part of A_V at each tracer's expected true distance rather than at its
            # observed one: with a local tracer density ~ d^gamma per ln d, E[ln d_true] =
            # ln d_obs + gamma f^2 (first order); this removes the tilt that distance errors
            # give the profile where the tracer counts rise or fall (e.g. at a catalogue's edge)
            xs = np.sort(self.x)
            nb = np.searchsorted(xs, self.x + _GAMMA_SPAN, "right") - np.searchsorted(xs, self.x, "right")
            nf = np.searchsorted(xs, self.x, "right") - np.searchsorted(xs, self.x - _GAMMA_SPAN, "right") - 1
            gamma = np.clip(np.log((nb + 1.0) / (nf + 1.0)) / _GAMMA_SPAN, -_EDGE_GAMMA, _EDGE_GAMMA)
            self.y = av - slope * distance * np.expm1(gamma * self.f**2)
        base = av_err**2 + (slope * distance_err) ** 2
        self.scatter = _intrinsic_scatter(self.x, self.y, base)
        self.var = base + self.scatter**2

    def take(self, idx):
        return (self.dk[idx], self.x[idx], self.f[idx], self.y[idx], self.var[idx])


def _scan(arrays, lc, min_tracers, n_iter=_N_ITER):
    """Best step among candidates ``lc`` (ln pc) for one or many (bootstrap) tracer sets.

    ``arrays`` are (dk, x, f, y, var) of shape (B, n). The step distance maximises the
    likelihood of a straight line plus a smeared step over the candidates. At that distance:

    * ``sig``: BIC improvement of that model over the straight line alone (two extra
      parameters: the distance and the step);
    * ``jump``: on the tracers within a factor ``_WINDOW_FACTOR`` of the step, the BIC
      improvement of adding the step to a smooth baseline that may change slope there and
      curve; a bend or a curving foreground is better explained without a step and gets
      ``jump < 0``;
    * ``delta``: the step of that local fit, so that curvature or catalogue-edge effects
      far from the step do not bias it.

    Returns per set: ln D, delta, sig, jump, n_front, n_behind; ``sig = -inf`` where no
    candidate has enough tracers on both sides.
    """
    dk, x, f, y, var = (a[:, None, :] for a in arrays)
    n = x.shape[-1]
    lc = np.asarray(lc, float)[None, :, None]
    ll0, mu0 = _fit_null(dk, y, var, n_iter)
    ll1, _ = _fit_step(dk, x, f, y, var, lc, mu0, n_iter)
    n_behind = (x > lc).sum(-1)
    n_front = n - n_behind
    ok = (n_behind >= min_tracers) & (n_front >= min_tracers)
    best = np.argmax(np.where(ok, ll1, -np.inf), axis=-1)
    rows = np.arange(ll1.shape[0])
    lb = lc[0, best, 0][:, None, None]
    sig = np.where(ok[rows, best], 2.0 * (ll1[rows, best] - ll0[:, 0]) - 2.0 * np.log(n), -np.inf)
    window = (np.abs(x - lb) <= np.log(_WINDOW_FACTOR)).astype(float)
    ll_bend, _ = _fit_step(dk, x, f, y, var, lb, mu0, n_iter, window, free_delta=False, kind="bend")
    ll_both, delta = _fit_step(dk, x, f, y, var, lb, mu0, n_iter, window, kind="bend")
    jump = 2.0 * (ll_both[:, 0] - ll_bend[:, 0]) - np.log(window.sum(-1)[:, 0])
    return lb[:, 0, 0], delta[:, 0], sig, jump, n_front[rows, best], n_behind[rows, best]


def _candidates(x, min_tracers):
    """Mid-points (ln pc) between distance-ordered tracers leaving enough on both sides."""
    xs = np.sort(x)
    mids = 0.5 * (xs[:-1] + xs[1:])
    lo, hi = min_tracers - 1, xs.size - min_tracers  # mids[k] has k + 1 tracers in front
    mids = np.unique(mids[lo:hi])
    if mids.size > _MAX_CANDIDATES:
        mids = mids[np.unique(np.linspace(0, mids.size - 1, _MAX_CANDIDATES).round().astype(int))]
    return mids


def _best_step(line, idx, min_tracers):
    """Coarse scan over tracer mid-points, then a local refinement. Returns a dict or None."""
    arrays = tuple(a[None, :] for a in line.take(idx))
    cand = _candidates(arrays[1][0], min_tracers)
    if cand.size == 0:
        return None
    res = _scan(arrays, cand, min_tracers)
    j = int(np.searchsorted(cand, res[0][0]))
    lo = cand[max(j - 1, 0)]
    hi = cand[min(j + 1, cand.size - 1)]
    if hi > lo:
        res2 = _scan(arrays, np.linspace(lo, hi, _N_REFINE), min_tracers)
        if res2[2][0] > res[2][0]:   # same data and null: a larger sig is a larger likelihood
            res = res2
    lc, delta, sig, jump, nf, nb = (r[0] for r in res)
    if not np.isfinite(sig):
        return None
    return {"x": float(lc), "delta": float(delta), "sig": float(sig), "jump": float(jump), "n_front": int(nf),
            "n_behind": int(nb)}


def _bootstrap(line, idx, step, min_tracers, min_significance, min_delta_av, n_boot, rng):
    """Distance and delta errors and the fraction of resamples that find the step again."""
    arrays = line.take(idx)
    n = idx.size
    half = max(2.0 * float(np.median(line.f[idx])), 0.05)
    window = np.linspace(step["x"] - half, step["x"] + half, _N_WINDOW)
    pick = rng.integers(0, n, size=(n_boot, n))
    boot = tuple(a[pick] for a in arrays)
    # chunks keep the (samples x candidates x tracers) arrays to a few million numbers
    chunk = max(1, int(4e6 // (window.size * n)))
    out = [_scan(tuple(b[i:i + chunk] for b in boot), window, min_tracers, _N_ITER_BOOT)
           for i in range(0, n_boot, chunk)]
    lc, delta, sig, jump = (np.concatenate([o[k] for o in out]) for k in range(4))
    found = np.isfinite(sig)
    d_boot = np.exp(lc[found])
    if d_boot.size < 2:
        return np.nan, np.nan, 0.0
    p16, p84 = np.percentile(d_boot, [16, 84])
    step_res = np.exp(step["x"]) * (window[1] - window[0]) / np.sqrt(12.0)  # grid resolution
    d_err = float(np.hypot(0.5 * (p84 - p16), step_res))
    q16, q84 = np.percentile(delta[found], [16, 84])
    frac = float(np.mean((sig >= min_significance) & (jump > 0) & (delta >= min_delta_av)))
    return d_err, float(0.5 * (q84 - q16)), frac


def find_steps_arrays(line, *, min_tracers, min_significance, min_delta_av, min_boot_fraction, max_steps,
                       n_boot, rng):
    """Recursive splitting of one sight line; returns a list of step dicts sorted by distance."""
    found = []
    todo = [np.arange(line.n)]
    searched = 0
    while todo and len(found) < max_steps and searched < 4 * max_steps + 4:
        idx = todo.pop(0)
        if idx.size < 2 * min_tracers:
            continue
        searched += 1
        step = _best_step(line, idx, min_tracers)
        if step is None or step["sig"] < min_significance:
            continue  # nothing significant left in this stretch
        if step["jump"] > 0 and step["delta"] >= min_delta_av:
            d_err, delta_err, frac = _bootstrap(line, idx, step, min_tracers, min_significance, min_delta_av,
                                                n_boot, rng)
            if frac >= min_boot_fraction:
                step.update(distance=float(np.exp(step["x"])), distance_err=d_err, delta_err=delta_err, boot=frac)
                found.append(step)
        # significant structure (a step, or a bend that is not one): search again the tracers
        # clearly in front of it and clearly behind it
        sep = (line.x[idx] - step["x"]) / line.f[idx]
        todo.extend([idx[sep < -1.0], idx[sep > 1.0]])
    return sorted(found, key=lambda s: s["distance"])


def check_common(min_tracers, min_significance, min_delta_av, min_boot_fraction, max_steps, n_boot):
    min_tracers = check_int("min_tracers", min_tracers, 2, 100_000)
    # a BIC improvement below 0 would list steps the data favour less than no step
    min_significance = check_real("min_significance", min_significance, 0.0, np.inf)
    mda = to_scalar("min_delta_av", min_delta_av, u.mag, default_unit=u.mag)
    check_real("min_delta_av", mda, 0.0, np.inf)
    min_boot_fraction = check_real("min_boot_fraction", min_boot_fraction, 0.0, 1.0)
    max_steps = check_int("max_steps", max_steps, 1, 100)
    n_boot = check_int("n_boot", n_boot, 10, 100_000)
    return dict(min_tracers=min_tracers, min_significance=min_significance, min_delta_av=mda,
                min_boot_fraction=min_boot_fraction, max_steps=max_steps, n_boot=n_boot)


def _quantity_array(name, value, unit):
    """Float array in ``unit``; a bare number is taken in ``unit`` with an AssumptionWarning."""
    if not isinstance(value, u.Quantity):
        warnings.warn(f"'{name}' has no unit; assuming {unit}. Pass a Quantity to silence this.",
                      AssumptionWarning, stacklevel=3)
    return np.atleast_1d(to_value(name, value, unit, default_unit=unit)).astype(float)


def steps_table(steps, meta):
    t = QTable()
    t["distance"] = np.array([s["distance"] for s in steps], float) * u.pc
    t["distance_err"] = np.array([s["distance_err"] for s in steps], float) * u.pc
    t["delta_av"] = np.array([s["delta"] for s in steps], float) * u.mag
    t["delta_av_err"] = np.array([s["delta_err"] for s in steps], float) * u.mag
    t["significance"] = np.array([s["sig"] for s in steps], float)
    t["boot_fraction"] = np.array([s["boot"] for s in steps], float)
    t["n_front"] = np.array([s["n_front"] for s in steps], int)
    t["n_behind"] = np.array([s["n_behind"] for s in steps], int)
    t.meta.update(meta)
    return t


def find_steps(distance, distance_err, av, av_err, *, min_tracers=3, min_significance=10.0,
               min_delta_av=0.2 * u.mag, min_boot_fraction=0.5, max_steps=5, n_boot=100, random_state=0,
               av_slope=None):
    """Find steps (dust clouds) in A_V against distance along one sight line.

    Parameters
    ----------
    distance, distance_err : Quantity['length']
        The tracers' distances and 1-sigma errors (bare numbers are taken as pc, with an
        `AssumptionWarning`).
    av, av_err : Quantity['mag']
        The tracers' A_V (or A_V minus a smooth foreground model) and 1-sigma errors.
    min_tracers : int
        Fewest tracers required on each side of a step (default 3).
    min_significance : float
        Least improvement of the Bayesian information criterion over the step-free model
        (default 10, "very strong" evidence on the Kass & Raftery 1995 scale).
    min_delta_av : Quantity['mag']
        Smallest step kept (default 0.2 mag).
    min_boot_fraction : float
        Least fraction of bootstrap resamples of the tracers in which the step is found
        again with the same rule (default 0.5).
    max_steps : int
        Most steps reported for the sight line.
    n_boot : int
        Bootstrap resamples for the uncertainties (default 100).
    random_state : int
        Seed of the resampling; the same seed gives the same table.
    av_slope : Quantity['mag / length'], optional
        Slope of the smooth extinction at each tracer (scalar or per tracer), which turns
        distance errors into A_V noise. Give it when ``av`` has a smooth foreground
        already subtracted; by default it is taken from a straight-line fit to ``av``.

    Returns
    -------
    QTable
        One row per step, nearest first: ``distance``, ``distance_err`` (pc), ``delta_av``,
        ``delta_av_err`` (mag; the extinction the step adds), ``significance`` (BIC
        improvement), ``boot_fraction``, ``n_front``, ``n_behind`` (tracers on each side, by
        observed distance). ``meta`` holds ``n_tracers``, ``n_rejected``, ``scatter`` (the
        intrinsic A_V scatter assumed, mag), the settings, ``method`` and ``caution``.

    Raises
    ------
    ParameterError
        If the arrays differ in length or a setting is out of range.

    Notes
    -----
    See the module docstring: a step smeared by each tracer's distance error, with an
    outlier component, fitted on a grid of candidate distances (after Schlafly et al. 2014,
    ApJ 786, 29); errors from bootstrap resampling of the tracers; several steps by
    recursive splitting. Rows with non-finite values, non-positive distances or negative
    errors are dropped and counted (``RowsRejectedWarning``).
    """
    opts = check_common(min_tracers, min_significance, min_delta_av, min_boot_fraction, max_steps, n_boot)
    d = _quantity_array("distance", distance, u.pc)
    de = _quantity_array("distance_err", distance_err, u.pc)
    a = _quantity_array("av", av, u.mag)
    ae = _quantity_array("av_err", av_err, u.mag)
    try:
        d, de, a, ae = np.broadcast_arrays(d, de, a, ae)
    except ValueError:
        raise param_error("distance, distance_err, av, av_err", "arrays of the same length",
                          f"lengths {d.size}, {de.size}, {a.size}, {ae.size}") from None
    slope = None
    if av_slope is not None:
        slope = np.broadcast_to(to_value("av_slope", av_slope, u.mag / u.pc), d.shape).astype(float)
        if not np.all(np.isfinite(slope)) or np.any(slope < 0):
            raise param_error("av_slope", "finite and non-negative (mag per unit distance)", av_slope)
    return find_steps_plain(d, de, a, ae, opts, check_seed(random_state), meta_extra={}, slope=slope)


def reject_rows(d, de, a, ae):
    """Mask of usable rows and a text summary of the rejected ones."""
    reasons = [
        (~(np.isfinite(d) & np.isfinite(de) & np.isfinite(a) & np.isfinite(ae)), "a non-finite value"),
        (~(d > 0), "distance <= 0"),
        (~(de >= 0), "distance_err < 0"),
        (~(ae >= 0), "av_err < 0"),
    ]
    bad = np.zeros(d.shape, bool)
    parts = []
    for mask, why in reasons:
        new = mask & ~bad
        if new.any():
            rows = np.nonzero(new)[0]
            parts.append(f"{new.sum()} with {why} (rows {', '.join(map(str, rows[:5]))}{', ...' if rows.size > 5 else ''})")
        bad |= mask
    if bad.any():
        warnings.warn(f"{bad.sum()} of {bad.size} tracers were not used: " + "; ".join(parts)
                      + ". Hint: fix or remove those rows.", RowsRejectedWarning, stacklevel=4)
    return ~bad


def find_steps_plain(d, de, a, ae, opts, random_state, meta_extra, slope=None):
    keep = reject_rows(d, de, a, ae)
    d, de, a, ae = d[keep], de[keep], a[keep], ae[keep]
    if slope is not None:
        slope = np.broadcast_to(slope, keep.shape)[keep]
    line = Line(d, de, a, ae, slope=slope)
    scatter = line.scatter
    rng = np.random.default_rng(random_state)
    steps = find_steps_arrays(line, min_tracers=opts["min_tracers"], min_significance=opts["min_significance"],
                               min_delta_av=opts["min_delta_av"], min_boot_fraction=opts["min_boot_fraction"],
                               max_steps=opts["max_steps"], n_boot=opts["n_boot"], rng=rng)
    meta = {"n_tracers": int(d.size), "n_rejected": int((~keep).sum()), "scatter": scatter, **meta_extra,
            **opts, "method": STEP_METHOD, "caution": CAUTION}
    return steps_table(steps, meta)
