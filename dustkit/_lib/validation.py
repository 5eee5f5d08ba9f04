"""Small shared validators with one message shape.

Message shape (used everywhere): "The 'nside' parameter must be a power of two
between 1 and 1024. Got 12 instead."
"""

import numbers

import numpy as np
from astropy import units as u

from ..exceptions import ParameterError

__all__ = ["param_error", "shown", "Described", "check_choice", "check_real", "check_int", "check_nside", "check_seed",
           "check_quiet", "to_value", "to_scalar"]

#: Values of an array shown in a message: the first and the last few when there are more.
_SHOWN_VALUES = 6


class Described(str):
    """A value already put into words ('NSIDE 1024 with 6001 distance edges'): shown as it is, without quotes."""


def param_error(name, requirement, value):
    """Build the project's one-shape ParameterError (the value as :func:`shown` writes it)."""
    return ParameterError(f"The '{name}' parameter must be {requirement}. Got {shown(value)} instead.")


def shown(value):
    """A value as a message shows it: plain numbers and lists, not numpy's or astropy's reprs.

    ``np.float64(1.5)`` -> ``1.5``; ``array([1., 2.])`` -> ``[1.0, 2.0]``; ``<Quantity [1., 2.] pc>``
    -> ``[1.0, 2.0] pc``; a long array -> its first and last values and its size; strings keep
    their quotes (``'kpc '`` shows the space), a :class:`Described` value is shown as written.
    """
    if isinstance(value, Described):
        return str(value)
    if isinstance(value, u.Quantity):
        unit = value.unit.to_string()
        return shown(value.value) + (f" {unit}" if unit else "")
    if isinstance(value, (np.ndarray, np.generic)):
        arr = np.asarray(value)
        if np.ma.isMaskedArray(value):  # masked entries shown as None
            arr = np.where(np.ma.getmaskarray(value), None, np.ma.getdata(value).astype(object))
        if arr.ndim == 0:
            return repr(_plain(arr.item()))
        if arr.size > 2 * _SHOWN_VALUES:
            return _ends(list(arr.ravel()), f"shape {arr.shape}" if arr.ndim > 1 else f"{arr.size} values")
        return repr(_plain(arr.tolist()))
    if isinstance(value, (list, tuple)):
        if len(value) > 2 * _SHOWN_VALUES:
            return _ends(list(value), f"{len(value)} values")
        return repr(_plain(value))
    return repr(value)


def _ends(values, size):
    """'[1.0, 2.0, ..., 99.0] (100 values)': the first and the last values of a long sequence."""
    head = ", ".join(shown(x) for x in values[:_SHOWN_VALUES])
    tail = ", ".join(shown(x) for x in values[-_SHOWN_VALUES:])
    return f"[{head}, ..., {tail}] ({size})"


def _plain(value):
    """Lists and tuples with numpy scalars inside turned into Python numbers (for their repr)."""
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, list):
        return [_plain(v) for v in value]
    if isinstance(value, tuple):
        return tuple(_plain(v) for v in value)
    return value


def check_choice(name, value, choices):
    """Return ``value`` (lower-cased if a string) if it is one of ``choices``."""
    key = value.lower() if isinstance(value, str) else value
    if key not in choices:
        options = ", ".join(repr(c) for c in choices)
        raise param_error(name, f"one of {options}", value)
    return key


def check_real(name, value, low=-np.inf, high=np.inf, low_inclusive=True, high_inclusive=True):
    """Return ``value`` as float if it is a finite real number inside the bounds."""
    if isinstance(value, bool) or not isinstance(value, (numbers.Real, np.floating, np.integer)):
        raise param_error(name, _range_text(low, high, low_inclusive, high_inclusive, "a real number"), value)
    v = float(value)
    ok = np.isfinite(v)
    ok = ok and (v >= low if low_inclusive else v > low)
    ok = ok and (v <= high if high_inclusive else v < high)
    if not ok:
        raise param_error(name, _range_text(low, high, low_inclusive, high_inclusive, "a real number"), value)
    return v


def check_int(name, value, low=-np.inf, high=np.inf):
    """Return ``value`` as int if it is an integer inside [low, high]."""
    if isinstance(value, bool) or not isinstance(value, (numbers.Integral, np.integer)):
        raise param_error(name, _range_text(low, high, True, True, "an integer"), value)
    v = int(value)
    if not (low <= v <= high):
        raise param_error(name, _range_text(low, high, True, True, "an integer"), value)
    return v


def check_nside(value, name="nside"):
    """Return ``value`` if it is a HEALPix NSIDE: a power of two from 1 to 1024."""
    req = "a power of two between 1 and 1024"
    if isinstance(value, bool) or not isinstance(value, (numbers.Integral, np.integer)):
        raise param_error(name, req, value)
    v = int(value)
    if v < 1 or v > 1024 or (v & (v - 1)) != 0:
        raise param_error(name, req, value)
    return v


def check_seed(value, name="random_state"):
    """Return ``value`` as int if it is a seed: an integer >= 0 (the same seed gives the same result)."""
    if (isinstance(value, bool) or not isinstance(value, (numbers.Integral, np.integer))
            or not 0 <= int(value) < 2**63):
        raise param_error(name, "an integer >= 0 (a seed: the same seed gives the same result)", value)
    return int(value)


def check_quiet(value, name="quiet"):
    """Return ``value`` if it is True, False or None (None: progress shown only on a terminal)."""
    if value is None or isinstance(value, (bool, np.bool_)):
        return None if value is None else bool(value)
    raise param_error(name, "True, False or None (None: progress bars only on a terminal)", value)


def to_value(name, value, unit, default_unit=None):
    """Convert a Quantity (or a plain number when ``default_unit`` is given) to a float array in ``unit``.

    A plain number without ``default_unit`` raises, naming the unit expected.
    """
    if isinstance(value, u.Quantity):
        try:
            return np.asarray(value.to_value(unit), dtype=float)
        except u.UnitConversionError:
            raise param_error(name, f"a quantity convertible to {unit}", value) from None
    if default_unit is None:
        raise param_error(name, f"an astropy Quantity in units of {unit} (e.g. 3 * u.{unit})", value)
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise param_error(name, f"a number or Quantity in units of {unit}", value) from None
    return np.asarray((arr * u.Unit(default_unit)).to_value(unit), dtype=float)


def to_scalar(name, value, unit, default_unit=None):
    """:func:`to_value` of a single value, as a float; an array raises, naming ``name`` (not numpy's TypeError)."""
    v = to_value(name, value, unit, default_unit)
    if v.ndim:
        raise param_error(name, f"a single value in {unit}", value)
    return float(v)


def _range_text(low, high, low_inc, high_inc, kind):
    if np.isinf(low) and np.isinf(high):
        return kind
    if np.isinf(high):
        return f"{kind} {'>=' if low_inc else '>'} {_fmt(low)}"
    if np.isinf(low):
        return f"{kind} {'<=' if high_inc else '<'} {_fmt(high)}"
    lo = "[" if low_inc else "("
    hi = "]" if high_inc else ")"
    return f"{kind} in {lo}{_fmt(low)}, {_fmt(high)}{hi}"


def _fmt(x):
    return f"{x:g}"
