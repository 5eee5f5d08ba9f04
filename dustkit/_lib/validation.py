"""Small shared validators with one message shape.

Message shape (used everywhere): "The 'nside' parameter must be a power of two
between 1 and 1024. Got 12 instead."
"""

import numbers

import numpy as np
from astropy import units as u

from ..exceptions import ParameterError

__all__ = ["param_error", "check_choice", "check_real", "check_int", "check_nside", "check_seed", "check_quiet",
           "to_value"]


def param_error(name, requirement, value):
    """Build the project's one-shape ParameterError."""
    if isinstance(value, np.generic):  # 'Got -1.0', not numpy's repr 'Got np.float64(-1.0)'
        value = value.item()
    return ParameterError(f"The '{name}' parameter must be {requirement}. Got {value!r} instead.")


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
