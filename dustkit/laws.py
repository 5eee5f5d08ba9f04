"""Registry of interstellar extinction laws.

Every law gives the ratio A(lambda)/A_V as a function of wavelength (and, for most
laws, of R_V = A_V / E(B-V)). Each law declares once its short name, its citation,
its valid wavelength range and its valid R_V range; asking for anything outside
those ranges raises :class:`~dustkit.exceptions.LawRangeError` naming the law, the
value and the valid range.

The curves of the published R_V-dependent laws come from the ``dust_extinction``
package (the curve engine); dustkit adds the registry, the range checks and the
unit handling. The fixed-R_V near-infrared law of Rieke & Lebofsky (1985) is
implemented here from the published table by interpolation in log-log.

Adding a law is one class (subclass :class:`Law`, declare the attributes and
write ``_curve``) plus one entry in :data:`LAWS`.

Examples
--------
>>> import astropy.units as u
>>> from dustkit.laws import get_law
>>> law = get_law("ccm89")
>>> round(float(law.a_over_av(0.55 * u.micron, rv=3.1)), 3)
0.999

Notes
-----
Extinction curves are averages over many sight lines; individual sight lines
differ, especially in the ultraviolet. Treat converted values as statistical
estimates and check them against local data before using them for science or
for planning instrument time.
"""

import functools
import numbers

import numpy as np
from astropy import units as u
from astropy.table import QTable

from .exceptions import LawRangeError, ParameterError
from ._lib.validation import param_error

__all__ = [
    "Law",
    "CCM89",
    "ODonnell94",
    "Fitzpatrick99",
    "Gordon23",
    "RiekeLebofsky85",
    "LAWS",
    "DEFAULT_LAW",
    "get_law",
    "list_laws",
    "wavelength_micron",
]

#: Short name of the law used when none is given.
DEFAULT_LAW = "ccm89"

# relative slack on range edges, so that a value printed at the edge of a range
# (e.g. 1/0.3 micron) is not rejected for a rounding error
_EDGE_RTOL = 1e-9


def _fmt(x):
    return f"{x:.4g}"


def wavelength_micron(wavelength, name="wavelength"):
    """Convert a spectral Quantity (wavelength, wavenumber, frequency, energy) to micron.

    Parameters
    ----------
    wavelength : Quantity
        Any spectral unit (length, wavenumber such as 1/micron, frequency, energy).
    name : str, optional
        Parameter name used in the error message.

    Returns
    -------
    ndarray
        Wavelengths in micron, plain floats, same shape as the input.

    Raises
    ------
    ParameterError
        Not a spectral Quantity, or a value that is not finite and positive.
    """
    if not isinstance(wavelength, u.Quantity):
        raise param_error(
            name,
            "an astropy Quantity with a spectral unit (e.g. 0.55 * u.micron, 5500 * u.AA "
            "or 1.82 / u.micron)",
            wavelength,
        )
    try:
        lam = wavelength.to_value(u.micron, equivalencies=u.spectral())
    except u.UnitConversionError:
        raise param_error(
            name, "a Quantity with a spectral unit (length, wavenumber, frequency or energy)", wavelength
        ) from None
    lam = np.asarray(lam, dtype=float)
    bad = ~np.isfinite(lam) | (lam <= 0)
    if np.any(bad):
        first = wavelength.ravel()[np.flatnonzero(bad.ravel())[0]] if wavelength.ndim else wavelength
        raise param_error(name, "finite and positive", first)
    return lam


