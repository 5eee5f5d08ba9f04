"""Reddening: a colour excess or A_V column turned into A_V under a law and R_V."""

import re

import numpy as np
from astropy import units as u

from ..exceptions import AssumptionWarning, CatalogError
from .._lib.units import as_unit
from .._lib.validation import param_error
from .rules import below_limit, reason
from .values import error_values, numeric, optional_numbers
from ..bands import DEFAULT_TEMPERATURE
from ..bands.inputs import temperature_input
from .temperatures import announce_temperatures, temperature_values

__all__ = [
    "EXCESS_NAME",
    "REDDENING_LIKE",
    "parse_color_name",
    "is_bv",
    "reddening_to_av",
    "intrinsic_color_bands",
    "colour_temperatures",
    "source_temperatures",
    "reddening",
    "mag_scale",
]


EXCESS_NAME = re.compile(
    r"^E\s*[(\[_]\s*([A-Za-z]{1,3}[0-9]?)\s*[-_]\s*([A-Za-z]{1,3}[0-9]?)\s*[)\]]?\s*(mag)?$"
)


REDDENING_LIKE = ("ebv", "av", "excess")


def _color_tuple(excess_color, name="excess_color"):
    if excess_color is None:
        return None
    if isinstance(excess_color, str):
        parts = re.split(r"\s*-\s*", excess_color.strip().strip("()"))
        if len(parts) == 2 and all(parts):
            return (parts[0], parts[1])
    elif isinstance(excess_color, (tuple, list)) and len(excess_color) == 2:
        return (str(excess_color[0]), str(excess_color[1]))
    raise param_error(name, "a (blue, red) pair of band names such as ('BP', 'RP') or 'BP-RP'", excess_color)


def parse_color_name(colname):
    """(blue, red) from a column name such as 'E(BP-RP)', via dustkit.bands where available."""
    try:
        from .. import bands as _bands
    except ImportError:
        _bands = None
    if _bands is not None and hasattr(_bands, "parse_excess_name"):
        try:
            pair = _bands.parse_excess_name(colname, strict=False)
        except Exception:  # ambiguous: the bands as written, for the band lookup to judge
            pair = None
        else:  # not two known bands of one colour (e.g. Stromgren 'E(b-y)'): not guessed from the letters
            return None if pair is None else (str(pair[0]), str(pair[1]))
    m = EXCESS_NAME.match(colname)
    if m:
        return m.group(1), m.group(2)
    return None


def is_bv(color):
    return color is not None and color[0].upper() == "B" and color[1].upper() == "V"


def reddening_to_av(kind, color, excess, excess_err, law, rv, temperature=None):
    """A_V and its error from the reddening as given.

    ``temperature`` (K, a scalar or one per row; None: the default source) is the blackbody
    temperature of the source for the passband conversion of a colour excess other than
    E(B-V); E(B-V) (A_V = R_V E(B-V)) and A_V do not depend on it.
    """
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
    t = None if temperature is None else np.asarray(temperature, dtype=float) * u.K
    av, av_err = _bands.excess_to_av(excess, excess_err, color[0], color[1], law=law, rv=rv, temperature=t)
    av = av.to_value(u.mag) if isinstance(av, u.Quantity) else np.asarray(av, dtype=float)
    av_err = av_err.to_value(u.mag) if isinstance(av_err, u.Quantity) else np.asarray(av_err, dtype=float)
    return np.broadcast_to(av, excess.shape).astype(float), np.broadcast_to(av_err, excess.shape).astype(float)


#: Words around a colour name that mark it as intrinsic (unreddened): ``(BP-RP)_0``,
#: ``bp_rp0``, ``BP-RP_int``, ``intrinsic_B-V``, ``dereddened_BP-RP``.
_INTRINSIC_NAME = re.compile(
    r"^(?:(?:intrinsic|int|dered|dereddened)[\s_\-]*)?\(?\s*(?P<inner>.+?)\s*\)?"
    r"(?:[\s_\-]*(?:0|o|intrinsic|int|dered|dereddened))?$",
    re.IGNORECASE,
)
_INTRINSIC_MARK = re.compile(
    r"(^(intrinsic|int|dered|dereddened)[\s_\-]*)|([\s_\-)]*(0|intrinsic|int|dered|dereddened)$)", re.IGNORECASE
)


