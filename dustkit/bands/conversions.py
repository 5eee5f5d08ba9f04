"""Band coefficients and conversions between A_V, band extinctions and colour excesses.

The E(B-V) convention
---------------------
dustkit uses one convention everywhere (ingestion, conversions, answers):

* ``A_V`` is the law's reference extinction: every law gives A(lambda)/A_V relative
  to it, and it is the quantity the model stores. It does not depend on the star.
* ``E(B-V)`` is the nominal reddening of the same dust, E(B-V) = A_V / R_V, exactly,
  under every law; this is the definition R_V = A_V / E(B-V), and what catalogues,
  cluster fits and dust maps quote. :func:`ebv_to_av` implements it; the colour
  ``("B", "V")`` in :func:`excess_to_av` and :func:`av_to_excess` uses it too.
* Every other band (and every other colour) is integrated over its transmission
  curve for the source star (a blackbody at ``temperature``) at the actual amount
  of extinction: A_band = A_V * k_band(temperature, A_V). Bands without a curve use
  the law at their effective wavelength (monochromatic).

So the Johnson V passband extinction of a particular star is close to, but not
exactly, A_V (a 5800 K star: 1.001 A_V under CCM89, 0.980 A_V under Fitzpatrick 99,
whose curve is normalised to broad-band photometry), and the passband B-V excess of
a particular star differs from the nominal E(B-V) by a few per cent (cool stars
redden less in B-V). The alternative, reading a catalogue E(B-V) through the B and
V passbands of each star, would make A_V = R_V E(B-V) false for most stars and tie
the model's A_V to the star that measured it.

Conventions for the conversions: magnitudes may be floats, arrays or ``Quantity``
in mag; when the main input (``excess`` or ``av``) is a ``Quantity`` the results are
``Quantity`` in mag, otherwise plain floats (numpy scalars for scalar input). All
are vectorised over values, per-value R_V and per-value ``temperature``, and
propagate uncertainties to first order (including R_V's when ``rv_err`` is given).

Notes
-----
Band coefficients from an average extinction law are statistical: individual sight
lines differ. Check converted values against local data before using them for
science or for planning instrument time.
"""

import functools

import numpy as np
from astropy import units as u

from .._lib.validation import param_error
from ..laws import DEFAULT_LAW, get_law, wavelength_micron
from .inputs import err_input, mag_input, output, rv_err_input, rv_input, temperature_input
from .passbands import (
    DEFAULT_AV,
    DEFAULT_TEMPERATURE,
    GRID_AV,
    GRID_TEMPERATURES,
    coefficient_table,
    passband_a_over_av,
)
from .registry import get_band

__all__ = [
    "a_band_over_av",
    "excess_over_ebv",
    "ebv_to_av",
    "excess_to_av",
    "av_to_excess",
    "av_to_band",
    "q_method_ebv",
    "band_table",
]

# distinct R_V values up to which exact tables are used; beyond, a grid uniform in 1/R_V
_RV_EXACT_MAX = 16
_RV_GRID = 65
# monochromatic coefficients: distinct R_V values computed exactly, else a finer grid
_MONO_RV_GRID = 129
_RV_STEP = 1e-2  # central-difference step for d/dR_V (error propagation)

_LOG_T = np.log(GRID_TEMPERATURES)
_DLOG_T = _LOG_T[1] - _LOG_T[0]
_DAV = GRID_AV[1] - GRID_AV[0]


# -----------------------------------------------------------------------------
# monochromatic coefficients (bands without a curve, or a bare wavelength)
# -----------------------------------------------------------------------------
@functools.lru_cache(maxsize=4096)
def _mono_cache(law, lam, rv):
    return float(law.a_over_av(lam * u.micron, rv=rv))


@functools.lru_cache(maxsize=256)
def _mono_grid(law, lam):
    lo, hi = law.rv_range
    inv = np.linspace(1.0 / hi, 1.0 / lo, _MONO_RV_GRID)
    table = np.array([_mono_cache(law, lam, float(min(max(1.0 / g, lo), hi))) for g in inv])
    return inv, table


def _mono(law, lam, rv):
    if np.ndim(rv) == 0:
        return _mono_cache(law, lam, float(rv))
    values, inverse = np.unique(rv, return_inverse=True)
    if values.size <= 64:
        return np.array([_mono_cache(law, lam, float(v)) for v in values])[inverse.reshape(rv.shape)]
    inv, table = _mono_grid(law, lam)
    return np.interp(1.0 / rv, inv, table)