class Law:
    """An extinction law: A(lambda)/A_V as a function of wavelength and R_V.

    Subclasses declare the class attributes below and implement
    ``_curve(lam_micron, rv)``, which receives wavelengths (plain float array, micron,
    already checked to lie in range) and a checked R_V, and returns A(lambda)/A_V.

    Attributes
    ----------
    name : str
        Short registry key, lower case (e.g. ``"ccm89"``).
    title : str
        Human-readable name of the law.
    citation : str
        The paper the law comes from.
    wavelength_range : Quantity['length']
        Two values, in micron: shortest and longest valid wavelength.
    rv_range : tuple of float
        Smallest and largest valid R_V. A law with a fixed R_V has
        ``rv_range == (rv, rv)``.
    rv_default : float
        R_V used when ``rv=None`` is passed.
    rv_tolerance : float
        For fixed-R_V laws only: requested R_V values within this distance of the
        fixed value are accepted (the curve does not change). Zero otherwise.
    engine : str
        Where the curve values come from.
    """

    name = ""
    title = ""
    citation = ""
    wavelength_range = (0.0, 0.0) * u.micron
    rv_range = (3.1, 3.1)
    rv_default = 3.1
    rv_tolerance = 0.0
    engine = ""
    notes = ""

    # ----------------------------------------------------------------- properties
    @property
    def rv_fixed(self):
        """True when the law is defined for a single R_V only."""
        return self.rv_range[0] == self.rv_range[1]

    def __repr__(self):
        lo, hi = self.wavelength_range.to_value(u.micron)
        if self.rv_fixed:
            rv_text = f"fixed R_V={self.rv_range[0]:g}"
        else:
            rv_text = f"R_V {self.rv_range[0]:g}-{self.rv_range[1]:g}"
        return f"<Law {self.name!r}: {self.title}; {rv_text}; {_fmt(lo)}-{_fmt(hi)} micron>"

    # -------------------------------------------------------------------- checks
    def check_rv(self, rv):
        """Return ``rv`` as a float if this law accepts it, else raise.

        Parameters
        ----------
        rv : float or None
            Ratio of total to selective extinction, A_V / E(B-V). ``None`` means the
            law's default (:attr:`rv_default`).

        Returns
        -------
        float

        Raises
        ------
        ParameterError
            ``rv`` is not a finite real number.
        LawRangeError
            ``rv`` is outside the law's valid range.
        """
        if rv is None:
            return float(self.rv_default)
        if isinstance(rv, u.Quantity):
            if rv.unit.physical_type != "dimensionless":
                raise param_error("rv", "a dimensionless number", rv)
            rv = rv.to_value(u.dimensionless_unscaled)
        if isinstance(rv, np.ndarray) and rv.ndim == 0:
            rv = rv.item()
        if isinstance(rv, bool) or not isinstance(rv, (numbers.Real, np.floating, np.integer)):
            raise param_error("rv", "a single real number (R_V = A_V / E(B-V), e.g. 3.1)", rv)
        value = float(rv)
        if not np.isfinite(value):
            raise param_error("rv", "a finite real number (R_V = A_V / E(B-V), e.g. 3.1)", rv)
        lo, hi = self.rv_range
        slack = self.rv_tolerance + _EDGE_RTOL * max(abs(lo), abs(hi))
        if value < lo - slack or value > hi + slack:
            if self.rv_fixed:
                rng = f"a fixed R_V = {lo:g}"
                if self.rv_tolerance:
                    rng += f" (values within +-{self.rv_tolerance:g} are accepted)"
                hint = "choose an R_V-dependent law (see list_laws()) for other R_V values"
            else:
                rng = f"R_V in [{lo:g}, {hi:g}]"
                others = [
                    k for k, law in LAWS.items()
                    if k != self.name and law.rv_range[0] <= value <= law.rv_range[1]
                ]
                hint = (
                    f"laws valid at R_V = {value:g}: {', '.join(others)}"
                    if others
                    else "no registered law covers this R_V"
                )
            raise LawRangeError(
                f"The extinction law '{self.name}' ({self.title}) is valid for {rng}. "
                f"Got R_V = {value:g} instead. Hint: {hint}."
            )
        if self.rv_fixed:
            return float(lo)
        return float(min(max(value, lo), hi))

    def check_wavelength(self, wavelength):
        """Return wavelengths in micron (float ndarray) if all lie in the valid range.

        Parameters
        ----------
        wavelength : Quantity
            Wavelength, wavenumber, frequency or photon energy (any spectral unit).

        Returns
        -------
        ndarray
            Wavelengths in micron, same shape as the input.

        Raises
        ------
        ParameterError
            Not a spectral Quantity, or not finite and positive.
        LawRangeError
            Some value lies outside the law's wavelength range.
        """
        lam = wavelength_micron(wavelength)
        lo, hi = self.wavelength_range.to_value(u.micron)
        outside = (lam < lo * (1 - _EDGE_RTOL)) | (lam > hi * (1 + _EDGE_RTOL))
        if np.any(outside):
            bad = lam[outside] if lam.ndim else lam
            worst = float(np.min(bad)) if np.min(bad) < lo else float(np.max(bad))
            others = [
                k for k, law in LAWS.items()
                if k != self.name
                and law.wavelength_range[0].to_value(u.micron) <= worst
                <= law.wavelength_range[1].to_value(u.micron)
            ]
            hint = (
                f"laws covering {_fmt(worst)} micron: {', '.join(others)}"
                if others
                else "no registered law covers this wavelength"
            )
            n_bad = int(np.count_nonzero(outside))
            count = f" ({n_bad} of {lam.size} values outside)" if lam.size > 1 else ""
            raise LawRangeError(
                f"The extinction law '{self.name}' ({self.title}) is valid for wavelengths "
                f"{_fmt(lo)}-{_fmt(hi)} micron (x = {_fmt(1 / hi)}-{_fmt(1 / lo)} 1/micron). "
                f"Got {_fmt(worst)} micron (x = {_fmt(1 / worst)} 1/micron) instead{count}. "
                f"Hint: {hint}."
            )
        return np.clip(lam, lo, hi)

    # ---------------------------------------------------------------- evaluation
    def a_over_av(self, wavelength, rv=3.1):
        """Extinction at ``wavelength`` relative to A_V.

        Parameters
        ----------
        wavelength : Quantity
            Wavelength(s) in any spectral unit (length, wavenumber such as 1/micron,
            frequency, energy), scalar or array.
        rv : float or None, optional
            R_V = A_V / E(B-V). ``None`` means the law's default R_V. For a law with a
            fixed R_V, values within :attr:`rv_tolerance` of it are accepted.

        Returns
        -------
        ndarray
            A(lambda)/A_V, plain floats, same shape as ``wavelength`` (0-d for a
            scalar).

        Raises
        ------
        LawRangeError
            ``rv`` or a wavelength is outside the law's valid range.
        """
        rv = self.check_rv(rv)
        lam = self.check_wavelength(wavelength)
        flat = np.atleast_1d(lam).ravel()
        out = np.asarray(self._curve(flat, rv), dtype=float)
        return out.reshape(np.shape(lam))

    def _curve(self, lam_micron, rv):  # pragma: no cover - abstract
        raise NotImplementedError


