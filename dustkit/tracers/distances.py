"""Distances in pc from a distance, a true or apparent distance modulus, or a parallax."""

import numpy as np
from astropy import units as u

from ..exceptions import AssumptionWarning, CatalogError
from .._lib.units import as_unit
from .._lib.validation import param_error
from .columns import DISTANCE_LIKE, norm
from .rules import KPC_HINT_MEDIAN, PARALLAX_WARN_FRAC, reason
from .values import error_values, numeric, to_unit

__all__ = [
    "modulus_to_distance",
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
    n = norm(colname)
    if n.endswith("kpc"):
        return u.kpc
    if n.endswith("pc"):
        return u.pc
    return None


def distances(table, cols, ctx, distance_unit, frac, zp, limits, av, av_err):
    """Distance and error in pc (NaN where rejected), and the apparent modulus and its error if used."""
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
        d, d_err, err = _from_modulus(*args, kind, mu_default, av, av_err)
    else:
        d, d_err = _from_parallax(*args, zp)
    ok_now = ctx.rej.code < 0
    d = np.where(ok_now, d, np.nan)
    outside = ok_now & ~((d > lo) & (d <= hi))
    word = "in" if kind == "distance" else "from"
    ctx.rej.add(outside, reason("distance_outside", colname, word=word, lo=lo, hi=hi), colname, raw)
    d = np.where(ctx.rej.code < 0, d, np.nan)
    d_err = np.where(np.isfinite(d), d_err, np.nan)
    if kind == "apparent_modulus":
        return d, d_err, vals, err
    return d, d_err, None, None


def _from_distance(table, cols, ctx, colname, vals, unit, raw, frac, dunit_arg, frac_desc):
    """Distance and error in pc from a distance column (unit: argument, column, name, or pc assumed)."""
    if dunit_arg is not None:
        unit_used, how = dunit_arg, "the distance_unit argument"
    elif unit is not None:
        try:
            unit_used, how = as_unit(unit), "the column's unit"
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
        msg = (
            f"Column {colname!r} has no unit; assuming the distances are in pc. "
            "Pass distance_unit='kpc' (or give the column a unit) if not."
        )
        if np.isfinite(med) and med < KPC_HINT_MEDIAN:
            msg += (
                f" The median value is {med:.3g}, which looks like kpc (a median distance below "
                f"{KPC_HINT_MEDIAN:g} pc is unusual): pass distance_unit='kpc' if so."
            )
        ctx.note(AssumptionWarning, msg)
    if how is not None:
        ctx.assumptions.append(f"distance column {colname!r} in {unit_used} (from {how})")
    scale = unit_used.to(u.pc)
    d = vals * scale
    ctx.rej.add(d <= 0, reason("distance_not_positive", colname), colname, raw)
    err, eunit, ecol = error_values(
        table, cols, "distance_err", ctx, np.nan, f"the distance {colname!r}", frac_desc
    )
    if ecol is not None:
        escale = scale
        if eunit is not None and dunit_arg is None:
            try:
                escale = as_unit(eunit).to(u.pc)
            except (ValueError, TypeError, u.UnitsError):
                escale = scale
        err = err * escale
    d_err = np.where(np.isnan(err), frac * d, err)
    return d, d_err


def _from_modulus(table, cols, ctx, colname, vals, unit, raw, frac, kind, mu_default, av, av_err):
    """Distance and error in pc from a true or an apparent V modulus, and the modulus error."""
    label = "true distance modulus" if kind == "distance_modulus" else "apparent V modulus"
    err, _, _ = error_values(
        table, cols, f"{kind}_err", ctx, mu_default, f"the {label} {colname!r}",
        f"{mu_default:.3f} mag (= {100 * frac:g}% in distance, default_distance_frac_err)",
    )
    if kind == "apparent_modulus":
        mu = vals - av
        mu_err = np.hypot(err, av_err)
        ctx.assumptions.append(
            "true modulus = apparent V modulus - A_V; their errors added in quadrature (as independent)"
        )
    else:
        mu, mu_err = vals, err
    d, d_err = modulus_to_distance(mu, mu_err)
    return d, d_err, err


def _from_parallax(table, cols, ctx, colname, vals, unit, raw, frac, zp):
    """Distance and error in pc from a parallax (zero point subtracted); noisy parallaxes announced."""
    if unit is not None:
        plx = to_unit(vals, unit, u.mas, colname, ctx, "an angle (parallax)")
        pscale = as_unit(unit).to(u.mas)
    else:
        plx, pscale = vals, 1.0
        ctx.note(AssumptionWarning, f"Parallax column {colname!r} has no unit; assuming mas.")
    corr = plx - zp
    zp_text = f" - zero point ({zp:g} mas)" if zp != 0 else ""
    ctx.rej.add(corr <= 0, reason("parallax_not_positive", colname, zero_point=zp_text), colname, raw)
    err, eunit, ecol = error_values(
        table, cols, "parallax_err", ctx, np.nan, f"the parallax {colname!r}",
        f"{100 * frac:g}% of the parallax (default_distance_frac_err)",
    )
    if ecol is not None and eunit is not None:
        try:
            pscale = as_unit(eunit).to(u.mas)
        except (ValueError, TypeError, u.UnitsError):
            pass
    err = np.where(np.isnan(err), frac * corr, err * pscale)
    with np.errstate(divide="ignore", invalid="ignore"):
        d = 1000.0 / corr
        d_err = 1000.0 * err / corr**2
        fe = err / corr
    ok_now = ctx.rej.code < 0
    noisy = ok_now & (fe > PARALLAX_WARN_FRAC)
    if noisy.any():
        ctx.note(
            AssumptionWarning,
            f"{int(noisy.sum())} of {int(ok_now.sum())} usable parallaxes in {colname!r} have a fractional "
            f"error above {100 * PARALLAX_WARN_FRAC:g}%: there 1/parallax is a biased and noisy distance "
            "estimator (Bailer-Jones 2015, PASP 127, 994). They are kept; consider prior-based distances, "
            "or drop them with TracerSet.subset().",
        )
    if zp != 0:
        ctx.assumptions.append(f"parallax zero point {zp:g} mas subtracted before d = 1000 / parallax")
    return d, d_err