# -----------------------------------------------------------------------------
# passband coefficients from the tables
# -----------------------------------------------------------------------------
@functools.lru_cache(maxsize=256)
def _rv_grid_tables(law, band):
    lo, hi = law.rv_range
    inv = np.linspace(1.0 / hi, 1.0 / lo, _RV_GRID)
    tables = np.stack([coefficient_table(law, band, float(min(max(1.0 / g, lo), hi))) for g in inv])
    tables.flags.writeable = False
    return inv, tables


def _tables(law, band, rv):
    """(tables (nR, nA, nT), ir, wr) for a scalar or flat-array R_V."""
    if np.ndim(rv) == 0 or law.rv_fixed:
        r = float(rv) if np.ndim(rv) == 0 else law.rv_range[0]
        return coefficient_table(law, band, r)[None], 0, None
    values, inverse = np.unique(rv, return_inverse=True)
    if values.size == 1:
        return coefficient_table(law, band, float(values[0]))[None], 0, None
    if values.size <= _RV_EXACT_MAX:
        return np.stack([coefficient_table(law, band, float(v)) for v in values]), inverse.ravel(), None
    inv, tables = _rv_grid_tables(law, band)
    x = (1.0 / rv - inv[0]) / (inv[1] - inv[0])
    ir = np.clip(np.floor(x).astype(np.intp), 0, inv.size - 2)
    return tables, ir, np.clip(x - ir, 0.0, 1.0)


def _t_index(t):
    x = (np.log(t) - _LOG_T[0]) / _DLOG_T
    it = np.clip(x.astype(np.intp), 0, _LOG_T.size - 2)
    return it, np.clip(x - it, 0.0, 1.0)


_NA, _NT = GRID_AV.size, GRID_TEMPERATURES.size


class _Coefficient:
    """k = A_band/A_V and dk/dA_V of one band (or a difference of two) for fixed law, R_V, temperatures.

    ``k = table(A_V, T [, R_V]) + mono``: ``flat`` holds the passband tables flattened
    (None for a band without a curve) and ``mono`` the monochromatic part.
    """

    def __init__(self, law, band, rv, t):
        self.flat, self.mono = None, 0.0
        if isinstance(band, u.Quantity):
            lam = wavelength_micron(band, "band")
            if lam.ndim != 0:
                raise param_error("band", "a band name, a Band or a single wavelength", band)
            self.mono = _mono(law, float(lam), rv)
            return
        band = get_band(band)
        if not band.has_curve:
            self.mono = _mono(law, float(band.wavelength.to_value(u.micron)), rv)
            return
        tables, ir, wr = _tables(law, band, rv)
        it, wt = _t_index(t)
        if tables.shape[0] == 1 and np.ndim(it) == 0:
            # one R_V and one temperature: collapse to a column over A_V (cheaper lookups)
            col = (1.0 - wt) * tables[0, :, it] + wt * tables[0, :, it + 1]
            self.flat, self.base, self.wt, self.wr, self.stride = col, 0, None, None, 1
            return
        self.flat = tables.ravel()
        self.wt = wt
        # flat index of the (R_V, A_V = first node, T) corner for every value
        self.base = np.asarray(ir) * (_NA * _NT) + it
        self.wr = wr
        self.stride = _NT

    def __sub__(self, other):
        out = object.__new__(_Coefficient)
        out.mono = self.mono - other.mono
        if self.flat is None and other.flat is None:
            out.flat = None
        elif other.flat is None:
            out.flat, out.base, out.wt, out.wr, out.stride = self.flat, self.base, self.wt, self.wr, self.stride
        elif self.flat is None:
            out.flat, out.base, out.wt, out.wr, out.stride = -other.flat, other.base, other.wt, other.wr, other.stride
        else:
            out.flat, out.base, out.wt, out.wr, out.stride = (
                self.flat - other.flat, self.base, self.wt, self.wr, self.stride)
        return out

    def _corner(self, idx, wa):
        f, wt = self.flat, self.wt
        if wt is None:  # a column over A_V
            lo, hi = f[idx], f[idx + 1]
        else:
            v00, v01 = f[idx], f[idx + 1]
            v10, v11 = f[idx + _NT], f[idx + _NT + 1]
            lo = v00 + wt * (v01 - v00)
            hi = v10 + wt * (v11 - v10)
        return lo + wa * (hi - lo), (hi - lo) * (1.0 / _DAV)

    def __call__(self, a):
        """(k, dk/dA) at A_V values ``a`` (broadcast with R_V and temperature)."""
        a = np.asarray(a, dtype=float)
        if self.flat is None:
            k = np.broadcast_to(self.mono, np.broadcast_shapes(np.shape(self.mono), a.shape)) + 0.0
            return np.where(np.isnan(a), np.nan, k), np.zeros(k.shape)
        nan = np.isnan(a)
        x = (np.where(nan, 0.0, a) - GRID_AV[0]) * (1.0 / _DAV)
        inside = (x >= 0) & (x <= _NA - 1)
        x = np.clip(x, 0.0, _NA - 1)
        ia = np.minimum(x.astype(np.intp), _NA - 2)
        wa = x - ia
        idx = self.base + ia * self.stride
        k, slope = self._corner(idx, wa)
        if self.wr is not None:
            k1, s1 = self._corner(idx + _NA * _NT, wa)
            k, slope = k + self.wr * (k1 - k), slope + self.wr * (s1 - slope)
        k = k + self.mono
        if np.any(nan):
            k = np.where(nan, np.nan, k)
        return k, np.where(inside, slope, 0.0)