def intrinsic_color_bands(colname):
    """(blue, red) of an intrinsic-colour column name such as ``(BP-RP)_0`` or ``bp_rp0``, else None.

    The name must carry a mark of an intrinsic colour (a trailing ``0``/``_0``, or the words
    ``intrinsic``, ``int``, ``dereddened``) and two registered bands, so that ``(m-M)0``,
    ``mu0`` or ``av0`` are not taken as colours.
    """
    if not isinstance(colname, str) or not _INTRINSIC_MARK.search(colname.strip()):
        return None
    m = _INTRINSIC_NAME.match(colname.strip())
    if not m or not m.group("inner") or m.group("inner") == colname.strip():
        return None
    inner = m.group("inner").strip("()_- ")
    if not inner:
        return None
    try:
        from .. import bands as _bands

        pair = _bands.parse_excess_name(f"E({inner})", strict=False)
    except Exception:  # an ambiguous name is not a recognised colour
        return None
    return None if pair is None else (str(pair[0]), str(pair[1]))


def colour_temperatures(table, colname, ctx, t_default, color_bands=None, bands_option="intrinsic_color_bands"):
    """The stars of an intrinsic-colour column: per-row blackbodies of the same colour, and what they are.

    The one reading of such a column (``(BP-RP)_0``, ``bp_rp0``, ``(B-V)_0``, ...), for the
    tracers' conversion of a colour excess (:func:`source_temperatures`) and the targets' band
    extinctions (:func:`dustkit.tracers.reader.target_temperatures`) alike. The colour's bands come
    from ``color_bands`` or the column's name (:func:`intrinsic_color_bands`); text or infinite
    cells reject the row in ``ctx.rej`` (named, with the column and the value); empty cells and
    rows rejected before take ``t_default`` (K); colours beyond the blackbodies' range are set to
    the nearest edge (both counted in the result, for the caller to announce). ``bands_option``:
    the caller's parameter for the colour's bands, named in the hint when the name does not tell
    them (None: the caller has none).

    Returns
    -------
    (StarTemperatures, str)
        The temperatures (:func:`dustkit.bands.star_temperatures`) and their source in words.
    """
    from .. import bands as _bands

    bands = _color_tuple(color_bands, "intrinsic_color_bands") or intrinsic_color_bands(colname)
    if bands is None:
        raise CatalogError(
            f"Cannot tell which colour the intrinsic-colour column {colname!r} holds. Hint: "
            + (f"pass {bands_option}=('BP', 'RP'), or " if bands_option else "")
            + "name the column like '(BP-RP)_0' or 'bp_rp0'."
        )
    try:
        blue, red = (_bands.get_band(b) for b in bands)
    except Exception as exc:
        raise CatalogError(f"Intrinsic-colour column {colname!r}: {exc}") from None
    if not (blue.has_curve and red.has_curve):
        raise CatalogError(
            f"Intrinsic-colour column {colname!r} is a {blue.name}-{red.name} colour, but a colour temperature "
            "needs two bands with transmission curves (see 'dustkit bands'). Hint: give a temperature column "
            "(e.g. 'teff') instead, or map the column away with columns={...}."
        )
    vals, unit, raw = optional_numbers(table, colname, ctx)
    use = np.where(ctx.rej.code < 0, vals, np.nan)
    st = _bands.star_temperatures(ctx.n, colour=use, colour_bands=(blue.name, red.name), default=t_default * u.K)
    return st, (f"the intrinsic colour {colname!r} (blackbodies of the same {blue.name}-{red.name}, "
                "dustkit.bands.colour_temperature)")


