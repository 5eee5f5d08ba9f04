"""Passband integration: synthetic photometry of a source through a transmission curve.

For a band with a transmission curve T(lambda) (photon-counting response), a source
spectrum F_lambda and an extinction law k(lambda) = A(lambda)/A_V,

    A_band(A_V) = -2.5 log10( int T lambda F_lambda 10^(-0.4 A_V k) dlambda
                              / int T lambda F_lambda dlambda ),

and the band coefficient is A_band / A_V. Broad bands give coefficients that depend
on the source (hotter: larger) and fall slowly as A_V grows.

:func:`passband_a_over_av` integrates exactly for any curve, spectrum and A_V. The
conversions of :mod:`dustkit.bands` use instead tables of the same integral for
blackbody sources, precomputed per (law, band, R_V) on a grid of temperature
(2 000-100 000 K, uniform in log T) x A_V (-5 to 65 mag, step 0.25 mag) and
interpolated (bilinear), so that millions of conversions take well under a second.
"""

import functools
import os
import warnings
from dataclasses import dataclass

import numpy as np
from astropy import constants as const
from astropy import units as u

from ..exceptions import AssumptionWarning, LawRangeError
from .._lib.validation import param_error
from ..laws import DEFAULT_LAW, get_law, wavelength_micron
from .inputs import TEMPERATURE_RANGE, mag_input, temperature_input
from .curves import read_transmission
from .registry import Band

__all__ = [
    "DEFAULT_TEMPERATURE",
    "DEFAULT_AV",
    "read_transmission",
    "passband_a_over_av",
    "example_passband_path",
    "blackbody_colour",
    "colour_temperature",
    "coefficient_table",
    "GRID_TEMPERATURES",
    "GRID_AV",
    "StarTemperatures",
    "star_temperatures",
]

#: Blackbody temperature of the default source spectrum: a Sun-like star, typical
#: of field-star and cluster tracer samples. Used whenever no temperature is given.
DEFAULT_TEMPERATURE = 5800.0 * u.K

#: A_V at which a band coefficient is quoted when none is given (a lightly reddened
#: star; the coefficient's dependence on A_V is a few per cent per 3 mag for Gaia G).
DEFAULT_AV = 0.1 * u.mag

#: Temperature nodes of the coefficient tables (K, uniform in log T).
GRID_TEMPERATURES = np.geomspace(TEMPERATURE_RANGE[0], TEMPERATURE_RANGE[1], 193)
GRID_TEMPERATURES.flags.writeable = False
#: A_V nodes of the coefficient tables (mag); beyond the ends the coefficient is held constant.
GRID_AV = np.linspace(-5.0, 65.0, 281)
GRID_AV.flags.writeable = False

# points of the uniform integration grid (the curve's own points are added)
_N_POINTS = 600
_SCALE = 0.4 * np.log(10.0)


def example_passband_path():
    """Path of an invented example transmission file (flat top-hat, 330-1050 nm).

    The curve is an invented illustration of a very broad optical band, not the
    transmission of any real instrument. Wavelengths are in Angstrom.
    """
    return os.path.join(os.path.dirname(os.path.dirname(__file__)), "data", "broad_tophat_example.txt")


def _blackbody_flambda(lam_micron, temperature_k):
    """Planck F_lambda (arbitrary normalisation) at wavelengths in micron; broadcasts."""
    c2 = (const.h * const.c / const.k_B).to_value(u.micron * u.K)
    with np.errstate(over="ignore"):
        return lam_micron**-5 / np.expm1(c2 / (lam_micron * temperature_k))


