"""Value checks: numbers (and sexagesimal strings) from columns, positions, error columns, names."""

import numpy as np
from astropy import units as u
from astropy.table import MaskedColumn

from ..exceptions import AssumptionWarning, CatalogError
from .._lib.units import as_unit, relative_unit_factor, sexagesimal_unit
from .context import Context
from .rules import LATITUDE_RANGE, LONGITUDE_RANGE, RA_RANGE, reason

__all__ = [
    "numeric",
    "relative_error_factor",
    "to_unit",
    "positions",
    "error_values",
    "optional_numbers",
    "names_of",
]


_MISSING_TOKENS = {"", "nan", "--", "null", "none", "na", "n/a", "-", "masked"}
#: Numbers that catalogues write for "no value" (common practice): read as given, but announced when one
#: of them recurs at the edge of a column's values.
_SENTINELS = (99.0, 99.9, 99.99, 999.0, 999.9, 999.99, 9999.0, 99999.0, -99.0, -99.9, -99.99, -999.0, -9999.0)

_SENTINEL_HINT = "blank those cells, or pass reject_limits to leave them out, if they mean 'no value'."
_OPTIONAL_HINT = ("blank those cells if they mean 'no value' (an error then takes the default error, a temperature "
                  "or intrinsic colour the default star); an error that large gives its row no weight.")


_SEXAGESIMAL = (
    r"^\s*([+-]?)\s*(\d{1,3})(?:\s*[:hHdD\u00b0]\s*|\s+)(\d{1,2})(?:\s*[:mM']\s*|\s+)"
    r"(\d{1,2}(?:\.\d*)?)\s*[sS\"]?\s*$"
)


def numeric(table, colname, ctx, *, sexagesimal=None, sentinel_least=2, sentinel_hint=_SENTINEL_HINT):
    """Return (float values, unit or None, raw column) and reject missing / non-numeric rows.

    ``sexagesimal`` is ``"hour"`` or ``"deg"`` when strings like '12:30:00' are allowed.
    """
    col = table[colname]
    unit = getattr(col, "unit", None)
    if np.ndim(col) != 1:
        raise CatalogError(
            f"Column {colname!r} in {ctx.desc} has shape {np.shape(col)}; dustkit needs one number per row. "
            "Hint: split it into separate columns."
        )
    mask = None
    if isinstance(col, MaskedColumn):
        mask = np.asarray(col.mask, dtype=bool) if np.ndim(col.mask) else np.full(len(col), bool(col.mask))
        data = np.asarray(col.data.data)
    elif hasattr(col, "unmasked") and hasattr(col, "mask"):  # astropy Masked quantity
        mask = np.asarray(col.mask, dtype=bool)
        data = np.asarray(getattr(col.unmasked, "value", col.unmasked))
    elif isinstance(col, u.Quantity):
        data = np.asarray(col.value)
    else:
        data = np.asarray(col)
    unit = _column_unit(unit)
    if sexagesimal is not None and sexagesimal_unit(unit) is not None:
        # 'h:m:s' / 'd:m:s' (VizieR): sexagesimal text; numbers in such a column are hours or degrees
        unit = u.hourangle if sexagesimal_unit(unit) == "hour" else u.deg
    nonnumeric = np.zeros(len(data), dtype=bool)
    if data.dtype.kind in "fiub":
        values = data.astype(float)
    else:
        strings = data.astype(str) if data.dtype.kind != "S" else np.char.decode(data, "utf-8", "replace")
        try:
            values = strings.astype(float)
        except (TypeError, ValueError):
            import pandas as pd

            values = np.array(pd.to_numeric(pd.Series(strings), errors="coerce"), dtype=float)
            bad = np.isnan(values)
            stripped = np.char.lower(np.char.strip(strings))
            blank = np.isin(stripped, list(_MISSING_TOKENS))
            if sexagesimal is not None and (bad & ~blank).any():
                sx = _parse_sexagesimal(strings[bad & ~blank], hours=(sexagesimal == "hour"))
                values[np.flatnonzero(bad & ~blank)] = sx
                bad = np.isnan(values)
                if sexagesimal == "hour" and np.isfinite(sx).any():
                    ctx.sexagesimal_hours.add(colname)
                    ctx.note(
                        AssumptionWarning,
                        f"Column {colname!r} holds sexagesimal strings; read as hours:minutes:seconds of right "
                        "ascension (numbers in the same column are read as deg).",
                    )
                    unit = None
            nonnumeric = bad & ~blank
    missing = (np.isnan(values) & ~nonnumeric) | (mask if mask is not None else False)
    values = np.where(mask, np.nan, values) if mask is not None else values
    infinite = np.isinf(values)
    ctx.rej.add(missing, reason("missing", colname), colname, col)
    ctx.rej.add(nonnumeric, reason("non_numeric", colname), colname, col)
    ctx.rej.add(infinite, reason("infinite", colname), colname, col)
    values = np.where(np.isfinite(values), values, np.nan)
    _note_sentinels(values, colname, ctx, least=sentinel_least, hint=sentinel_hint)
    return values, unit, col