def _prepare(law, rv, temperature, *arrays):
    """Broadcast R_V, temperatures and value arrays to one flat shape; returns (shape, rv, t, arrays)."""
    rv = rv_input(rv, law)
    t = temperature_input(temperature, DEFAULT_TEMPERATURE, stacklevel=5)
    shape = np.broadcast_shapes(np.shape(rv), t.shape, *(np.shape(a) for a in arrays))
    rv_flat = rv if np.ndim(rv) == 0 else np.broadcast_to(rv, shape).ravel()
    t_flat = t if t.ndim == 0 else np.broadcast_to(t, shape).ravel()
    flat = [np.broadcast_to(a, shape).ravel() for a in arrays]
    return shape, rv_flat, t_flat, flat


def _rv_pair(law, rv):
    lo, hi = law.rv_range
    return np.clip(rv - _RV_STEP, lo, hi), np.clip(rv + _RV_STEP, lo, hi)


def _is_nominal(blue, red):
    """True for the colour B-V of the registry (the nominal E(B-V))."""
    if isinstance(blue, u.Quantity) or isinstance(red, u.Quantity):
        return False
    b, r = get_band(blue), get_band(red)
    return b.builtin and r.builtin and b.name == "B" and r.name == "V"


def _scalar_or_array(values, shape):
    values = np.asarray(values, dtype=float).reshape(shape)
    return float(values) if values.ndim == 0 else values


# -----------------------------------------------------------------------------
# public functions
# -----------------------------------------------------------------------------
def a_band_over_av(band, law=DEFAULT_LAW, rv=3.1, *, temperature=None, av=None):
    """Band coefficient A_band / A_V for a source and an amount of extinction.

    For a band with a transmission curve the law is integrated over the curve for a
    blackbody source at ``temperature`` extincted by ``av`` (synthetic photometry,
    from precomputed tables; see :mod:`dustkit.bands.passbands`). For a band without
    a curve, or a wavelength, the law is evaluated at the effective wavelength and
    the result depends on neither.

    Parameters
    ----------
    band : str, Band or Quantity
        Band name (see :func:`band_table`), a :class:`Band`, or an effective wavelength.
    law : str or Law, optional
        Extinction law (see :func:`dustkit.laws.list_laws`).
    rv : float or array_like, optional
        R_V = A_V / E(B-V).
    temperature : Quantity['temperature'] or array, optional
        Blackbody temperature of the source, 2 000-100 000 K, scalar or one per value.
        Default :data:`DEFAULT_TEMPERATURE` (5800 K, a Sun-like star).
    av : float, array_like or Quantity['mag'], optional
        A_V at which the coefficient is taken. Default :data:`DEFAULT_AV` (0.1 mag).

    Returns
    -------
    float or ndarray
        A float when every input is scalar, else an array of the broadcast shape.

    Raises
    ------
    LawRangeError
        The band's curve (or wavelength) or ``rv`` is outside the law's range.

    Notes
    -----
    Table interpolation agrees with the exact integral
    (:func:`passband_a_over_av`) to better than 1e-4 in A_band/A_V. Beyond the
    table's A_V range (-5 to 65 mag) the coefficient is held at its end value.
    """
    law = get_law(law)
    a, _ = mag_input("av", DEFAULT_AV if av is None else av)
    shape, rv_f, t_f, (a_f,) = _prepare(law, rv, temperature, a)
    k, _ = _Coefficient(law, band, rv_f, t_f)(a_f)
    return _scalar_or_array(k, shape)