def _integration_grid(lam_t, thr, n_points):
    """Integration grid (micron), throughput on it and trapezoid weights."""
    nz = np.flatnonzero(thr > 0)
    i0, i1 = max(nz[0] - 1, 0), min(nz[-1] + 1, lam_t.size - 1)
    lam_t, thr = lam_t[i0 : i1 + 1], thr[i0 : i1 + 1]
    lo, hi = lam_t[0], lam_t[-1]
    if hi <= lo:
        raise param_error("transmission", "a curve spanning a range of wavelengths", f"{lo} micron only")
    grid = np.union1d(np.linspace(lo, hi, n_points), lam_t)
    # T(lambda): linear interpolation between the curve's points; a vertical step
    # (a repeated wavelength) is smoothed over one grid cell, (hi - lo) / n_points
    t_grid = np.interp(grid, lam_t, thr)
    dlam = np.diff(grid)
    quad = np.zeros_like(grid)
    quad[:-1] += 0.5 * dlam
    quad[1:] += 0.5 * dlam
    return grid, t_grid, quad


# share of a band's photon weight that may lie beyond the law's wavelength range, where the
# law's value at its edge is used: the zero-throughput end of a tabulated curve interpolates
# into a faint wing (Bessell B from 0.36 micron against Rieke & Lebofsky's 0.365); the edge
# value there moves a coefficient by at most this share times the law's spread over the band
_WING_SHARE = 1e-3


def _law_on_grid(law, grid, rv, what, weights=None):
    """A/A_V on the integration grid; a LawRangeError names the band or curve.

    ``weights`` (normalised photon weights on the grid, one row per source) allow the law's
    edge value in a faint wing beyond its range: at most :data:`_WING_SHARE` of the weight.
    """
    lo, hi = law.wavelength_range.to_value(u.micron)
    if weights is not None:
        outside = (grid < lo * (1 - 1e-9)) | (grid > hi * (1 + 1e-9))
        if np.any(outside) and np.max(np.atleast_2d(weights)[:, outside].sum(axis=1)) <= _WING_SHARE:
            grid = np.clip(grid, lo, hi)
    try:
        return law.a_over_av(grid * u.micron, rv=rv)
    except LawRangeError as exc:
        covering = [
            name for name, other in _registered_laws().items()
            if other.wavelength_range[0].to_value(u.micron) <= grid[0] * (1 + 1e-9)
            and other.wavelength_range[1].to_value(u.micron) >= grid[-1] * (1 - 1e-9)
        ]
        hint = f"laws covering the whole curve: {', '.join(covering)}" if covering else str(exc)
        raise LawRangeError(
            f"The transmission curve of {what} spans {grid[0]:.4g}-{grid[-1]:.4g} micron, beyond the "
            f"range of the extinction law '{law.name}' ({law.title}, {lo:.4g}-{hi:.4g} micron). "
            f"Hint: {hint}."
        ) from None


def _registered_laws():
    from ..laws import LAWS

    return LAWS


def _source_flambda(grid, temperature, spectrum):
    if spectrum is None:
        return _blackbody_flambda(grid, float(temperature_input(temperature, DEFAULT_TEMPERATURE, 5)))
    try:
        lam_s, flux = spectrum
    except (TypeError, ValueError):
        raise param_error("spectrum", "a (wavelength, flux) pair", spectrum) from None
    lam_s_um = wavelength_micron(lam_s, "spectrum wavelength").ravel()
    if isinstance(flux, u.Quantity):
        try:
            f = flux.to_value(
                u.erg / u.s / u.cm**2 / u.AA, equivalencies=u.spectral_density(lam_s.ravel())
            )
        except u.UnitConversionError:
            raise param_error("spectrum", "a flux density (F_lambda or F_nu) Quantity", flux.unit) from None
    else:
        f = np.asarray(flux, dtype=float)
        warnings.warn(
            "The spectrum flux has no unit; taking it as F_lambda (per unit wavelength).",
            AssumptionWarning, stacklevel=3,
        )
    f = np.asarray(f, dtype=float).ravel()
    if f.size != lam_s_um.size:
        raise param_error("spectrum", "wavelength and flux of equal length", f"{lam_s_um.size} vs {f.size}")
    if not np.all(np.isfinite(f)) or np.any(f < 0):
        raise param_error("spectrum", "finite, non-negative fluxes", "negative or non-finite values")
    order = np.argsort(lam_s_um)
    lam_s_um, f = lam_s_um[order], f[order]
    if grid[0] < lam_s_um[0] * (1 - 1e-9) or grid[-1] > lam_s_um[-1] * (1 + 1e-9):
        raise param_error(
            "spectrum",
            f"a spectrum covering the passband ({grid[0]:.4g}-{grid[-1]:.4g} micron)",
            f"{lam_s_um[0]:.4g}-{lam_s_um[-1]:.4g} micron",
        )
    return np.interp(grid, lam_s_um, f)