def _column_unit(unit):
    """A column's unit, None for no unit ('', '---', dimensionless); sexagesimal units kept as written."""
    if unit is None or sexagesimal_unit(unit) is not None:
        return unit
    try:
        unit = as_unit(unit)
    except (ValueError, TypeError):
        return unit  # unreadable: the caller reports it, naming the column
    return None if unit == u.dimensionless_unscaled else unit


def _note_sentinels(values, colname, ctx, least=2, hint=_SENTINEL_HINT):
    """Announce a 'no value' number (99.99, -999, ...) that recurs (``least`` times) as a column's largest or
    smallest value."""
    fin = values[np.isfinite(values)]
    if fin.size < 3:
        return
    for edge in {fin.max(), fin.min()}:
        if edge not in _SENTINELS:
            continue
        n = int(np.count_nonzero(fin == edge))
        if n >= least:
            first = int(np.argmax(values == edge))
            rows = f"{n} rows of column {colname!r} hold" if n > 1 else f"Row {first} of column {colname!r} holds"
            where = f" (first at row {first})" if n > 1 else ""
            ctx.note(AssumptionWarning,
                     f"{rows} {edge:g}{where}, a number catalogues write for 'no value'; read as that number. "
                     f"Hint: {hint}")


def _parse_sexagesimal(strings, hours):
    import pandas as pd

    parts = pd.Series(strings).str.extract(_SEXAGESIMAL)
    sign = np.where(parts[0].to_numpy() == "-", -1.0, 1.0)
    d = pd.to_numeric(parts[1], errors="coerce").to_numpy(dtype=float)
    m = pd.to_numeric(parts[2], errors="coerce").to_numpy(dtype=float)
    s = pd.to_numeric(parts[3], errors="coerce").to_numpy(dtype=float)
    ok = (m < 60) & (s < 60)
    val = np.where(ok, sign * (d + m / 60.0 + s / 3600.0), np.nan)
    return val * 15.0 if hours else val


def _outside(x, limits):
    """True where ``x`` lies outside the inclusive range ``limits``."""
    return (x < limits[0]) | (x > limits[1])


def to_unit(values, unit, target, colname, ctx, what):
    """Convert ``values`` from a column unit to ``target``; None means no unit."""
    if unit is None:
        return values
    try:
        unit = as_unit(unit, like=target)
        return values * unit.to(target)
    except (ValueError, TypeError, u.UnitsError):
        raise CatalogError(
            f"Column {colname!r} in {ctx.desc} has unit {str(unit)!r}, which is not {what}. "
            f"Hint: fix the column's unit or map the column to the right role with columns={{...}}."
        ) from None