def excess_over_ebv(blue, red, law=DEFAULT_LAW, rv=3.1, *, temperature=None, av=None):
    """Colour-excess ratio E(blue - red) / E(B-V), E(B-V) the nominal reddening A_V / R_V.

    Parameters
    ----------
    blue, red : str, Band or Quantity
        The two bands of the colour.
    law : str or Law, optional
    rv : float or array_like, optional
    temperature : Quantity['temperature'] or array, optional
        Source blackbody temperature (default 5800 K).
    av : float, array_like or Quantity['mag'], optional
        A_V at which the ratio is taken (default 0.1 mag).

    Returns
    -------
    float or ndarray
        R_V (A_blue - A_red) / A_V; exactly 1 for ``("B", "V")``.
    """
    law = get_law(law)
    a, _ = mag_input("av", DEFAULT_AV if av is None else av)
    shape, rv_f, t_f, (a_f,) = _prepare(law, rv, temperature, a)
    if _is_nominal(blue, red):
        return _scalar_or_array(np.ones(np.broadcast(rv_f, t_f, a_f).shape), shape)
    kb, _ = _Coefficient(law, blue, rv_f, t_f)(a_f)
    kr, _ = _Coefficient(law, red, rv_f, t_f)(a_f)
    return _scalar_or_array(rv_f * (kb - kr), shape)


def ebv_to_av(ebv, ebv_err=None, law=DEFAULT_LAW, rv=3.1, rv_err=0.0):
    """A_V from the nominal reddening E(B-V): A_V = R_V E(B-V), under every law.

    This is dustkit's one E(B-V) convention (see the module notes); ingestion,
    :func:`excess_to_av` with ``("B", "V")`` and answers in E(B-V) all use it.

    Parameters
    ----------
    ebv : float, array_like or Quantity['mag']
        E(B-V). NaN values stay NaN.
    ebv_err : float, array_like, Quantity['mag'] or None, optional
        Its 1-sigma uncertainty (``None`` means 0).
    law : str or Law, optional
        Checks R_V against the law's range (a fixed-R_V law uses its own R_V).
    rv : float or array_like, optional
    rv_err : float or array_like, optional
        Uncertainty of R_V.

    Returns
    -------
    av, av_err : ndarray or Quantity['mag']
        sigma_AV^2 = (R_V sigma_E)^2 + (E sigma_RV)^2.
    """
    law = get_law(law)
    e, as_q = mag_input("ebv", ebv)
    e_err = err_input("ebv_err", ebv_err)
    rv = rv_input(rv, law)
    rv_err = rv_err_input(rv_err, law)
    av = rv * e
    av_err = np.sqrt((rv * e_err) ** 2 + (e * rv_err) ** 2)
    av, av_err = np.broadcast_arrays(av, av_err)
    return output(av, as_q), output(av_err, as_q)


def _pair_excess(law, blue, red, rv, t, a):
    """E(blue-red) = A (k_b - k_r) and dE/dA at A_V values ``a``."""
    pair = _Coefficient(law, blue, rv, t) - _Coefficient(law, red, rv, t)
    d, slope = pair(a)
    return a * d, d + a * slope, pair