# number of distinct A_V values above which A_band(A_V) is interpolated from a grid
_AV_EXACT_MAX = 4096
_AV_GRID = 4097


def passband_a_over_av(transmission, law=DEFAULT_LAW, rv=3.1, av=1.0, temperature=DEFAULT_TEMPERATURE,
                       spectrum=None, unit=u.AA, counting="photon", n_points=2000):
    """Passband-integrated band coefficient A_band / A_V, integrated exactly.

    A_band = -2.5 log10( int T lambda F_lambda 10^(-0.4 A_lambda) dlambda
                         / int T lambda F_lambda dlambda ),
    with A_lambda = A_V * (A/A_V)(lambda) from the law, and the result is
    A_band / A_V. :func:`dustkit.bands.a_band_over_av` gives the same for the
    registered bands from precomputed tables (much faster for many values).

    Parameters
    ----------
    transmission : tuple, str, path or Band
        Transmission curve, see :func:`read_transmission`. Throughput is taken as a
        photon-counting response (e.g. quantum efficiency times filter).
    law : str or Law, optional
    rv : float, optional
    av : float, array_like or Quantity['mag'], optional
        A_V value(s) at which to compute the coefficient; must be finite.
    temperature : Quantity['temperature'], optional
        Blackbody temperature of the source spectrum when ``spectrum`` is None.
        Default 5800 K (a Sun-like star, :data:`DEFAULT_TEMPERATURE`).
    spectrum : tuple, optional
        ``(wavelength Quantity, flux)`` of the source; flux a Quantity in F_lambda or
        F_nu units, or plain numbers taken as F_lambda. Must cover the passband.
    unit : Unit, optional
        Wavelength unit for a transmission file or bare wavelength numbers.
    counting : {"photon", "energy"}, optional
        Detector type: photon counting (weight lambda F_lambda, default) or energy
        (weight F_lambda).
    n_points : int, optional
        Number of points of the uniform integration grid (the curve's own points
        are added). A vertical step in the curve is smoothed over one grid cell.

    Returns
    -------
    float or ndarray
        A_band / A_V: a float for scalar ``av``, else an array of its shape. At
        A_V = 0 the limit (the weighted mean of A/A_V) is returned.

    Raises
    ------
    LawRangeError
        The passband extends beyond the law's wavelength range.

    Notes
    -----
    For more than 4096 distinct A_V values the result is interpolated linearly
    from 4097 exact values spanning the range (error far below 1e-6 mag per mag).
    Synthetic photometry with photon-counting detectors: Bessell & Murphy 2012
    (PASP 124, 140).
    """
    law = get_law(law)
    if counting not in ("photon", "energy"):
        raise param_error("counting", "'photon' or 'energy'", counting)
    if isinstance(n_points, bool) or not isinstance(n_points, (int, np.integer)) or not 10 <= n_points <= 10**6:
        raise param_error("n_points", "an integer in [10, 1000000]", n_points)
    rv = law.check_rv(rv)
    what = f"band {transmission.name!r}" if isinstance(transmission, Band) else "the passband"
    lam_t, thr = read_transmission(transmission, unit=unit)
    grid, t_grid, quad = _integration_grid(lam_t, thr, n_points)
    flux = _source_flambda(grid, temperature, spectrum)
    weight = t_grid * flux * (grid if counting == "photon" else 1.0)
    c = weight * quad
    total = c.sum()
    if not total > 0:
        raise param_error("transmission", "a passband where the source has flux", "zero integrated flux")
    c = c / total
    k = _law_on_grid(law, grid, rv, what, c)

    avs, _ = mag_input("av", av)
    if not np.all(np.isfinite(avs)):
        raise param_error("av", "finite A_V values", av)
    flat = avs.ravel()
    uniq, inverse = np.unique(flat, return_inverse=True)
    if uniq.size > _AV_EXACT_MAX:
        nodes = np.linspace(uniq[0], uniq[-1], _AV_GRID)
        ratio = np.interp(flat, nodes, _passband_ratio(nodes, k, c[None, :])[:, 0])
    else:
        ratio = _passband_ratio(uniq, k, c[None, :])[inverse.ravel(), 0]
    ratio = ratio.reshape(avs.shape)
    return float(ratio) if ratio.ndim == 0 else ratio


