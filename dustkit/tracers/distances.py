"""Distances in pc from a distance, a true or apparent distance modulus, or a parallax."""

import re

import numpy as np
from astropy import units as u

from ..exceptions import AssumptionWarning, CatalogError
from .._lib.units import as_unit
from .._lib.validation import param_error
from .columns import DISTANCE_LIKE, norm
from .rules import (
    ARCSEC_HINT_PARALLAX,
    KPC_HINT_MEDIAN,
    PARALLAX_ERR_FLOOR,
    PARALLAX_LENGTH_SCALE,
    PARALLAX_NEGATIVE_NSIGMA,
    PARALLAX_WARN_FRAC,
    reason,
)
from .reddening import mag_scale
from .values import error_values, numeric, to_unit

__all__ = [
    "modulus_to_distance",
    "parallax_posterior",
    "distances",
]


def modulus_to_distance(mu, mu_err):
    """d = 10^(mu/5 + 1) pc; sigma_d = d ln(10)/5 sigma_mu."""
    with np.errstate(over="ignore", invalid="ignore"):
        d = 10.0 ** (mu / 5.0 + 1.0)
        return d, d * np.log(10.0) / 5.0 * mu_err


def _distance_unit_arg(distance_unit):
    if distance_unit is None:
        return None
    try:
        unit = u.Unit(distance_unit)
        unit.to(u.pc)
    except (ValueError, TypeError, u.UnitsError):
        raise param_error("distance_unit", "a length unit such as 'pc' or 'kpc'", distance_unit) from None
    return unit


def _name_unit(colname):
    """The length unit a distance column's name ends with: 'dist_kpc', 'Dist[pc]', 'D (Mpc)', 'dist_ly'."""
    n = norm(colname)
    for end, unit in (("kpc", u.kpc), ("mpc", u.Mpc), ("pc", u.pc), ("lyr", u.lyr)):
        if n.endswith(end):
            return unit
    if re.search(r"[^a-z0-9]ly\W*$", str(colname).lower()):
        return u.lyr
    return None


def distances(table, cols, ctx, distance_unit, frac, zp, limits, av, av_err,
              parallax_err_floor=PARALLAX_ERR_FLOOR, parallax_length_scale=PARALLAX_LENGTH_SCALE,
              parallax_prior=True):
    """Distance and error in pc (NaN where rejected), the apparent modulus and its error if used, and
    the lower and upper distance errors (pc) where they differ (parallaxes), else None."""
    dunit_arg = _distance_unit_arg(distance_unit)
    lo, hi = limits["distance"]
    kind = next(k for k in DISTANCE_LIKE if k in cols)
    colname = cols[kind]
    vals, unit, raw = numeric(table, colname, ctx)
    mu_default = 5.0 / np.log(10.0) * frac
    frac_desc = f"{100 * frac:g}% of the distance (default_distance_frac_err)"
    args = (table, cols, ctx, colname, vals, unit, raw, frac)
    if kind == "distance":
        d, d_err = _from_distance(*args, dunit_arg, frac_desc)
    elif kind in ("distance_modulus", "apparent_modulus"):
        d, d_err, err, vals = _from_modulus(*args, kind, mu_default, av, av_err)
    else:
        d, d_err, low, high = _from_parallax(*args, zp, parallax_err_floor, parallax_length_scale, parallax_prior)
    ok_now = ctx.rej.code < 0
    d = np.where(ok_now, d, np.nan)
    outside = ok_now & ~((d > lo) & (d <= hi))
    word = "in" if kind == "distance" else "from"
    ctx.rej.add(outside, reason("distance_outside", colname, word=word, lo=lo, hi=hi), colname, raw)
    d = np.where(ctx.rej.code < 0, d, np.nan)
    d_err = np.where(np.isfinite(d), d_err, np.nan)
    if kind == "parallax" and parallax_prior:
        bounds = (np.where(np.isfinite(d), low, np.nan), np.where(np.isfinite(d), high, np.nan))
    else:
        bounds = None
    if kind == "apparent_modulus":
        return d, d_err, vals, err, bounds
    return d, d_err, None, None, bounds