def av_to_excess(av, av_err, blue, red, law=DEFAULT_LAW, rv=3.1, rv_err=0.0, *, temperature=None):
    """Colour excess E(blue - red) for a given A_V, with uncertainties.

    E = A_V (k_blue - k_red), the coefficients taken for the source at that A_V;
    for ``("B", "V")`` the nominal E(B-V) = A_V / R_V.

    Parameters
    ----------
    av : float, array_like or Quantity['mag']
    av_err : float, array_like, Quantity['mag'] or None
    blue, red : str, Band or Quantity
    law : str or Law, optional
    rv : float or array_like, optional
    rv_err : float or array_like, optional
    temperature : Quantity['temperature'] or array, optional
        Source blackbody temperature, scalar or one per value (default 5800 K).

    Returns
    -------
    excess, excess_err : ndarray or Quantity['mag']
        Quantity when ``av`` is a Quantity.
    """
    law = get_law(law)
    a, as_q = mag_input("av", av)
    a_err = err_input("av_err", av_err)
    rv_err = rv_err_input(rv_err, law)
    if _is_nominal(blue, red):
        rv = rv_input(rv, law)
        e = a / rv
        e_err = np.sqrt((a_err / rv) ** 2 + (a * rv_err / rv**2) ** 2)
        e, e_err = np.broadcast_arrays(e, e_err)
        return output(e, as_q), output(e_err, as_q)
    shape, rv_f, t_f, (a_f, ae_f, re_f) = _prepare(law, rv, temperature, a, a_err, rv_err)
    e, slope, _ = _pair_excess(law, blue, red, rv_f, t_f, a_f)
    var = (ae_f * slope) ** 2
    if np.any(re_f > 0):
        r1, r2 = _rv_pair(law, rv_f)
        e1, _, _ = _pair_excess(law, blue, red, r1, t_f, a_f)
        e2, _, _ = _pair_excess(law, blue, red, r2, t_f, a_f)
        var = var + ((e2 - e1) / np.where(r2 > r1, r2 - r1, 1.0) * re_f) ** 2
    return output(e.reshape(shape), as_q), output(np.sqrt(var).reshape(shape), as_q)


def excess_to_av(excess, excess_err, blue, red, law=DEFAULT_LAW, rv=3.1, rv_err=0.0, *, temperature=None):
    """Convert a colour excess E(blue - red) to A_V, with uncertainties.

    Solves E = A_V (k_blue - k_red)(temperature, A_V) for A_V (Newton's method on
    the tabulated passband coefficients, so the inverse of :func:`av_to_excess` to
    1e-12). For ``("B", "V")`` the nominal convention A_V = R_V E(B-V) is used
    (:func:`ebv_to_av`).

    Parameters
    ----------
    excess : float, array_like or Quantity['mag']
        Colour excess E(blue - red). NaN values stay NaN.
    excess_err : float, array_like, Quantity['mag'] or None
        Its 1-sigma uncertainty (``None`` means 0).
    blue, red : str, Band or Quantity
        The bands of the colour, e.g. ``"B", "V"`` or ``"BP", "RP"``.
    law : str or Law, optional
    rv : float or array_like, optional
        R_V = A_V / E(B-V).
    rv_err : float or array_like, optional
        Uncertainty of R_V, propagated to first order.
    temperature : Quantity['temperature'] or array, optional
        Source blackbody temperature, scalar or one per value (default 5800 K);
        :func:`colour_temperature` turns an intrinsic colour into one.

    Returns
    -------
    av, av_err : ndarray or Quantity['mag']
        Quantity when ``excess`` is a Quantity, plain floats otherwise.

    Notes
    -----
    sigma_AV = sqrt(sigma_E^2 + (dE/dR_V sigma_RV)^2) / (dE/dA_V).
    """
    law = get_law(law)
    e, as_q = mag_input("excess", excess)
    e_err = err_input("excess_err", excess_err)
    if _is_nominal(blue, red):
        return ebv_to_av(excess, excess_err, law=law, rv=rv, rv_err=rv_err)
    rv_err = rv_err_input(rv_err, law)
    shape, rv_f, t_f, (e_f, ee_f, re_f) = _prepare(law, rv, temperature, e, e_err, rv_err)
    pair = _Coefficient(law, blue, rv_f, t_f) - _Coefficient(law, red, rv_f, t_f)
    d0, _ = pair(np.zeros(np.shape(e_f)))
    if np.any(d0 == 0):
        raise param_error(
            "blue", f"a band at another wavelength than red ({red!r}): the colour has no excess", blue
        )
    if np.all(d0 < 0):  # dust dims the 'red' band more: the colour is written red minus blue
        raise param_error(
            "blue", f"the bluer band of the colour: {blue!r} is redder than {red!r}, so E({blue}-{red}) is negative "
            f"for any dust and every A_V would come out negative. Hint: pass blue={red!r}, red={blue!r}", blue
        )
    a = e_f / d0
    # Newton's method on E(A) = A d(A); d varies by a few per cent over many mag,
    # so three or four steps reach rounding level
    for _ in range(30):
        d, s = pair(a)
        slope = d + a * s
        step = (a * d - e_f) / slope
        a = a - step
        if not np.nanmax(np.abs(step), initial=0.0) > 1e-11:
            break
    var = ee_f**2
    if np.any(re_f > 0):
        r1, r2 = _rv_pair(law, rv_f)
        e1, _, _ = _pair_excess(law, blue, red, r1, t_f, a)
        e2, _, _ = _pair_excess(law, blue, red, r2, t_f, a)
        var = var + ((e2 - e1) / np.where(r2 > r1, r2 - r1, 1.0) * re_f) ** 2
    a_err = np.sqrt(var) / np.abs(slope)
    return output(a.reshape(shape), as_q), output(a_err.reshape(shape), as_q)