def positions(table, cols, ctx):
    """Galactic l, b in deg (NaN where rejected) and the mask of rows with a usable position."""
    if "l" in cols:
        lc, bc = cols["l"], cols["b"]
        l, lu, lraw = numeric(table, lc, ctx)
        b, bu, braw = numeric(table, bc, ctx)
        l = to_unit(l, lu, u.deg, lc, ctx, "an angle")
        b = to_unit(b, bu, u.deg, bc, ctx, "an angle")
        ctx.rej.add(_outside(b, LATITUDE_RANGE), reason("latitude", bc), bc, braw)
        ctx.rej.add(_outside(l, LONGITUDE_RANGE), reason("longitude", lc), lc, lraw)
        ok = ctx.rej.code < 0
        l = np.where(ok, np.mod(l, 360.0), np.nan)
        b = np.where(ok, b, np.nan)
    else:
        rc, dc = cols["ra"], cols["dec"]
        ra, ru, rraw = numeric(table, rc, ctx, sexagesimal="hour")
        _hours_hint(ra, ru, rc, ctx)
        dec, du, draw = numeric(table, dc, ctx, sexagesimal="deg")
        ra, ru = _time_as_hour_angle(ra, ru, rc, ctx)
        ra = to_unit(ra, ru, u.deg, rc, ctx, "an angle")
        dec = to_unit(dec, du, u.deg, dc, ctx, "an angle")
        ctx.rej.add(_outside(dec, LATITUDE_RANGE), reason("latitude", dc), dc, draw)
        ctx.rej.add(_outside(ra, RA_RANGE), reason("ra", rc), rc, rraw)
        ok = ctx.rej.code < 0
        l = np.full(ctx.n, np.nan)
        b = np.full(ctx.n, np.nan)
        frame, said = equatorial_frame(table, rc, dc)
        if ok.any():
            from astropy.coordinates import SkyCoord  # 0.2 s to import: only for ra/dec input

            gal = SkyCoord(ra=ra[ok] * u.deg, dec=dec[ok] * u.deg, frame=_astropy_frame(frame)).galactic
            l[ok] = np.mod(gal.l.deg, 360.0)
            b[ok] = gal.b.deg
        if said is None:
            ctx.assumptions.append(
                f"ra/dec ({rc!r}, {dc!r}) taken as ICRS and converted to Galactic l, b with astropy.coordinates"
            )
        else:
            ctx.note(AssumptionWarning, f"ra/dec ({rc!r}, {dc!r}) read as {frame[0]} {frame[1] or ''}".rstrip()
                     + f" ({said}) and converted to Galactic l, b with astropy.coordinates.")
    if l.size:
        l = np.where(l >= 360.0, 0.0, l)
    return l, b, ok


#: Where a file says the frame of its equatorial columns: the table metadata key the VOTable reader fills
#: from the COOSYS its position fields refer to (dustkit.tracers.reader), and FITS header keywords.
COOSYS_META = "dustkit_coosys"


def equatorial_frame(table, rc, dc):
    """((system, equinox), how it is known) of the equatorial columns ``rc``, ``dc``; how is None for ICRS
    by default.

    The names first ('RAB1950', 'DE1950': FK4 B1950), then the file: a VOTable COOSYS the columns refer
    to (VOTable 1.4 sec 3.3: system eq_FK4 / eq_FK5 / ICRS and its equinox), then the FITS keywords
    RADESYS (or RADECSYS) and EQUINOX, RADESYS defaulting to FK4 for an EQUINOX before 1984 and to FK5
    from 1984 (FITS standard 4.0 sec 8.1, from memory). FK5 J2000 is taken as ICRS (they differ by
    less than 0.1 arcsec).
    """
    names = (str(rc).lower(), str(dc).lower())
    if any("1950" in n for n in names):
        return ("FK4", "B1950"), "the column names say B1950"
    meta = {str(k).upper(): v for k, v in (table.meta or {}).items()}
    coosys = (table.meta or {}).get(COOSYS_META, {})
    system = coosys.get(rc) or coosys.get(dc)
    if system is not None:
        frame = _frame_from(system[0], system[1])
        how = f"the VOTable COOSYS of the columns: system {system[0]!r}, equinox {system[1]!r}"
    else:
        sys_word = meta.get("RADESYS", meta.get("RADECSYS"))
        equinox = meta.get("EQUINOX")  # (not EPOCH: tables use it for the epoch of the positions, e.g. 2016.0)
        if sys_word is None and equinox is None:
            return ("ICRS", None), None
        frame = _frame_from(sys_word, equinox)
        how = "the file's " + " and ".join(f"{k} = {meta[k]!r}" for k in ("RADESYS", "RADECSYS", "EQUINOX")
                                           if k in meta and meta[k] is not None)
    if frame is None or frame[0] == "ICRS" or frame == ("FK5", "J2000"):
        return ("ICRS", None), None
    return frame, how


def _frame_from(system, equinox):
    """(system, equinox) from a frame's name and equinox as files write them, or None if not equatorial."""
    word = str(system or "").strip().upper().replace("EQ_", "")
    eq = None
    if equinox is not None and str(equinox).strip():
        text = str(equinox).strip().upper()
        try:
            year = float(text.lstrip("BJ"))
        except ValueError:
            year = None
        if year is not None:
            letter = text[0] if text[0] in "BJ" else ("B" if (word == "FK4" or (not word and year < 1984)) else "J")
            eq = f"{letter}{year:g}"
    if not word:
        word = "FK4" if eq is not None and eq.startswith("B") else "FK5"
    if word.startswith("FK4"):
        return ("FK4", eq or "B1950")
    if word == "FK5":
        return ("FK5", eq or "J2000")
    if word == "ICRS":
        return ("ICRS", None)
    return None


