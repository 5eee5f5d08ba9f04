"""Units written in catalogue files, parsed leniently and converted once at the boundary."""

from astropy import units as u

__all__ = ["as_unit", "unit_factor"]


def as_unit(unit):
    """An astropy unit from a column unit, retrying in lower case (FITS files write 'KPC', 'Mas').

    Raises ``ValueError`` when the unit cannot be read either way.
    """
    unit = u.Unit(unit, parse_strict="silent")
    if isinstance(unit, u.UnrecognizedUnit):
        unit = u.Unit(str(unit).strip().lower())
    return unit


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