def av_to_band(av, av_err, band, law=DEFAULT_LAW, rv=3.1, rv_err=0.0, *, temperature=None):
    """Extinction in ``band`` for a given A_V, with uncertainties.

    A_band = A_V k_band(temperature, A_V), integrated over the band's curve (or the
    law at the effective wavelength for a band without one).

    Parameters
    ----------
    av : float, array_like or Quantity['mag']
    av_err : float, array_like, Quantity['mag'] or None
    band : str, Band or Quantity
    law : str or Law, optional
    rv : float or array_like, optional
    rv_err : float or array_like, optional
        Uncertainty of R_V (changes the band coefficient), propagated to first order.
    temperature : Quantity['temperature'] or array, optional
        Source blackbody temperature, scalar or one per value (default 5800 K).

    Returns
    -------
    a, a_err : ndarray or Quantity['mag']
        Quantity when ``av`` is a Quantity, plain floats otherwise.
        sigma_band^2 = (dA_band/dA_V sigma_AV)^2 + (dA_band/dR_V sigma_RV)^2.
    """
    law = get_law(law)
    a, as_q = mag_input("av", av)
    a_err = err_input("av_err", av_err)
    rv_err = rv_err_input(rv_err, law)
    shape, rv_f, t_f, (a_f, ae_f, re_f) = _prepare(law, rv, temperature, a, a_err, rv_err)
    k, slope = _Coefficient(law, band, rv_f, t_f)(a_f)
    out = a_f * k
    var = (ae_f * (k + a_f * slope)) ** 2
    if np.any(re_f > 0):
        r1, r2 = _rv_pair(law, rv_f)
        k1, _ = _Coefficient(law, band, r1, t_f)(a_f)
        k2, _ = _Coefficient(law, band, r2, t_f)(a_f)
        var = var + (a_f * (k2 - k1) / np.where(r2 > r1, r2 - r1, 1.0) * re_f) ** 2
    return output(out.reshape(shape), as_q), output(np.sqrt(var).reshape(shape), as_q)


def q_method_ebv(b_v, u_b, b_v_err=0.0, u_b_err=0.0, slope=0.72, intrinsic_slope=0.332):
    """E(B-V) of an early-type star from its UBV colours (the Q-method).

    Q = (U-B) - slope (B-V) is independent of reddening; the intrinsic colour is
    (B-V)_0 = intrinsic_slope Q, so E(B-V) = (B-V) - intrinsic_slope Q.

    Parameters
    ----------
    b_v, u_b : float, array_like or Quantity['mag']
        Observed colours B-V and U-B.
    b_v_err, u_b_err : float, array_like or Quantity['mag'], optional
        Their uncertainties, taken as independent (in practice they share the B
        magnitude, so this is a slight overestimate when the errors correlate).
    slope : float, optional
        E(U-B)/E(B-V); 0.72 (Hiltner & Johnson 1956).
    intrinsic_slope : float, optional
        (B-V)_0 / Q for early-type dwarfs; 0.332 (Johnson 1958).

    Returns
    -------
    ebv, ebv_err : ndarray or Quantity['mag']
        Quantity when ``b_v`` is a Quantity.

    Notes
    -----
    Johnson & Morgan 1953 (ApJ 117, 313) for Q; valid for O to about B9 dwarfs
    only. Later stars give wrong (usually too large) reddenings. Convert the result
    to A_V with :func:`ebv_to_av`.
    """
    bv, as_q = mag_input("b_v", b_v)
    ub, _ = mag_input("u_b", u_b)
    bv_err = err_input("b_v_err", b_v_err)
    ub_err = err_input("u_b_err", u_b_err)
    q = ub - slope * bv
    ebv = bv - intrinsic_slope * q
    # d ebv / d(B-V) = 1 + intrinsic_slope * slope ; d ebv / d(U-B) = -intrinsic_slope
    ebv_err = np.hypot((1 + intrinsic_slope * slope) * bv_err, intrinsic_slope * ub_err)
    ebv, ebv_err = np.broadcast_arrays(ebv, ebv_err)
    return output(ebv, as_q), output(ebv_err, as_q)