def _from_distance(table, cols, ctx, colname, vals, unit, raw, frac, dunit_arg, frac_desc):
    """Distance and error in pc from a distance column (unit: argument, column, name, or pc assumed)."""
    overridden = _overrides(dunit_arg, unit, colname, ctx)
    if dunit_arg is not None:
        unit_used, how = dunit_arg, "the distance_unit argument"
    elif unit is not None:
        try:
            unit_used, how = as_unit(unit, like=u.pc), "the column's unit"
            unit_used.to(u.pc)
        except (ValueError, TypeError, u.UnitsError):
            hint = (
                f" It looks like a magnitude: if it is a distance modulus, use columns={{'distance_modulus': {colname!r}}}."
                if str(unit).strip().lower().startswith("mag")
                else ""
            )
            raise CatalogError(
                f"Column {colname!r} in {ctx.desc} has unit {str(unit)!r}, which is not a length.{hint} "
                "Hint: or pass distance_unit='pc'/'kpc' to override it."
            ) from None
    elif _name_unit(colname) is not None:
        unit_used, how = _name_unit(colname), "the column name"
    else:
        unit_used, how = u.pc, None
        good = vals[np.isfinite(vals) & (vals > 0)]
        med = float(np.median(good)) if good.size else np.nan
        if np.isfinite(med) and med < KPC_HINT_MEDIAN:
            targets = getattr(ctx, "rows_are", "tracers") == "targets"
            where = ("the targets at a few pc (a median below {:g} pc is not a target list of distances in pc)"
                     if targets else "the tracers at a few pc, nearer than any star cluster (a median below {:g} pc "
                     "is not a catalogue of distances in pc)").format(KPC_HINT_MEDIAN)
            raise CatalogError(
                f"Column {colname!r} in {ctx.desc} has no unit and a median value of {med:.3g}: read as pc that "
                f"would put {where}. Hint: if the distances are in kpc, "
                "pass distance_unit='kpc' (command line: --distance-unit kpc), or give the column a unit."
            )
        ctx.note(
            AssumptionWarning,
            f"Column {colname!r} has no unit; assuming the distances are in pc (median {med:.4g} pc). "
            "Pass distance_unit='kpc' (or give the column a unit) if not.",
        )
    if how is not None:
        ctx.assumptions.append(f"distance column {colname!r} in {unit_used} (from {how})")
    scale = unit_used.to(u.pc)
    d = vals * scale
    ctx.rej.add(d <= 0, reason("distance_not_positive", colname), colname, raw)
    err, eunit, ecol = error_values(
        table, cols, "distance_err", ctx, np.nan, f"the distance {colname!r}", frac_desc, values=vals
    )
    if ecol is not None:
        escale = scale
        # the error column's own length unit, unless distance_unit corrects the distance column's own unit
        # (then the file's units are taken as wrong, the error's too)
        if eunit is not None and not overridden:
            try:
                escale = as_unit(eunit, like=u.pc).to(u.pc)
            except (ValueError, TypeError, u.UnitsError):
                escale = scale
        err = err * escale
    d_err = np.where(np.isnan(err), frac * d, err)
    return d, d_err


def _overrides(dunit_arg, unit, colname, ctx):
    """True when the distance_unit argument replaces a different unit of the distance column (announced, with
    both units)."""
    if dunit_arg is None or unit is None:
        return False
    try:
        own = as_unit(unit, like=u.pc)
        same = abs(own.to(dunit_arg) - 1.0) < 1e-12
    except (ValueError, TypeError, u.UnitsError):
        return True  # not a length: the argument is the only unit there is
    if same:
        return False
    ctx.note(AssumptionWarning, f"distance_unit={str(dunit_arg)!r} replaces the unit {str(own)!r} of column "
             f"{colname!r} (and of its error column): the values are read as {dunit_arg}, not {own}.")
    return True