def _passband_ratio(avs, k, weights):
    """A_band/A_V for each A_V (rows) and each source (columns).

    ``k`` is A/A_V on the integration grid, ``weights`` (n_sources, n_grid) the
    normalised photon weights of each source on it.
    """
    avs = np.asarray(avs, dtype=float)
    out = np.empty((avs.size, weights.shape[0]))
    mean = weights @ k
    variance = weights @ k**2 - mean**2
    chunk = max(1, 2**22 // k.size)
    for start in range(0, avs.size, chunk):
        a = avs[start : start + chunk]
        r = np.empty((a.size, weights.shape[0]))
        small = np.abs(a) < 0.5
        with np.errstate(divide="ignore", invalid="ignore", under="ignore"):
            if np.any(small):
                # relative flux change, computed without cancellation for small A_V
                a_s = a[small]
                change = np.expm1(-_SCALE * a_s[:, None] * k[None, :]) @ weights.T
                r[small] = -np.log1p(change) / (_SCALE * a_s[:, None])
            if not np.all(small):
                # larger |A_V|: factor out the least-extincted part so the mean cannot underflow
                a_b = a[~small]
                ref = np.where(a_b > 0, k.min(), k.max())
                mean_exp = np.exp(-_SCALE * a_b[:, None] * (k[None, :] - ref[:, None])) @ weights.T
                r[~small] = ref[:, None] - np.log(mean_exp) / (_SCALE * a_b[:, None])
        # tiny A_V: cumulant expansion, -ln <exp(-s a k)> / (s a) = <k> - s a Var(k) / 2 + O(a^2)
        series = mean[None, :] - 0.5 * _SCALE * a[:, None] * variance[None, :]
        out[start : start + chunk] = np.where(np.abs(a)[:, None] < 1e-5, series, r)
    return out


@functools.lru_cache(maxsize=256)
def _band_weights(band):
    """Integration grid and normalised blackbody photon weights at every grid temperature."""
    lam_t, thr = read_transmission(band)
    grid, t_grid, quad = _integration_grid(lam_t, thr, _N_POINTS)
    flux = _blackbody_flambda(grid[None, :], GRID_TEMPERATURES[:, None])
    weights = t_grid[None, :] * flux * grid[None, :] * quad[None, :]
    weights /= weights.sum(axis=1, keepdims=True)
    grid.flags.writeable = False
    weights.flags.writeable = False
    return grid, weights


@functools.lru_cache(maxsize=2048)
def coefficient_table(law, band, rv):
    """Table of A_band/A_V of a band with a curve, for blackbody sources.

    Parameters
    ----------
    law : Law
    band : Band
        A band with a transmission curve.
    rv : float
        A checked R_V of ``law``.

    Returns
    -------
    ndarray, shape (len(GRID_AV), len(GRID_TEMPERATURES))
        A_band/A_V at every (A_V, temperature) node; read-only.
    """
    grid, weights = _band_weights(band)
    k = _law_on_grid(law, grid, rv, f"band {band.name!r}", weights)
    table = _passband_ratio(GRID_AV, k, weights)
    table.flags.writeable = False
    return table


@functools.lru_cache(maxsize=256)
def _colour_curve(blue, red):
    """Synthetic colour blue - red of the grid's blackbodies, zero for a 9600 K blackbody."""
    values = []
    for band in (blue, red):
        grid, _ = _band_weights(band)
        lam_t, thr = read_transmission(band)
        t_grid = np.interp(grid, lam_t, thr)
        quad = np.gradient(grid)
        temps = np.append(GRID_TEMPERATURES, 9600.0)
        flux = (_blackbody_flambda(grid[None, :], temps[:, None]) * t_grid * grid * quad).sum(axis=1)
        values.append(-2.5 * np.log10(flux / (t_grid * grid * quad).sum()))
    colour = values[0] - values[1]
    colour = colour[:-1] - colour[-1]
    colour.flags.writeable = False
    return colour


def blackbody_colour(temperature, blue, red):
    """Synthetic colour blue - red (mag) of a blackbody, on a Vega-like zero point.

    The zero point puts the colour of a 9600 K blackbody (a stand-in for Vega, an
    A0 V star) at 0 in every colour, so colours are roughly on the Vega system
    used by Johnson-Cousins, 2MASS and Gaia magnitudes.

    Parameters
    ----------
    temperature : Quantity['temperature'] or array
    blue, red : str or Band
        Two bands with transmission curves.

    Returns
    -------
    ndarray
        Colour in mag (interpolated from the coefficient grid's temperatures).
    """
    from .registry import get_band

    t = temperature_input(temperature, DEFAULT_TEMPERATURE)
    blue, red = get_band(blue), get_band(red)
    for band in (blue, red):
        if not band.has_curve:
            raise param_error("band", "a band with a transmission curve for a synthetic colour", band.name)
    colour = _colour_curve(blue, red)
    return np.interp(np.log(t), np.log(GRID_TEMPERATURES), colour)


def colour_temperature(colour, blue, red):
    """Blackbody temperature whose synthetic colour equals an intrinsic colour.

    Use it to turn a catalogue's intrinsic colour (e.g. (BP-RP)_0) into the
    ``temperature`` of the band conversions: the blackbody then has the star's
    spectral slope across the bands, which is what sets a broad band's coefficient.

    Parameters
    ----------
    colour : float, array_like or Quantity['mag']
        Intrinsic (unreddened) colour blue - red, Vega-like magnitudes.
    blue, red : str or Band
        Two bands with transmission curves, e.g. ``"BP", "RP"``.

    Returns
    -------
    Quantity['temperature']
        Same shape as ``colour``. Colours beyond those of 2 000 K or 100 000 K
        blackbodies are refused.

    Notes
    -----
    A blackbody is not a star: a colour temperature is lower than the effective
    temperature for cool stars (an M0 dwarf, (BP-RP)_0 = 2.0, T_eff about 3 900 K,
    has the BP-RP of a 3 000 K blackbody) and has no Balmer jump. Zero point: a
    9600 K blackbody has colour 0 (see :func:`blackbody_colour`).
    """
    from .registry import get_band

    c, _ = mag_input("colour", colour)
    blue, red = get_band(blue), get_band(red)
    for band in (blue, red):
        if not band.has_curve:
            raise param_error("band", "a band with a transmission curve for a colour temperature", band.name)
    curve = _colour_curve(blue, red)  # decreasing with temperature
    lo, hi = float(curve.min()), float(curve.max())
    bad = ~np.isfinite(c) | (c < lo) | (c > hi)
    if np.any(bad):
        first = float(c[bad].ravel()[0]) if c.ndim else float(c)
        raise param_error(
            "colour",
            f"an intrinsic {blue.name}-{red.name} colour between {lo:.3f} and {hi:.3f} mag (blackbodies of "
            f"{TEMPERATURE_RANGE[1]:g}-{TEMPERATURE_RANGE[0]:g} K); {int(np.count_nonzero(bad))} value(s) outside",
            first,
        )
    order = np.argsort(curve)
    log_t = np.interp(c, curve[order], np.log(GRID_TEMPERATURES)[order])
    return np.exp(log_t) * u.K


@dataclass(frozen=True)
class StarTemperatures:
    """Per-row source temperatures for the band conversions (see :func:`star_temperatures`).

    Attributes
    ----------
    temperature : Quantity['temperature']
        One blackbody temperature per row, inside the tables' range.
    from_input : ndarray of bool
        True where the row's own temperature or colour was used.
    n_default : int
        Rows given the default temperature (missing value, or no column at all).
    n_clipped : int
        Rows whose temperature or colour lay beyond the tables' range and were set to its edge.
    source : str
        What the temperatures come from, for reports (e.g. ``"(BP-RP)_0 colour temperature"``).
    """

    temperature: u.Quantity
    from_input: np.ndarray
    n_default: int
    n_clipped: int
    source: str


def star_temperatures(n_rows, *, temperature=None, colour=None, colour_bands=None, default=DEFAULT_TEMPERATURE):
    """Per-row blackbody temperatures from a catalogue's temperature or intrinsic-colour column.

    This is the one call ingestion needs before a passband conversion: rows with a
    finite value use it, missing values get ``default`` (and are counted so that the
    caller can announce them), values beyond the tables' range (2 000-100 000 K) are
    set to the nearest edge and counted.

    Parameters
    ----------
    n_rows : int
        Number of rows.
    temperature : Quantity['temperature'] or array_like, optional
        Effective or colour temperature per row (bare numbers: kelvin). NaN = missing.
    colour : float array or Quantity['mag'], optional
        Intrinsic colour per row (instead of ``temperature``); NaN = missing.
    colour_bands : (str, str), optional
        The colour's bands, e.g. ``("BP", "RP")``; required with ``colour``.
    default : Quantity['temperature'], optional
        Temperature of rows without a value (default :data:`DEFAULT_TEMPERATURE`).

    Returns
    -------
    StarTemperatures
    """
    from .registry import get_band

    if isinstance(n_rows, bool) or not isinstance(n_rows, (int, np.integer)) or n_rows < 0:
        raise param_error("n_rows", "a non-negative integer", n_rows)
    t_default = float(temperature_input(default, DEFAULT_TEMPERATURE))
    lo, hi = TEMPERATURE_RANGE
    if temperature is not None and colour is not None:
        raise param_error("colour", "None when a temperature is given (give one of the two)", "both")
    if temperature is None and colour is None:
        t = np.full(n_rows, t_default)
        return StarTemperatures(t * u.K, np.zeros(n_rows, bool), n_rows, 0,
                                f"default {t_default:g} K blackbody")
    if temperature is not None:
        if isinstance(temperature, u.Quantity):
            try:
                values = np.asarray(temperature.to_value(u.K, equivalencies=u.temperature()), dtype=float)
            except u.UnitConversionError:
                raise param_error("temperature", "a temperature (e.g. 5800 * u.K)", temperature.unit) from None
        else:
            values = np.asarray(temperature, dtype=float)
        values = np.broadcast_to(values, (n_rows,)).copy()
        ok = np.isfinite(values) & (values > 0)
        clipped = ok & ((values < lo) | (values > hi))
        values = np.clip(values, lo, hi)
        source = "temperature column"
    else:
        if colour_bands is None or len(colour_bands) != 2:
            raise param_error("colour_bands", "the colour's two bands, e.g. ('BP', 'RP')", colour_bands)
        blue, red = get_band(colour_bands[0]), get_band(colour_bands[1])
        c, _ = mag_input("colour", colour)
        c = np.broadcast_to(c, (n_rows,)).copy()
        ok = np.isfinite(c)
        curve = _colour_curve(blue, red)
        clipped = ok & ((c < curve.min()) | (c > curve.max()))
        values = np.full(n_rows, np.nan)
        if np.any(ok):
            values[ok] = colour_temperature(np.clip(c[ok], curve.min(), curve.max()), blue, red).to_value(u.K)
        source = f"({blue.name}-{red.name})_0 colour temperature"
    values = np.where(ok, values, t_default)
    return StarTemperatures(values * u.K, ok, int(np.count_nonzero(~ok)), int(np.count_nonzero(clipped)), source)