def _astropy_frame(frame):
    from astropy.coordinates import FK4, FK5

    system, equinox = frame
    if system == "FK4":
        return FK4(equinox=equinox)
    if system == "FK5":
        return FK5(equinox=equinox)
    return "icrs"


def _time_as_hour_angle(ra, unit, colname, ctx):
    """Right ascensions in a unit of time ('h', as FITS and VOTable files write hours of RA) as hour angle:
    (values in deg, deg); any other unit is returned as it is."""
    if unit is None:
        return ra, unit
    try:
        unit = as_unit(unit, like=u.deg)
    except (ValueError, TypeError):
        return ra, unit
    if not unit.is_equivalent(u.h):
        return ra, unit
    ctx.assumptions.append(f"right ascension {colname!r} in {unit} of time read as hour angle (1 h = 15 deg)")
    return ra * unit.to(u.h) * 15.0, u.deg


def _hours_hint(ra, unit, colname, ctx):
    """Warn when right ascensions without a unit are all within 0..24: hours, not degrees, perhaps (catalogues
    list RA in hours as often as in degrees; read as deg, 0-24 h land in a 24 deg wedge of the sky)."""
    finite = ra[np.isfinite(ra)]
    if unit is not None or colname in ctx.sexagesimal_hours or finite.size == 0 or finite.max() > 24.0:
        return
    ctx.note(
        AssumptionWarning,
        f"Column {colname!r} has no unit and every right ascension is within 0..24 ({finite.size} rows, at most "
        f"{finite.max():g}); read as deg, but they may be hours. Hint: if they are hours, give the column the unit "
        "hourangle (an astropy Table column with unit u.hourangle, a FITS TUNIT 'h') or multiply them by 15; if it is "
        "not right ascension, map the columns with columns={...}.",
    )


#: Words in an error column's name, beside its value column's name, that make its numbers relative to the
#: value: a percentage ('e_Dist(%)', 'dist_err_pct') or a fraction ('dist_fracerr', 'ebv_relerr').
_PERCENT_WORDS = ("pct", "percent", "perc")
_FRACTION_WORDS = ("frac", "rel")


def relative_error_factor(colname, unit, value_col):
    """(factor, how) when the error column ``colname`` holds errors relative to its value, else None.

    ``factor`` turns its numbers into a fraction of the value: from a dimensionless unit other than
    1 ('%': 0.01; astropy units), else from its name (a '%' or the words of ``_PERCENT_WORDS``: 0.01;
    ``_FRACTION_WORDS``: 1), looked for in the part of the name that is not the value column's name.
    """
    factor = relative_unit_factor(unit)
    if factor is not None:
        return factor, f"its unit {str(unit)!r}"
    if unit is not None:
        return None  # a unit with a dimension (pc, mag, mas) says the errors are absolute
    rest = str(colname).lower().replace(str(value_col or "").lower(), "", 1)
    rest_words = "".join(ch for ch in rest if ch.isalnum())
    if "%" in rest or any(w in rest_words for w in _PERCENT_WORDS):
        return 0.01, "its name"
    if any(w in rest_words for w in _FRACTION_WORDS):
        return 1.0, "its name"
    return None


def optional_numbers(table, colname, ctx, sentinel_least=2):
    """Values of an optional per-row column (an error, a temperature, an intrinsic colour): text and
    infinities reject the row in ``ctx.rej``; empty cells are NaN (not rejected). Returns (values, unit, raw).
    A 'no value' number (99.99, ...) at the column's edge is announced when it occurs ``sentinel_least`` times."""
    sub = Context(table, ctx.desc)
    vals, unit, raw = numeric(table, colname, sub, sentinel_least=sentinel_least, sentinel_hint=_OPTIONAL_HINT)
    for k, (why, c, r) in enumerate(sub.rej.reasons):
        if why in (reason("non_numeric", c), reason("infinite", c)):
            ctx.rej.add(sub.rej.code == k, why, c, r)
    for cls, msg in sub.notes:  # the 'no value' numbers' notes
        ctx.note(cls, msg)
    return vals, unit, raw