def _from_modulus(table, cols, ctx, colname, vals, unit, raw, frac, kind, mu_default, av, av_err):
    """Distance and error in pc from a true or an apparent V modulus, the modulus error and the modulus (mag)."""
    label = "true distance modulus" if kind == "distance_modulus" else "apparent V modulus"
    vscale = mag_scale(unit, colname, ctx, "a distance modulus")  # a modulus in another unit stops the read
    err, eunit, ecol = error_values(
        table, cols, f"{kind}_err", ctx, np.nan, f"the {label} {colname!r}",
        f"{mu_default:.3f} mag (= {100 * frac:g}% in distance, default_distance_frac_err)", values=vals,
    )
    if ecol is not None:  # in the error column's own unit (e.g. mmag), else the modulus's
        err = err * (vscale if eunit is None else mag_scale(eunit, ecol, ctx, "a distance modulus error"))
    err = np.where(np.isnan(err), mu_default, err)
    vals = vals * vscale  # in mag (a modulus column in mmag)
    if kind == "apparent_modulus":
        mu = vals - av
        mu_err = np.hypot(err, av_err)
        ctx.assumptions.append(
            "true modulus = apparent V modulus - A_V; their errors added in quadrature (as independent)"
        )
    else:
        mu, mu_err = vals, err
    d, d_err = modulus_to_distance(mu, mu_err)
    return d, d_err, err, vals


def parallax_posterior(parallax, parallax_err, length_scale=PARALLAX_LENGTH_SCALE, block=20000):
    """Distance from a parallax under the exponentially decreasing space density prior.

    Parameters
    ----------
    parallax, parallax_err : array_like
        Parallax and its 1-sigma error, mas (any sign; the error must be > 0).
    length_scale : float
        Length scale L of the prior, kpc.
    block : int
        Rows handled at a time (memory of the percentile grid).

    Returns
    -------
    mode, p16, p84 : ndarray
        The mode of the posterior and its 16th and 84th percentiles, pc.

    Notes
    -----
    Prior P(r) proportional to r^2 exp(-r / L) (r > 0), Gaussian likelihood of the parallax
    (Bailer-Jones 2015, PASP 127, 994, section 5.3). The mode is the real, positive root of
    r^3 / L - 2 r^2 + (parallax / sigma^2) r - 1 / sigma^2 = 0 (r in kpc, parallax in mas)
    with the highest posterior (the cubic has one or three real roots); the percentiles come
    from the posterior integrated on a grid in ln r around the mode (141 points spanning
    +-7 Laplace widths) where sigma / parallax >= 0.1, else from the Laplace width in ln r.
    """
    plx = np.atleast_1d(np.asarray(parallax, dtype=float))
    sig = np.atleast_1d(np.asarray(parallax_err, dtype=float))
    L = float(length_scale)
    mode = np.full(plx.shape, np.nan)
    p16 = mode.copy()
    p84 = mode.copy()
    for s0 in range(0, plx.size, block):
        sl = slice(s0, s0 + block)
        m, lo, hi = _posterior_block(plx[sl], sig[sl], L)
        mode[sl], p16[sl], p84[sl] = m, lo, hi
    return 1000.0 * mode, 1000.0 * p16, 1000.0 * p84


def _log_post(r, plx, sig, L):
    with np.errstate(divide="ignore", invalid="ignore"):
        return 2.0 * np.log(r) - r / L - (plx - 1.0 / r) ** 2 / (2.0 * sig**2)


def _cubic_roots(a, b, c):
    """Real roots of r^3 + a r^2 + b r + c (vectorised; NaN where a root is complex), 3 columns."""
    p = b - a * a / 3.0
    q = 2.0 * a**3 / 27.0 - a * b / 3.0 + c
    disc = q * q / 4.0 + p**3 / 27.0
    out = np.full(a.shape + (3,), np.nan)
    one = disc > 0
    sq = np.sqrt(np.where(one, disc, 0.0))
    out[:, 0] = np.where(one, np.cbrt(-q / 2.0 + sq) + np.cbrt(-q / 2.0 - sq), np.nan)
    three = ~one
    with np.errstate(invalid="ignore", divide="ignore"):
        m = 2.0 * np.sqrt(np.where(three, -p / 3.0, 0.0))
        arg = np.clip(np.where(three & (p != 0), 3.0 * q / (p * m), 0.0), -1.0, 1.0)
        theta = np.arccos(arg) / 3.0
    for k in range(3):
        tk = m * np.cos(theta - 2.0 * np.pi * k / 3.0)
        out[:, k] = np.where(three, tk, out[:, k])
    r = out - a[:, None] / 3.0
    for _ in range(3):  # Newton steps polish the roots where the closed form lost digits
        f = ((r + a[:, None]) * r + b[:, None]) * r + c[:, None]
        df = (3.0 * r + 2.0 * a[:, None]) * r + b[:, None]
        with np.errstate(invalid="ignore", divide="ignore"):
            step = np.where(df != 0, f / df, 0.0)
        r = r - np.where(np.isfinite(step), step, 0.0)
    return r