def source_temperatures(table, cols, ctx, kind, source_temperature=None, color_bands=None):
    """Per-row source temperatures (K) for turning a colour excess into A_V, or None.

    A colour excess other than E(B-V) is converted through the passbands of its two
    bands, whose coefficients depend on the star (:func:`dustkit.bands.excess_to_av`).
    The star's temperature per row comes from a temperature column (``teff``, ``T_eff``,
    ``logTeff``, ...) or an intrinsic-colour column (``(BP-RP)_0``, ``(B-V)_0``, turned
    into a blackbody colour temperature by :func:`dustkit.bands.star_temperatures`).
    Rows without a value get ``source_temperature`` (default 5800 K), announced.

    Text or infinite values, and temperatures <= 0, reject the row (with the column in
    the reason). Values beyond the tables' 2 000-100 000 K are set to the nearest edge,
    announced with their count. For E(B-V) and A_V, which do not depend on the star,
    no temperature is read and None is returned.
    """
    from .. import bands as _bands

    tcol, ccol = cols.get("temperature"), cols.get("intrinsic_color")
    t_default = float(temperature_input(source_temperature, DEFAULT_TEMPERATURE, stacklevel=6,
                                        name="source_temperature"))
    if kind in ("E(B-V)", "A_V"):
        for c, role in ((tcol, "temperature"), (ccol, "intrinsic_color")):
            if c is not None:
                ctx.used.pop(role, None)
                ctx.assumptions.append(f"column {c!r} not used: A_V from {kind} does not depend on the star")
        return None
    n = ctx.n
    what = f"the {kind} -> A_V conversion"
    if tcol is not None:
        use = temperature_values(table, tcol, ctx)
        st = _bands.star_temperatures(n, temperature=use * u.K, default=t_default * u.K)
        source = f"the temperature column {tcol!r}"
    elif ccol is not None:
        st, source = colour_temperatures(table, ccol, ctx, t_default, color_bands)
    else:
        if source_temperature is None:
            ctx.note(
                AssumptionWarning,
                f"No temperature or intrinsic-colour column: {what} assumes a {t_default:g} K blackbody source "
                "for every row (broad-band coefficients depend on the star; Gaia G by up to 30%). Hint: add a "
                "column 'teff' or '(BP-RP)_0', or pass source_temperature= (command line: --source-temperature).",
            )
        else:
            ctx.assumptions.append(f"{what} assumes a {t_default:g} K blackbody source for every row "
                                   "(source_temperature)")
        return np.full(n, t_default)
    ctx.assumptions.append(f"{what} uses per-row source temperatures from {source}")
    announce_temperatures(st, tcol or ccol, ctx, what, t_default, ctx.rej.code < 0)
    return st.temperature.to_value(u.K)


def mag_scale(unit, colname, ctx, what="a reddening or extinction"):
    """The factor turning a column's values into mag (1 without a unit, or with one astropy cannot
    read); a unit that is not a magnitude stops the read, saying that ``what`` is in mag."""
    if unit is None:
        return 1.0
    try:
        unit = as_unit(unit, like=u.mag)
    except (ValueError, TypeError):
        return 1.0
    if unit == u.dimensionless_unscaled:
        return 1.0
    try:
        return float(unit.to(u.mag))
    except (u.UnitsError, TypeError):
        raise CatalogError(
            f"Column {colname!r} in {ctx.desc} has unit {str(unit)!r}, which is not a magnitude ({what} is in "
            "mag). Hint: fix the column's unit, or map the right column with columns={...}."
        ) from None


def _redder_first(color, law, rv, temperature):
    """True when dust reddens the colour ``color[0] - color[1]`` negatively: its first band is the redder."""
    from .. import bands as _bands

    excess, _ = _bands.av_to_excess(1.0, 0.0, color[0], color[1], law=law, rv=rv,
                                    temperature=None if temperature is None else temperature * u.K)
    return float(np.asarray(getattr(excess, "value", excess))) < 0


