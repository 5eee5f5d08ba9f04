"""Units written in catalogue files, parsed leniently and converted once at the boundary."""

import re

from astropy import units as u

__all__ = ["as_unit", "unit_factor", "sexagesimal_unit", "relative_unit_factor"]


#: Unit texts that say "no unit" (VizieR's byte-by-byte descriptions and units rows write '---').
_NO_UNIT = re.compile(r"^\s*-*\s*$")
#: Units that say a column holds sexagesimal text: 'h:m:s' (hours of right ascension), 'd:m:s' (degrees),
#: as VizieR's VOTable and TSV files write them (also quoted, or with spaces).
_SEXAGESIMAL_UNIT = re.compile(r"^([hd])\s*[: ]\s*m\s*[: ]\s*s$", re.IGNORECASE)


def _bare(text):
    """A unit text without the quotes and brackets files put around it ('"deg"', '[mag]', '(kpc)')."""
    return str(text).strip().strip("\"'").strip().strip("[]()").strip()


def sexagesimal_unit(unit):
    """``"hour"`` for a unit that says h:m:s, ``"deg"`` for d:m:s, else None (see ``_SEXAGESIMAL_UNIT``)."""
    if unit is None:
        return None
    m = _SEXAGESIMAL_UNIT.match(_bare(unit))
    if m is None:
        return None
    return "hour" if m.group(1).lower() == "h" else "deg"


def as_unit(unit, like=None):
    """An astropy unit from a column unit, retrying without quotes or brackets and in lower case
    (FITS files write 'KPC', 'Mas'; text files '"deg"', '[mag]'; '---' is no unit).

    ``like`` (a unit) says what the column should hold: a unit that reads as written but is
    not convertible to it is read again in lower case, for upper-case units that mean
    something else as written ('PC' is a petacoulomb, 'pc' a parsec). When neither reading
    converts, the unit as written is returned, for the caller to report.

    Raises ``ValueError`` when the unit cannot be read either way.
    """
    if isinstance(unit, str) and _NO_UNIT.match(unit):
        return u.dimensionless_unscaled
    written = u.Unit(unit, parse_strict="silent")
    if isinstance(written, u.UnrecognizedUnit):
        bare = _bare(written)
        if _NO_UNIT.match(bare):
            return u.dimensionless_unscaled
        try:
            return u.Unit(bare)
        except ValueError:
            return u.Unit(bare.lower())
    if like is not None and not written.is_equivalent(like):
        try:
            lower = u.Unit(str(written).strip().lower())
        except ValueError:
            return written
        if lower.is_equivalent(like):
            return lower
    return written


def relative_unit_factor(unit):
    """For an error column's unit that is a dimensionless scale other than 1 ('%', 'ppm'): the factor turning
    its numbers into a fraction of the value (0.01 for '%'), else None (no unit, a plain number, or a unit
    with a dimension such as 'mag' or 'pc')."""
    if unit is None:
        return None
    try:
        unit = as_unit(unit)
    except (ValueError, TypeError):
        return None
    if not unit.is_equivalent(u.dimensionless_unscaled):
        return None
    factor = float(unit.to(u.dimensionless_unscaled))
    return None if factor == 1.0 else factor


def unit_factor(unit, target):
    """The factor turning values in the column unit ``unit`` into ``target`` (1 for no unit).

    The unit is read as written first and, failing that (unreadable or not convertible),
    leniently (:func:`as_unit`). Raises ``ValueError``, ``TypeError`` or
    ``astropy.units.UnitsError`` when neither converts.
    """
    if unit is None or unit == "":
        return 1.0
    try:
        return float(u.Unit(unit, parse_strict="silent").to(target))
    except (ValueError, TypeError, u.UnitsError):
        return float(as_unit(unit, like=target).to(target))