def _posterior_block(plx, sig, L):
    n = plx.size
    if n == 0:
        return np.empty(0), np.empty(0), np.empty(0)
    # the mode: real positive roots of r^3 - 2 L r^2 + (plx L / sig^2) r - L / sig^2, best posterior
    r = _cubic_roots(np.full(n, -2.0 * L), plx * L / sig**2, -L / sig**2)
    real = np.isfinite(r) & (r > 0)
    lp = np.where(real, _log_post(np.where(real, r, 1.0), plx[:, None], sig[:, None], L), -np.inf)
    best = np.argmax(lp, axis=1)
    mode = r[np.arange(n), best]
    # Laplace width in s = ln r of the density in s (posterior times r)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        curv = -mode / L - (2.0 / mode**2 - plx / mode) / sig**2
        w = np.where(curv < 0, 1.0 / np.sqrt(-curv), 1.0)
    w = np.clip(np.nan_to_num(w, nan=1.0), 1e-6, 2.0)
    lo = mode * np.exp(-w)
    hi = mode * np.exp(w)
    # a precise signal (sigma / parallax < 0.1): the posterior is close to log-normal; else integrate
    wide = ~((plx > 0) & (sig < 0.1 * plx))
    if wide.any():
        k = np.flatnonzero(wide)
        lo[k], hi[k] = _percentiles(mode[k], w[k], plx[k], sig[k], L)
    return mode, lo, hi


def _percentiles(mode, w, plx, sig, L, q=(0.16, 0.84)):
    """16th and 84th percentiles of the distance posterior, integrated on a grid in ln r."""
    n = mode.size
    w = np.maximum(w, 0.01)
    grid = np.linspace(-7.0, 7.0, 141)
    s = np.log(mode)[:, None] + w[:, None] * grid[None, :]
    f = _log_post(np.exp(s), plx[:, None], sig[:, None], L) + s  # density in ln r
    f -= f.max(axis=1, keepdims=True)
    dens = np.exp(f)
    cdf = np.cumsum(0.5 * (dens[:, 1:] + dens[:, :-1]), axis=1)
    cdf = np.concatenate([np.zeros((n, 1)), cdf], axis=1)
    cdf /= cdf[:, -1:]
    out = []
    idx = np.arange(n)
    for qq in q:
        k = np.clip((cdf < qq).sum(axis=1), 1, grid.size - 1)
        c0, c1 = cdf[idx, k - 1], cdf[idx, k]
        t = np.where(c1 > c0, (qq - c0) / (c1 - c0), 0.5)
        out.append(np.exp(s[idx, k - 1] + t * (s[idx, k] - s[idx, k - 1])))
    return out


