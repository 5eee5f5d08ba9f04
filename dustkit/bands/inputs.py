"""Input checks shared by the band modules: magnitudes, uncertainties, temperatures, R_V."""

import warnings

import numpy as np
from astropy import units as u

from ..exceptions import AssumptionWarning
from .._lib.validation import param_error

__all__ = ["mag_input", "err_input", "rv_input", "rv_err_input", "temperature_input", "output",
           "TEMPERATURE_RANGE"]

#: Blackbody temperatures the coefficient grids cover, K.
TEMPERATURE_RANGE = (2000.0, 100000.0)


def mag_input(name, value, allow_none=False):
    """Return (float ndarray in mag, was_quantity)."""
    if value is None:
        if allow_none:
            return None, False
        raise param_error(name, "a number, array or Quantity in mag", value)
    if isinstance(value, u.Quantity):
        try:
            return np.asarray(value.to_value(u.mag), dtype=float), True
        except u.UnitConversionError:
            raise param_error(name, "a number, array or Quantity in mag", value) from None
    try:
        return np.asarray(value, dtype=float), False
    except (TypeError, ValueError):
        raise param_error(name, "a number, array or Quantity in mag", value) from None


def err_input(name, value):
    """An uncertainty in mag (float ndarray, >= 0); None means 0."""
    arr, _ = mag_input(name, value, allow_none=True)
    if arr is None:
        return np.zeros(())
    bad = arr < 0
    if np.any(bad):
        first = arr[bad].ravel()[0] if arr.ndim else float(arr)
        raise param_error(
            name, f"non-negative (an uncertainty); {int(np.count_nonzero(bad))} value(s) are negative",
            float(first),
        )
    return arr


def rv_input(rv, law):
    """Checked R_V as float (scalar) or float ndarray."""
    if rv is None or np.ndim(rv) == 0:
        return law.check_rv(rv if rv is None or not isinstance(rv, np.ndarray) else rv.item())
    arr = np.asarray(rv, dtype=float)
    if not np.all(np.isfinite(arr)):
        raise param_error("rv", "finite (R_V = A_V / E(B-V))", rv)
    law.check_rv(float(arr.min()))
    law.check_rv(float(arr.max()))
    if law.rv_fixed:
        return np.full(arr.shape, law.rv_range[0])
    return np.clip(arr, *law.rv_range)


def rv_err_input(rv_err, law):
    """Checked R_V uncertainty (float ndarray >= 0; 0 for fixed-R_V laws)."""
    arr = np.asarray(0.0 if rv_err is None else rv_err, dtype=float)
    if np.any(~np.isfinite(arr)) or np.any(arr < 0):
        raise param_error("rv_err", "finite and non-negative", rv_err)
    if law.rv_fixed and np.any(arr > 0):
        raise param_error(
            "rv_err",
            f"0 for the law '{law.name}', whose R_V is fixed at {law.rv_range[0]:g} "
            "(choose an R_V-dependent law to propagate an R_V uncertainty)",
            rv_err,
        )
    return arr


def temperature_input(temperature, default, stacklevel=4, name="temperature"):
    """Blackbody temperature(s) in K as a float ndarray inside :data:`TEMPERATURE_RANGE`.

    ``None`` gives ``default``; a bare number is taken as kelvin (announced). ``name`` is the
    caller's parameter, named in errors.
    """
    if temperature is None:
        temperature = default
    if isinstance(temperature, u.Quantity):
        try:
            t = np.asarray(temperature.to_value(u.K, equivalencies=u.temperature()), dtype=float)
        except (u.UnitConversionError, TypeError):
            raise param_error(name, "a temperature (e.g. 5800 * u.K)", temperature) from None
    else:
        try:
            t = np.asarray(temperature, dtype=float)
        except (TypeError, ValueError):
            raise param_error(name, "a temperature (e.g. 5800 * u.K)", temperature) from None
        warnings.warn(
            f"{name}={temperature if t.ndim == 0 else 'array'!r} has no unit; assuming kelvin.",
            AssumptionWarning, stacklevel=stacklevel,
        )
    lo, hi = TEMPERATURE_RANGE
    bad = ~np.isfinite(t) | (t < lo) | (t > hi)
    if np.any(bad):
        first = float(t[bad].ravel()[0]) if t.ndim else float(t)
        many = ("" if t.ndim == 0 else f" ({int(np.count_nonzero(bad))} value(s) outside or not finite; "
                "fill missing values with the default before converting)")
        raise param_error(name, f"a blackbody temperature between {lo:g} and {hi:g} K{many}", first)
    return t


def output(values, as_quantity):
    """Quantity in mag, or plain floats (numpy scalar for 0-d)."""
    values = np.asarray(values, dtype=float)
    if as_quantity:
        return values * u.mag
    return values[()] if values.ndim == 0 else values
