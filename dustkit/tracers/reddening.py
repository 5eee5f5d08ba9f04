"""Reddening: a colour excess or A_V column turned into A_V under a law and R_V."""

import re

import numpy as np
from astropy import units as u

from ..exceptions import CatalogError
from .._lib.validation import param_error
from .rules import reason
from .values import error_values, numeric

__all__ = [
    "EXCESS_NAME",
    "REDDENING_LIKE",
    "parse_color_name",
    "is_bv",
    "reddening_to_av",
    "reddening",
]


EXCESS_NAME = re.compile(
    r"^E\s*[(\[_]\s*([A-Za-z]{1,3}[0-9]?)\s*[-_]\s*([A-Za-z]{1,3}[0-9]?)\s*[)\]]?\s*(mag)?$"
)


REDDENING_LIKE = ("ebv", "av", "excess")


def _color_tuple(excess_color):
    if excess_color is None:
        return None
    if isinstance(excess_color, str):
        parts = re.split(r"\s*-\s*", excess_color.strip().strip("()"))
        if len(parts) == 2 and all(parts):
            return (parts[0], parts[1])
    elif isinstance(excess_color, (tuple, list)) and len(excess_color) == 2:
        return (str(excess_color[0]), str(excess_color[1]))
    raise param_error("excess_color", "a (blue, red) pair of band names such as ('BP', 'RP') or 'BP-RP'", excess_color)


def parse_color_name(colname):
    """(blue, red) from a column name such as 'E(BP-RP)', via dustkit.bands where available."""
    try:
        from .. import bands as _bands
    except ImportError:
        _bands = None
    if _bands is not None and hasattr(_bands, "parse_excess_name"):
        try:
            blue, red = _bands.parse_excess_name(colname)
            return str(blue), str(red)
        except Exception:
            pass
    m = EXCESS_NAME.match(colname)
    if m:
        return m.group(1), m.group(2)
    return None


def is_bv(color):
    return color is not None and color[0].upper() == "B" and color[1].upper() == "V"


def reddening_to_av(kind, color, excess, excess_err, law, rv):
    """A_V and its error from the reddening as given."""
    excess = np.asarray(excess, dtype=float)
    excess_err = np.asarray(excess_err, dtype=float)
    if kind == "A_V":
        return excess.copy(), excess_err.copy()
    if kind == "E(B-V)":
        return rv * excess, rv * excess_err
    try:
        from .. import bands as _bands
    except ImportError:
        _bands = None
    if _bands is None or not hasattr(_bands, "excess_to_av"):
        raise CatalogError(
            f"Converting {kind} to A_V needs dustkit.bands.excess_to_av, which is not available in this "
            "installation. Hint: give E(B-V) or A_V instead."
        )
    av, av_err = _bands.excess_to_av(excess, excess_err, color[0], color[1], law=law, rv=rv)
    av = av.to_value(u.mag) if isinstance(av, u.Quantity) else np.asarray(av, dtype=float)
    av_err = av_err.to_value(u.mag) if isinstance(av_err, u.Quantity) else np.asarray(av_err, dtype=float)
    return np.broadcast_to(av, excess.shape).astype(float), np.broadcast_to(av_err, excess.shape).astype(float)


def reddening(table, cols, ctx, law, rv, default_err, limits, excess_color):
    """Return (excess, excess_err, kind, color, av, av_err); NaN where rejected."""
    role = next(k for k in REDDENING_LIKE if k in cols)
    colname = cols[role]
    vals, _, raw = numeric(table, colname, ctx)
    if role == "ebv":
        kind, color = "E(B-V)", ("B", "V")
    elif role == "av":
        kind, color = "A_V", None
    else:
        color = _color_tuple(excess_color) or parse_color_name(colname)
        if color is None:
            raise CatalogError(
                f"Cannot tell which colour excess column {colname!r} holds. "
                "Hint: pass excess_color=('BP', 'RP') (the blue and red band), or name the column like 'E(BP-RP)'."
            )
        if is_bv(color):
            kind, color = "E(B-V)", ("B", "V")
        else:
            kind = f"E({color[0]}-{color[1]})"
    # A_V per unit of excess, for the default error and the limits
    per_unit, _ = reddening_to_av(kind, color, np.ones(1), np.zeros(1), law, rv)
    k = float(per_unit[0])
    if not np.isfinite(k) or k <= 0:
        raise CatalogError(f"The {kind} -> A_V conversion factor for law {law!r}, R_V = {rv:g} is {k!r}; cannot use it.")
    default = rv * default_err / k
    err, _, _ = error_values(
        table, cols, f"{role}_err", ctx, default, f"the reddening {colname!r} ({kind})",
        f"{default:.3g} mag in {kind} (default_excess_err = {default_err:g} mag of E(B-V))",
    )
    av, av_err = reddening_to_av(kind, color, vals, err, law, rv)
    lo, hi = limits["ebv"]
    ebv_eq = av / rv
    ok_now = ctx.rej.code < 0
    bad = ok_now & ((ebv_eq < lo) | (ebv_eq > hi))
    if kind == "E(B-V)":
        why = reason("ebv_outside", colname, lo=lo, hi=hi)
    else:
        why = reason("excess_outside", colname, kind=kind, av_lo=rv * lo, av_hi=rv * hi, lo=lo, hi=hi)
    ctx.rej.add(bad, why, colname, raw)
    return vals, err, kind, (None if kind == "A_V" else color), av, av_err
