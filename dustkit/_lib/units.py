"""Units written in catalogue files, parsed leniently and converted once at the boundary."""

from astropy import units as u

__all__ = ["as_unit", "unit_factor"]


def as_unit(unit, like=None):
    """An astropy unit from a column unit, retrying in lower case (FITS files write 'KPC', 'Mas').

    ``like`` (a unit) says what the column should hold: a unit that reads as written but is
    not convertible to it is read again in lower case, for upper-case units that mean
    something else as written ('PC' is a petacoulomb, 'pc' a parsec). When neither reading
    converts, the unit as written is returned, for the caller to report.

    Raises ``ValueError`` when the unit cannot be read either way.
    """
    written = u.Unit(unit, parse_strict="silent")
    if isinstance(written, u.UnrecognizedUnit):
        return u.Unit(str(written).strip().lower())
    if like is not None and not written.is_equivalent(like):
        try:
            lower = u.Unit(str(written).strip().lower())
        except ValueError:
            return written
        if lower.is_equivalent(like):
            return lower
    return written


def unit_factor(unit, target):
    """The factor turning values in the column unit ``unit`` into ``target`` (1 for no unit).

    The unit is read as written first and, failing that (unreadable or not convertible),
    in lower case. Raises ``ValueError``, ``TypeError`` or ``astropy.units.UnitsError``
    when neither converts.
    """
    if unit is None or unit == "":
        return 1.0
    try:
        return float(u.Unit(unit, parse_strict="silent").to(target))
    except (ValueError, TypeError, u.UnitsError):
        return float(u.Unit(str(unit).strip().lower()).to(target))