def _error_numbers(table, colname, ctx):
    """An error column's numbers and unit (:func:`optional_numbers`), negative errors rejected too;
    empty cells are NaN (they take the default, not rejected)."""
    # a lone 99.99 among errors is as much a 'no value' as a recurring one (it gives its row no weight)
    vals, unit, _ = optional_numbers(table, colname, ctx, sentinel_least=1)
    ctx.rej.add(vals < 0, reason("negative_error", colname), colname, table[colname])
    return vals, unit


def error_values(table, cols, key, ctx, default, value_desc, default_desc, values=None):
    """Error column values (NaN where missing/zero is replaced by ``default``), negative ones rejected.

    Returns (errors, unit, column): ``column`` is the error column (None without one; for a pair of
    lower and upper error columns, ``cols[key + '_low']``, whose unit is returned). A pair is read as
    the mean of its two errors where both are given, else the one given. Errors relative to the value
    (:func:`relative_error_factor`; ``values`` are the value column's numbers in its own unit) are
    returned in that unit, with the unit None.
    """
    colname = cols.get(key)
    pair = (cols.get(key + "_low"), cols.get(key + "_high"))
    if colname is None and None in pair:
        if ctx.quiet_default_errors:
            return np.broadcast_to(default, (ctx.n,)).astype(float), None, None
        ctx.note(
            AssumptionWarning,
            f"No error column for {value_desc}; using the default {default_desc} for every row.",
        )
        return np.broadcast_to(default, (ctx.n,)).astype(float), None, None
    if colname is not None:
        vals, unit = _error_numbers(table, colname, ctx)
        shown = colname
    else:
        low, unit = _error_numbers(table, pair[0], ctx)
        high, high_unit = _error_numbers(table, pair[1], ctx)
        if high_unit is not None and unit is not None and str(high_unit) != str(unit):
            raise CatalogError(
                f"The lower and upper error columns {pair[0]!r} and {pair[1]!r} in {ctx.desc} have different units "
                f"({str(unit)!r} and {str(high_unit)!r}). Hint: give both in one unit."
            )
        given = np.isfinite(low) & (low > 0), np.isfinite(high) & (high > 0)
        vals = np.where(given[0] & given[1], 0.5 * (low + high), np.where(given[0], low, np.where(given[1], high, np.nan)))
        colname, shown = pair[0], f"{pair[0]}/{pair[1]}"
        ctx.assumptions.append(f"asymmetric errors {pair[0]!r} (lower) and {pair[1]!r} (upper): their mean is the "
                               "error of each row (the one given where the other is empty)")
    relative = relative_error_factor(colname, unit, cols.get(key[:-4]))
    if relative is not None and values is not None:
        factor, how = relative
        what = "percent" if factor == 0.01 else ("a fraction" if factor == 1.0 else f"{factor:g} times")
        ctx.assumptions.append(f"error column {colname!r} read as {what} of {cols.get(key[:-4])!r} (from {how})")
        if how == "its name":
            ctx.note(AssumptionWarning, f"Error column {colname!r} read as {what} of the value in "
                     f"{cols.get(key[:-4])!r} (its name says so). Hint: rename it if the errors are absolute.",
                     assumption=False)
        vals = vals * factor * np.abs(np.asarray(values, dtype=float))
        unit = None
    fill = ~(vals > 0)
    fill &= ctx.rej.code < 0
    vals = np.where(np.isfinite(vals) & (vals > 0), vals, np.nan)
    if fill.any() and not ctx.quiet_default_errors:
        ctx.note(
            AssumptionWarning,
            f"{int(fill.sum())} rows have an empty or zero error in {shown!r}; using the default "
            f"{default_desc} for them.",
        )
    return np.where(np.isnan(vals), default, vals), unit, colname


def names_of(table, cols):
    if "name" not in cols:  # "row <i>", made only when someone asks (TracerSet.name)
        return None
    col = table[cols["name"]]
    data = np.asarray(col.data.data if isinstance(col, MaskedColumn) else getattr(col, "value", col))
    if data.dtype.kind == "S":
        data = np.char.decode(data, "utf-8", "replace")
    names = data.astype(str)
    empty = names == ""
    if isinstance(col, MaskedColumn):
        empty |= np.ma.getmaskarray(col)
    if empty.any():
        names = names.astype(object)
        idx = np.flatnonzero(empty)
        names[idx] = np.char.add("row ", idx.astype(str))
        names = names.astype(str)
    return names