@functools.lru_cache(maxsize=256)
def _engine_model(model_name, rv):
    """One cached dust_extinction model instance per (law, R_V)."""
    from dust_extinction import parameter_averages

    return getattr(parameter_averages, model_name)(Rv=rv)


class _DustExtinctionLaw(Law):
    """A law whose curve comes from a ``dust_extinction.parameter_averages`` model."""

    _model_name = ""
    engine = "dust_extinction"

    def _curve(self, lam_micron, rv):
        model = _engine_model(self._model_name, rv)
        x = 1.0 / lam_micron
        # the engine checks x against its own range; clip rounding-level excursions
        lo, hi = model.x_range
        return np.asarray(model(np.clip(x, lo, hi) / u.micron), dtype=float)


def _range_from_x(x_lo, x_hi):
    return np.array([1.0 / x_hi, 1.0 / x_lo]) * u.micron


class CCM89(_DustExtinctionLaw):
    """Cardelli, Clayton & Mathis (1989) R_V-dependent Milky Way extinction law.

    Notes
    -----
    Cardelli, J. A., Clayton, G. C. & Mathis, J. S. 1989, ApJ 345, 245. Valid for
    x = 0.3-10 1/micron and R_V = 2-6 (the range of the engine's implementation).
    By construction A(x=2.27)/A(x=1.82) = 1 + 1/R_V.
    """

    name = "ccm89"
    title = "Cardelli, Clayton & Mathis 1989"
    citation = "Cardelli, J. A., Clayton, G. C. & Mathis, J. S. 1989, ApJ 345, 245"
    wavelength_range = _range_from_x(0.3, 10.0)
    rv_range = (2.0, 6.0)
    _model_name = "CCM89"


class ODonnell94(_DustExtinctionLaw):
    """O'Donnell (1994): CCM89 with revised optical coefficients.

    Notes
    -----
    O'Donnell, J. E. 1994, ApJ 422, 158. Same form as CCM89 with new coefficients
    for 1.1 <= x < 3.3 1/micron; CCM89 elsewhere.
    """

    name = "odonnell94"
    title = "O'Donnell 1994"
    citation = "O'Donnell, J. E. 1994, ApJ 422, 158"
    wavelength_range = _range_from_x(0.3, 10.0)
    rv_range = (2.0, 6.0)
    _model_name = "O94"


class Fitzpatrick99(_DustExtinctionLaw):
    """Fitzpatrick (1999) R_V-dependent Milky Way extinction law.

    Notes
    -----
    Fitzpatrick, E. L. 1999, PASP 111, 63. R_V here refers to broad-band
    photometry, so the monochromatic value at 0.55 micron is about 0.98, not 1.
    """

    name = "fitzpatrick99"
    title = "Fitzpatrick 1999"
    citation = "Fitzpatrick, E. L. 1999, PASP 111, 63"
    wavelength_range = _range_from_x(0.3, 10.0)
    rv_range = (2.0, 6.0)
    _model_name = "F99"


class Gordon23(_DustExtinctionLaw):
    """Gordon et al. (2023) Milky Way R_V-dependent average, far-UV to mid-IR.

    Notes
    -----
    Gordon, K. D., Fitzpatrick, E. L., Massa, D. et al. 2023, ApJ 950, 86
    (``G23`` in dust_extinction). Valid from 0.0912 to 32 micron and R_V = 2.3-5.6.
    """

    name = "gordon23"
    title = "Gordon et al. 2023"
    citation = "Gordon, K. D., Fitzpatrick, E. L., Massa, D., et al. 2023, ApJ 950, 86"
    wavelength_range = _range_from_x(1.0 / 32.0, 1.0 / 0.0912)
    rv_range = (2.3, 5.6)
    _model_name = "G23"