def _reference_wavelength(band, temperature_k):
    """Photon-weighted mean wavelength (micron) of a band for a blackbody source."""
    from .curves import read_transmission

    lam, thr = read_transmission(band)
    grid = np.linspace(lam[0], lam[-1], 4000)
    c2 = 14387.7688  # h c / k_B in micron K (CODATA 2018)
    weight = np.interp(grid, lam, thr) * grid * grid**-5 / np.expm1(c2 / (grid * temperature_k))
    return float(np.sum(weight * grid) / np.sum(weight))


def band_table(law=DEFAULT_LAW, rv=3.1, *, temperature=None, av=None):
    """Table of the known bands, with each band's coefficient for a reference star.

    Parameters
    ----------
    law : str or Law, optional
        Law of the ``coefficient`` column.
    rv : float, optional
    temperature : Quantity['temperature'], optional
        Reference star: a blackbody at this temperature (default 5800 K).
    av : float or Quantity['mag'], optional
        A_V at which the coefficient is taken (default 0.1 mag).

    Returns
    -------
    QTable
        Columns ``name``, ``system``, ``curve`` (source of the transmission curve, or
        the note that only the effective wavelength is used), ``wavelength`` (the
        nominal effective wavelength, micron), ``reference_wavelength`` (photon-weighted
        mean wavelength for the reference star, micron; the nominal one for bands
        without a curve), ``coefficient`` (A_band / A_V for the reference star; NaN
        where the band lies outside the law's range), ``aliases``, ``source``.
    """
    from astropy.table import QTable

    from ..exceptions import LawRangeError
    from .registry import registered_bands

    law = get_law(law)
    rv = law.check_rv(rv)
    t = float(temperature_input(temperature, DEFAULT_TEMPERATURE, stacklevel=3))
    a, _ = mag_input("av", DEFAULT_AV if av is None else av)
    if a.ndim != 0 or not np.isfinite(a) or a < 0:  # a star behind dust: A_V >= 0
        raise param_error("av", "a single A_V >= 0 mag for the reference star", av)
    bands = registered_bands()
    coeff, ref = [], []
    for band in bands:
        try:
            if band.has_curve:  # one exact integral (equal to the tables to 5e-5)
                coeff.append(passband_a_over_av(band, law, rv, av=float(a), temperature=t * u.K))
            else:
                coeff.append(a_band_over_av(band, law, rv))
        except LawRangeError:
            coeff.append(np.nan)
        ref.append(_reference_wavelength(band, t) if band.has_curve else float(band.wavelength.to_value(u.micron)))
    table = QTable()
    table["name"] = [b.name for b in bands]
    table["system"] = [b.system for b in bands]
    table["curve"] = [b.curve_source if b.has_curve else "none: effective wavelength only" for b in bands]
    table["wavelength"] = u.Quantity([b.wavelength.to(u.micron) for b in bands])
    table["reference_wavelength"] = np.array(ref) * u.micron
    table["coefficient"] = np.array(coeff)
    table["aliases"] = [", ".join(b.aliases) for b in bands]
    table["source"] = [b.source for b in bands]
    table.meta["law"] = law.name
    table.meta["rv"] = rv
    table.meta["temperature"] = t
    table.meta["av"] = float(a)
    table.meta["description"] = (
        f"Photometric bands. 'coefficient' is A_band/A_V under {law.name} (R_V = {rv:g}) for a reference "
        f"star: a {t:g} K blackbody behind A_V = {float(a):g} mag, integrated over the band's transmission "
        "curve; bands without a curve use the law at their effective wavelength. Broad-band coefficients "
        "depend on the star and on A_V; NaN: the band lies outside the law's range."
    )
    return table
