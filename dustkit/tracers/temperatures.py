"""The one reading of a star-temperature column, for tracers and targets alike.

``read_tracers`` needs each star's temperature to turn a colour excess other than E(B-V)
into A_V (:func:`dustkit.tracers.reddening.source_temperatures`); ``estimate_targets`` needs
it for the targets' band extinctions (:func:`dustkit.tracers.reader.target_temperatures`).
Both read the column here, with the same checks and the same words: text or infinite cells,
temperatures <= 0 K and log10 values outside (0, 6) are bad rows (named, with the column and
the value), empty cells take the default star (counted), values beyond the coefficient
tables' 2 000-100 000 K are set to the nearest edge (counted), and a column whose median is
below 100 is refused (log10 K, or not a temperature at all).
"""

import re

import numpy as np
from astropy import units as u

from ..exceptions import AssumptionWarning, CatalogError
from .._lib.units import as_unit
from ..bands.inputs import TEMPERATURE_RANGE
from .rules import reason
from .values import optional_numbers

__all__ = ["is_log_name", "temperature_values", "announce_temperatures", "rows_have"]


def is_log_name(colname):
    """True for a column name that says log10 of a temperature (``logTeff``, ``lg_teff``, ...)."""
    return re.sub(r"[^a-z0-9]", "", str(colname).lower()).startswith(("log", "lg"))


def _kelvin(vals, unit, colname, ctx):
    """Values in the column's unit -> K (with astropy's temperature equivalencies: deg_C reads too)."""
    if unit is None:
        return vals
    try:
        unit = as_unit(unit, like=u.K)
        return (vals * unit).to_value(u.K, equivalencies=u.temperature())
    except (ValueError, TypeError, u.UnitsError):
        raise CatalogError(
            f"Column {colname!r} in {ctx.desc} has unit {str(unit)!r}, which is not a temperature in K. "
            "Hint: fix the column's unit or map the column to the right role with columns={...}."
        ) from None


def temperature_values(table, colname, ctx):
    """Temperatures (K) of a column, one per row: NaN for empty cells and for rows rejected here.

    Rows rejected in ``ctx.rej`` (with the column and value): text or infinite cells, values
    <= 0 K, and for ``log...`` names (log10 K) values outside (0, 6). A column in K whose usable
    values have a median below 100 stops the read with a :class:`~dustkit.exceptions.CatalogError`
    (log10 K under a plain name, or another quantity). Values beyond the coefficient tables are
    returned as they are (:func:`dustkit.bands.star_temperatures` sets them to the edge and counts them).
    """
    vals, unit, raw = optional_numbers(table, colname, ctx)
    if is_log_name(colname):  # log10(T / K)
        ctx.rej.add(~((vals > 0) & (vals < 6)) & np.isfinite(vals), reason("temperature_log", colname), colname, raw)
        vals = np.where((vals > 0) & (vals < 6), 10.0 ** np.where(np.isfinite(vals), vals, 0.0), np.nan)
    else:
        vals = _kelvin(vals, unit, colname, ctx)
        ok = np.isfinite(vals) & (vals > 0) & (ctx.rej.code < 0)
        if np.any(ok) and np.median(vals[ok]) < 100:
            raise CatalogError(
                f"Temperature column {colname!r} in {ctx.desc} has a median of {np.median(vals[ok]):.3g}: not "
                "a stellar temperature in K. Hint: if it holds log10(T_eff), name it like 'logTeff'; "
                "if it is another quantity, name the temperature column with columns={'temperature': ...}."
            )
    ctx.rej.add(vals <= 0, reason("temperature_not_positive", colname), colname, raw)
    return np.where(ctx.rej.code < 0, vals, np.nan)


def rows_have(n, what="rows"):
    """``"1 row has"`` / ``"3 rows have"`` (``what`` is the plural noun, e.g. ``"targets"``)."""
    return f"{n} {what[:-1]} has" if n == 1 else f"{n} {what} have"


def announce_temperatures(st, colname, ctx, what, t_default, rows_of, rows="rows"):
    """Announce (``ctx.note``, AssumptionWarning) the rows of :class:`~dustkit.bands.StarTemperatures` ``st``
    that took the default star (among ``rows_of``, bool per row) and those set to the tables' edge.

    Returns the two counts (default, clipped).
    """
    lo_t, hi_t = TEMPERATURE_RANGE
    n_default = int(np.count_nonzero(rows_of & ~st.from_input))
    n_clipped = int(st.n_clipped)  # rows given NaN (rejected) are never clipped
    if n_default:
        ctx.note(AssumptionWarning, f"{rows_have(n_default, rows)} no value in {colname!r}; {what} assumes a "
                 f"{t_default:g} K blackbody source for them.")
    if n_clipped:
        ctx.note(AssumptionWarning, f"{rows_have(n_clipped, rows)} a value in {colname!r} beyond the {lo_t:g}-"
                 f"{hi_t:g} K blackbodies of the coefficient tables; set to the nearest edge for {what}.")
    return n_default, n_clipped