def reddening(table, cols, ctx, law, rv, default_err, limits, excess_color, source_temperature=None,
              intrinsic_color_bands=None):
    """Return (excess, excess_err, kind, color, av, av_err); NaN where rejected.

    The per-row source temperatures of the conversion (K, see :func:`source_temperatures`;
    None for E(B-V) and A_V) are left in ``ctx.temperature``.
    """
    role = next(k for k in REDDENING_LIKE if k in cols)
    colname = cols[role]
    given, vunit, raw = numeric(table, colname, ctx)
    vscale = mag_scale(vunit, colname, ctx)
    vals = given * vscale
    if role == "ebv":
        kind, color = "E(B-V)", ("B", "V")
    elif role == "av":
        kind, color = "A_V", None
    else:
        color = _color_tuple(excess_color) or parse_color_name(colname)
        if color is None:
            raise CatalogError(
                f"Cannot tell which colour excess column {colname!r} holds: its name is not two known bands of "
                "one colour. Hint: pass excess_color=('BP', 'RP') (the blue and red band), or name the column like "
                "'E(BP-RP)'; bands dustkit does not know (e.g. Stromgren b, y) can be registered with "
                "dustkit.bands.add_band."
            )
        if is_bv(color):
            kind, color = "E(B-V)", ("B", "V")
        else:
            kind = f"E({color[0]}-{color[1]})"
    temps = source_temperatures(table, cols, ctx, kind, source_temperature, intrinsic_color_bands)
    ctx.temperature = temps
    t_ref = None if temps is None else float(temperature_input(source_temperature, DEFAULT_TEMPERATURE,
                                                                name="source_temperature"))
    if temps is not None and _redder_first(color, law, rv, t_ref):
        raise CatalogError(
            f"Column {colname!r} holds {kind}, but {color[0]} is the redder band of the two: such an excess is "
            f"negative for any dust, and read as given every A_V would be negative. Hint: if the values are "
            f"E({color[1]}-{color[0]}) (positive for reddening), pass excess_color=({color[1]!r}, {color[0]!r})."
        )
    # A_V per unit of excess (for the default source), for the default error and the limits
    per_unit, _ = reddening_to_av(kind, color, np.ones(1), np.zeros(1), law, rv, temperature=t_ref)
    k = float(per_unit[0])
    if not np.isfinite(k) or k <= 0:
        raise CatalogError(f"The {kind} -> A_V conversion factor for law {law!r}, R_V = {rv:g} is {k!r}; cannot use it.")
    default = rv * default_err / k
    err, eunit, ecol = error_values(
        table, cols, f"{role}_err", ctx, np.nan, f"the reddening {colname!r} ({kind})",
        f"{default:.3g} mag in {kind} (default_excess_err = {default_err:g} mag of E(B-V))", values=given,
    )
    if ecol is not None:  # in the error column's own unit (e.g. mmag), else the value's
        err = err * (vscale if eunit is None else mag_scale(eunit, ecol, ctx))
    err = np.where(np.isnan(err), default, err)
    av, av_err = reddening_to_av(kind, color, vals, err, law, rv, temperature=temps)
    lo, hi = limits["ebv"]
    ebv_eq = av / rv
    ok_now = ctx.rej.code < 0
    bad = ok_now & (below_limit(ebv_eq, av_err / rv, lo) | (ebv_eq > hi))
    if kind == "E(B-V)":
        why = reason("ebv_outside", colname, lo=lo, hi=hi)
    else:
        why = reason("excess_outside", colname, kind=kind, av_lo=rv * lo, av_hi=rv * hi, lo=lo, hi=hi)
    ctx.rej.add(bad, why, colname, raw)
    _hint_millimag(given, vunit, bad & (ebv_eq > hi), colname, ctx)
    return vals, err, kind, (None if kind == "A_V" else color), av, av_err


def _hint_millimag(given, unit, too_high, colname, ctx):
    """A reddening column with no unit whose values nearly all lie above the limit, at hundreds: millimag."""
    fin = np.isfinite(given)
    if unit is not None or fin.sum() < 1 or np.mean(too_high[fin]) < 0.8:
        return
    median = float(np.median(given[fin]))
    if 20.0 <= median <= 2.0e4:
        ctx.unit_hint = (f"Column {colname!r} has no unit and {int(too_high.sum())} of its {int(fin.sum())} values "
                         f"are too large for mag (median {median:.4g}): they look like millimagnitudes. Hint: give "
                         "the column the unit 'mmag' (a Table column's .unit, or a units line under a text header) "
                         "and read it again.")
        ctx.note(AssumptionWarning, ctx.unit_hint)