class RiekeLebofsky85(Law):
    """Rieke & Lebofsky (1985) fixed-R_V extinction law (optical to 4.8 micron).

    Interpolated in log(A/A_V) versus log(lambda) between the band values of the
    paper's Table 3; valid only between the first and last tabulated band
    (U at 0.365 micron to M at 4.8 micron). R_V is fixed at 3.09.

    Notes
    -----
    Rieke, G. H. & Lebofsky, M. J. 1985, ApJ 288, 618, Table 3 (A_lambda/A_V).
    The J, H, K, L, M values are the paper's; V = 1 by definition; B = 1.324
    equals 1 + 1/R_V for R_V = 3.09; U, R and I are recalled from the same table
    (from memory). The tolerance on R_V (3.09 +- 0.03) is the paper's quoted
    uncertainty (from memory): requests within it get the same curve.
    """

    name = "rieke85"
    title = "Rieke & Lebofsky 1985"
    citation = "Rieke, G. H. & Lebofsky, M. J. 1985, ApJ 288, 618 (Table 3)"
    engine = "dustkit (log-log interpolation of the published table)"
    rv_range = (3.09, 3.09)
    rv_default = 3.09
    rv_tolerance = 0.03
    notes = "fixed R_V = 3.09"

    # Rieke & Lebofsky 1985, Table 3: band, wavelength [micron], A_lambda / A_V
    _TABLE = (
        ("U", 0.365, 1.531),  # from memory
        ("B", 0.44, 1.324),  # = 1 + 1/3.09
        ("V", 0.55, 1.000),  # definition
        ("R", 0.70, 0.748),  # from memory
        ("I", 0.90, 0.482),  # from memory
        ("J", 1.25, 0.282),
        ("H", 1.65, 0.175),
        ("K", 2.22, 0.112),
        ("L", 3.5, 0.058),
        ("M", 4.8, 0.023),
    )
    _log_lam = np.log(np.array([row[1] for row in _TABLE]))
    _log_ratio = np.log(np.array([row[2] for row in _TABLE]))
    wavelength_range = np.array([_TABLE[0][1], _TABLE[-1][1]]) * u.micron

    def _curve(self, lam_micron, rv):
        return np.exp(np.interp(np.log(lam_micron), self._log_lam, self._log_ratio))


#: Registry of extinction laws: short name -> :class:`Law` instance.
LAWS = {
    law.name: law
    for law in (CCM89(), ODonnell94(), Fitzpatrick99(), Gordon23(), RiekeLebofsky85())
}


def get_law(name=None):
    """Look up an extinction law by its short name (case-insensitive).

    Parameters
    ----------
    name : str, Law or None
        Registry key such as ``"ccm89"``; a :class:`Law` is returned unchanged;
        ``None`` gives the default law (:data:`DEFAULT_LAW`).

    Returns
    -------
    Law

    Raises
    ------
    ParameterError
        Unknown name; the message lists the available names.
    """
    if name is None:
        name = DEFAULT_LAW
    if isinstance(name, Law):
        return name
    if isinstance(name, str):
        key = name.strip().lower()
        if key in LAWS:
            return LAWS[key]
    raise ParameterError(
        f"The 'law' parameter must be one of {', '.join(repr(k) for k in LAWS)}. "
        f"Got {name!r} instead. Hint: list_laws() shows each law's citation and ranges."
    )


def list_laws():
    """Table of the registered extinction laws.

    Returns
    -------
    QTable
        Columns ``name``, ``title``, ``citation``, ``rv_min``, ``rv_max``,
        ``wavelength_min`` and ``wavelength_max`` (micron), ``notes``. Fixed-R_V
        laws have ``rv_min == rv_max`` and say so in ``notes``.
    """
    laws = list(LAWS.values())
    table = QTable()
    table["name"] = [law.name for law in laws]
    table["title"] = [law.title for law in laws]
    table["citation"] = [law.citation for law in laws]
    table["rv_min"] = np.array([law.rv_range[0] for law in laws], dtype=float)
    table["rv_max"] = np.array([law.rv_range[1] for law in laws], dtype=float)
    table["wavelength_min"] = u.Quantity([law.wavelength_range[0] for law in laws]).to(u.micron)
    table["wavelength_max"] = u.Quantity([law.wavelength_range[1] for law in laws]).to(u.micron)
    table["notes"] = [
        (f"fixed R_V = {law.rv_range[0]:g}" if law.rv_fixed else "R_V-dependent")
        + ("" if law.name != DEFAULT_LAW else "; default")
        for law in laws
    ]
    table.meta["description"] = "Extinction laws available in dustkit (A(lambda)/A_V)."
    return table