def _imprecise_parallaxes(ctx, colname, err, corr):
    """Announce target parallaxes whose error exceeds ``PARALLAX_WARN_FRAC`` of the parallax: 1000 / parallax,
    the distance a target list is read with, is then a poor, biased estimate (Bailer-Jones 2015, PASP 127, 994)."""
    ok = (ctx.rej.code < 0) & (corr > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        loose = ok & (err / corr > PARALLAX_WARN_FRAC)
    n = int(loose.sum())
    if n:
        ctx.note(
            AssumptionWarning,
            f"{n} of {int(ok.sum())} parallaxes in {colname!r} have an error above {100 * PARALLAX_WARN_FRAC:g}% of "
            "the parallax; their distances, 1000 / parallax, are biased and their errors too small to trust "
            "(Bailer-Jones 2015, PASP 127, 994). Hint: give those targets distances from a prior-based estimate "
            "(e.g. dustkit.tracers.distances.parallax_posterior) in a distance column.",
        )


def _arcsec_check(plx, colname, ctx):
    """Stop on bare parallaxes whose median size is below ``ARCSEC_HINT_PARALLAX`` (mas): as mas that is
    beyond 100 kpc for half the rows, as arcsec the parallaxes of tracers at a few hundred pc."""
    good = np.abs(plx[np.isfinite(plx) & (plx != 0)])
    med = float(np.median(good)) if good.size else np.nan
    if not (np.isfinite(med) and med < ARCSEC_HINT_PARALLAX):
        return
    rows = "targets" if getattr(ctx, "rows_are", "tracers") == "targets" else "tracers"
    raise CatalogError(
        f"Parallax column {colname!r} in {ctx.desc} has no unit and a median size of {med:.3g}: read as mas that "
        f"would put half the {rows} beyond {1.0 / med:.3g} kpc, outside the Milky Way; these look like arcsec. "
        "Hint: give the column the unit arcsec (an ECSV or FITS unit, a units line under a text file's header, or "
        "an astropy Table column's unit), or multiply the parallaxes and their errors by 1000."
    )


def _from_parallax(table, cols, ctx, colname, vals, unit, raw, frac, zp, floor=PARALLAX_ERR_FLOOR,
                   length_scale=PARALLAX_LENGTH_SCALE, prior=True):
    """Distance and error in pc from a parallax (zero point subtracted) through the distance prior.

    Returns the mode, a symmetric error (half the 16th-84th percentile range) and the
    lower and upper errors (mode - 16th, 84th - mode percentile), pc.
    """
    if unit is not None:
        plx = to_unit(vals, unit, u.mas, colname, ctx, "an angle (parallax)")
        pscale = as_unit(unit, like=u.mas).to(u.mas)
    else:
        plx, pscale = vals, 1.0
        _arcsec_check(plx, colname, ctx)
        ctx.note(AssumptionWarning, f"Parallax column {colname!r} has no unit; assuming mas.")
    corr = plx - zp
    err, eunit, ecol = error_values(
        table, cols, "parallax_err", ctx, np.nan, f"the parallax {colname!r}",
        f"{100 * frac:g}% of the parallax (default_distance_frac_err)", values=vals,
    )
    if ecol is not None and eunit is not None:
        try:
            pscale = as_unit(eunit, like=u.mas).to(u.mas)
        except (ValueError, TypeError, u.UnitsError):
            pass
    zp_text = f" - zero point ({zp:g} mas)" if zp != 0 else ""
    if not prior:  # target lists: d = 1000 / parallax, the distance as given
        ctx.rej.add(corr <= 0, reason("parallax_not_positive", colname, zero_point=zp_text), colname, raw)
        err = np.where(np.isnan(err), frac * corr, err * pscale)
        with np.errstate(divide="ignore", invalid="ignore"):
            d = 1000.0 / corr
            d_err = 1000.0 * err / corr**2
        if zp != 0:
            ctx.assumptions.append(f"parallax zero point {zp:g} mas subtracted before d = 1000 / parallax")
        _imprecise_parallaxes(ctx, colname, err, corr)
        return d, d_err, d_err, d_err
    missing = np.isnan(err)
    zp_text = f" - zero point ({zp:g} mas)" if zp != 0 else ""
    ctx.rej.add(missing & (corr <= 0), reason("parallax_no_error", colname, zero_point=zp_text), colname, raw)
    err = np.where(missing, frac * np.abs(corr), err * pscale)
    err = np.hypot(err, floor)
    # no parallax lies many of its errors below zero: a 'no value' number (-99) or a broken measurement
    far = corr < -PARALLAX_NEGATIVE_NSIGMA * err
    ctx.rej.add(far, reason("parallax_far_negative", colname, zero_point=zp_text, n=PARALLAX_NEGATIVE_NSIGMA),
                colname, raw)
    ok_now = ctx.rej.code < 0
    d = np.full(corr.shape, np.nan)
    lo = d.copy()
    hi = d.copy()
    if ok_now.any():
        d[ok_now], lo[ok_now], hi[ok_now] = parallax_posterior(corr[ok_now], err[ok_now], length_scale)
    ctx.assumptions.append(
        f"distances from parallaxes: mode of the posterior under the exponentially decreasing space density "
        f"prior, length scale {length_scale:g} kpc (Bailer-Jones 2015, PASP 127, 994), with its 16th-84th "
        f"percentiles as distance_err_low/high; parallax errors include a systematic floor of {floor:g} mas "
        "added in quadrature"
    )
    if zp != 0:
        ctx.assumptions.append(f"parallax zero point {zp:g} mas subtracted")
    # a skewed posterior can have its mode below the 16th percentile: the lower error is then 0
    return d, 0.5 * (hi - lo), np.maximum(d - lo, 0.0), hi - d
