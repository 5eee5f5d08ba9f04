"""The band registry: photometric bands, their transmission curves and their names.

Built-in bands carry the transmission curves shipped by the ``speclite`` package
(Bessell 1990 Johnson-Cousins UBVRI, 2MASS JHKs, Gaia (E)DR3 G/BP/RP -- the default
``G``, ``BP``, ``RP`` -- and Gaia DR2 ``G_DR2``, ``BP_DR2``, ``RP_DR2``, SDSS, Pan-STARRS1,
WISE). Bands without a curve (Johnson R, I and K, and bands added by wavelength
only) use the law at their effective wavelength.
"""

import functools
import re
from dataclasses import dataclass, field

import numpy as np
from astropy import units as u

from ..exceptions import ParameterError
from .._lib.validation import param_error
from ..laws import wavelength_micron

__all__ = [
    "Band",
    "get_band",
    "add_band",
    "remove_band",
    "registered_bands",
    "band_candidates",
    "parse_excess_name",
]


@dataclass(frozen=True, eq=False)
class Band:
    """A photometric band.

    Parameters
    ----------
    name : str
        Canonical name, case-sensitive (``"U"`` is Johnson U, ``"u"`` is SDSS u).
    wavelength : Quantity['length']
        Nominal effective wavelength (stored in micron): the value used for a band
        without a transmission curve, and the one quoted by the system's literature.
    source : str
        Where the nominal wavelength comes from.
    system : str
        Photometric system (``"Johnson"``, ``"Cousins"``, ``"2MASS"``, ``"Gaia"``, ...).
    aliases : tuple of str
        Other spellings accepted by :func:`get_band`.
    transmission : tuple or None
        A user-supplied ``(wavelength Quantity, throughput ndarray)`` curve.
    builtin : bool
        True for the bands dustkit ships.
    curve_source : str
        Where the transmission curve comes from (empty when there is none).
    curve_file : str or None
        Name of the ``speclite`` filter holding the built-in curve (e.g. ``"gaiadr3-G"``).
    local_name : str
        The band's name inside its system, used with a system prefix
        (``"Johnson R"`` is ``RJ``; defaults to ``name``).
    """

    name: str
    wavelength: u.Quantity
    source: str
    system: str = ""
    aliases: tuple = ()
    transmission: tuple = field(default=None, repr=False)
    builtin: bool = field(default=False, repr=False)
    curve_source: str = ""
    curve_file: str = field(default=None, repr=False)
    local_name: str = ""

    def __str__(self):
        return f"{self.name} ({self.wavelength.to_value(u.micron):.4g} micron)"

    @property
    def has_curve(self):
        """True when the band has a transmission curve (passband-integrated coefficients)."""
        return self.transmission is not None or self.curve_file is not None

    def curve(self):
        """The transmission curve as ``(wavelength [micron], throughput)`` plain arrays, or None.

        Throughputs are photon-counting responses (speclite's convention).
        """
        if self.curve_file is not None:
            return _speclite_curve(self.curve_file)
        if self.transmission is not None:
            lam, thr = self.transmission
            lam = wavelength_micron(lam, "transmission wavelength") if isinstance(lam, u.Quantity) else lam
            return np.asarray(lam, dtype=float), np.asarray(thr, dtype=float)
        return None


@functools.lru_cache(maxsize=None)
def _speclite_curve(curve_file):
    """(wavelength [micron], response) of a speclite filter, read once."""
    from speclite import filters

    response = filters.load_filter(curve_file)
    lam = np.asarray(response.wavelength, dtype=float) * 1e-4  # speclite stores Angstrom
    thr = np.asarray(response.response, dtype=float)
    lam.flags.writeable = False
    thr.flags.writeable = False
    return lam, thr


_CCM_TABLE3 = "the x of Cardelli, Clayton & Mathis 1989 Table 3"
_BESSELL = "Bessell 1990 (PASP 102, 1181) standard {} passband, speclite '{}'"
_TWOMASS = "2MASS relative spectral response (Cohen, Wheaton & Megeath 2003, AJ 126, 1090), speclite '{}'"
_GAIA = "Gaia EDR3/DR3 passband (ESA, Riello et al. 2021), speclite '{}'"
_GAIA2 = "Gaia DR2 passband (ESA, released with DR2; Evans et al. 2018, A&A 616, A4), speclite '{}'"
_SDSS = "SDSS 2.5 m response at airmass 1.3 (Doi et al. 2010, AJ 139, 1628), speclite '{}'"
_PS1 = "Pan-STARRS1 response (Tonry et al. 2012, ApJ 750, 99), speclite '{}'"
_WISE = "WISE relative spectral response (Wright et al. 2010, AJ 140, 1868), speclite '{}'"

_STANDARD_BANDS = (
    # name, wavelength [micron], system, aliases, source of the wavelength, speclite curve, curve source,
    # local name
    ("U", 1 / 2.78, "Johnson", ("U_J",), f"Johnson 1966: 0.36 micron; here 1/2.78 micron, {_CCM_TABLE3}",
     "bessell-U", _BESSELL.format("Johnson U", "bessell-U"), "U"),
    ("B", 1 / 2.27, "Johnson", ("B_J",), f"Johnson 1966: 0.44 micron; here 1/2.27 micron, {_CCM_TABLE3}",
     "bessell-B", _BESSELL.format("Johnson B", "bessell-B"), "B"),
    ("V", 1 / 1.82, "Johnson", ("V_J",), f"Johnson 1966: 0.55 micron; here 1/1.82 micron, {_CCM_TABLE3}",
     "bessell-V", _BESSELL.format("Johnson V", "bessell-V"), "V"),
    ("R", 0.64, "Cousins", ("Rc", "R_C", "R_c", "RC"), "Cousins Rc: Bessell 1979",
     "bessell-R", _BESSELL.format("Cousins R", "bessell-R"), "R"),
    ("I", 0.79, "Cousins", ("Ic", "I_C", "I_c", "IC"), "Cousins Ic: Bessell 1979",
     "bessell-I", _BESSELL.format("Cousins I", "bessell-I"), "I"),
    ("RJ", 0.70, "Johnson", ("R_J",), "Johnson 1966: 0.70 micron (the R of Rieke & Lebofsky 1985)",
     None, "", "R"),
    ("IJ", 0.90, "Johnson", ("I_J",), "Johnson 1966: 0.90 micron (the I of Rieke & Lebofsky 1985)",
     None, "", "I"),
    ("K", 2.2, "Johnson", ("K_J",), "Johnson 1966", None, "", "K"),
    ("J", 1.25, "2MASS", ("J_2MASS",), "2MASS catalogue description (Johnson 1966 J: 1.25 micron)",
     "twomass-J", _TWOMASS.format("twomass-J"), "J"),
    ("H", 1.65, "2MASS", ("H_2MASS",), "2MASS catalogue description",
     "twomass-H", _TWOMASS.format("twomass-H"), "H"),
    ("Ks", 2.17, "2MASS", ("K_s", "Ks_2MASS"), "2MASS catalogue description",
     "twomass-Ks", _TWOMASS.format("twomass-Ks"), "Ks"),
    ("G", 0.62, "Gaia", ("G_Gaia",), "from memory (Gaia G; very broad band)",
     "gaiadr3-G", _GAIA.format("gaiadr3-G"), "G"),
    ("BP", 0.51, "Gaia", ("G_BP", "GBP", "Gbp", "G_bp", "BP_Gaia"), "from memory (Gaia BP; broad band)",
     "gaiadr3-BP", _GAIA.format("gaiadr3-BP"), "BP"),
    ("RP", 0.78, "Gaia", ("G_RP", "GRP", "Grp", "G_rp", "RP_Gaia"), "from memory (Gaia RP; broad band)",
     "gaiadr3-RP", _GAIA.format("gaiadr3-RP"), "RP"),
    # Gaia DR2 passbands, for DR2 photometry; G, BP, RP above are the (E)DR3 ones (the default)
    ("G_DR2", 0.62, "Gaia DR2", ("GDR2", "G_Gaia2"), "from memory (Gaia DR2 G; very broad band)",
     "gaiadr2-G", _GAIA2.format("gaiadr2-G"), "G"),
    ("BP_DR2", 0.51, "Gaia DR2", ("BPDR2", "BP_Gaia2"), "from memory (Gaia DR2 BP; broad band)",
     "gaiadr2-BP", _GAIA2.format("gaiadr2-BP"), "BP"),
    ("RP_DR2", 0.78, "Gaia DR2", ("RPDR2", "RP_Gaia2"), "from memory (Gaia DR2 RP; broad band)",
     "gaiadr2-RP", _GAIA2.format("gaiadr2-RP"), "RP"),
    ("u", 0.3551, "SDSS", ("u'", "u_SDSS"), "from memory (SDSS; Fukugita et al. 1996)",
     "sdss2010-u", _SDSS.format("sdss2010-u"), "u"),
    ("g", 0.4686, "SDSS", ("g'", "g_SDSS"), "from memory (SDSS; Fukugita et al. 1996)",
     "sdss2010-g", _SDSS.format("sdss2010-g"), "g"),
    ("r", 0.6165, "SDSS", ("r'", "r_SDSS"), "from memory (SDSS; Fukugita et al. 1996)",
     "sdss2010-r", _SDSS.format("sdss2010-r"), "r"),
    ("i", 0.7481, "SDSS", ("i'", "i_SDSS"), "from memory (SDSS; Fukugita et al. 1996)",
     "sdss2010-i", _SDSS.format("sdss2010-i"), "i"),
    ("z", 0.8931, "SDSS", ("z'", "z_SDSS"), "from memory (SDSS; Fukugita et al. 1996)",
     "sdss2010-z", _SDSS.format("sdss2010-z"), "z"),
    ("g_PS1", 0.481, "Pan-STARRS1", ("gP1", "g_P1"), "from memory (Pan-STARRS1; Tonry et al. 2012)",
     "panstarrs-g", _PS1.format("panstarrs-g"), "g"),
    ("r_PS1", 0.617, "Pan-STARRS1", ("rP1", "r_P1"), "from memory (Pan-STARRS1; Tonry et al. 2012)",
     "panstarrs-r", _PS1.format("panstarrs-r"), "r"),
    ("i_PS1", 0.752, "Pan-STARRS1", ("iP1", "i_P1"), "from memory (Pan-STARRS1; Tonry et al. 2012)",
     "panstarrs-i", _PS1.format("panstarrs-i"), "i"),
    ("z_PS1", 0.866, "Pan-STARRS1", ("zP1", "z_P1"), "from memory (Pan-STARRS1; Tonry et al. 2012)",
     "panstarrs-z", _PS1.format("panstarrs-z"), "z"),
    ("y_PS1", 0.962, "Pan-STARRS1", ("yP1", "y_P1", "y"), "from memory (Pan-STARRS1; Tonry et al. 2012)",
     "panstarrs-y", _PS1.format("panstarrs-y"), "y"),
    ("W1", 3.35, "WISE", (), "from memory (WISE; Wright et al. 2010)",
     "wise2010-W1", _WISE.format("wise2010-W1"), "W1"),
    ("W2", 4.60, "WISE", (), "from memory (WISE; Wright et al. 2010)",
     "wise2010-W2", _WISE.format("wise2010-W2"), "W2"),
    ("W3", 11.56, "WISE", (), "from memory (WISE; Wright et al. 2010)",
     "wise2010-W3", _WISE.format("wise2010-W3"), "W3"),
    ("W4", 22.09, "WISE", (), "from memory (WISE; Wright et al. 2010)",
     "wise2010-W4", _WISE.format("wise2010-W4"), "W4"),
)

_BANDS = {}
for _row in _STANDARD_BANDS:
    _name, _lam, _system, _aliases, _source, _file, _curve_source, _local = _row
    _BANDS[_name] = Band(_name, _lam * u.micron, _source, _system, tuple(_aliases), None, True,
                         _curve_source, _file, _local)
del _row, _name, _lam, _system, _aliases, _source, _file, _curve_source, _local

# words that may prefix a band name to say which system is meant ("2MASS_J", "Gaia G")
_SYSTEM_PREFIXES = {
    "2mass": ("2MASS",),
    "tmass": ("2MASS",),
    "gaia": ("Gaia",),
    "gaiadr2": ("Gaia DR2",),
    "gaia dr2": ("Gaia DR2",),
    "gaia_dr2": ("Gaia DR2",),
    "gaia-dr2": ("Gaia DR2",),
    "dr2": ("Gaia DR2",),
    "gaiadr3": ("Gaia",),
    "gaia dr3": ("Gaia",),
    "gaia_dr3": ("Gaia",),
    "gaiaedr3": ("Gaia",),
    "sdss": ("SDSS",),
    "johnson": ("Johnson",),
    "cousins": ("Cousins",),
    "bessell": ("Johnson", "Cousins"),
    "wise": ("WISE",),
    "panstarrs": ("Pan-STARRS1",),
    "pan-starrs": ("Pan-STARRS1",),
    "ps1": ("Pan-STARRS1",),
}
_PREFIX_RE = re.compile(
    r"^(" + "|".join(re.escape(p) for p in sorted(_SYSTEM_PREFIXES, key=len, reverse=True))
    + r")[\s_\-.:]*(.+)$",
    re.IGNORECASE,
)
_SEPARATORS = re.compile(r"[\s_\-.]")


def _norm(text):
    return _SEPARATORS.sub("", text)


def registered_bands():
    """The registered bands, in registry order (a list of :class:`Band`)."""
    return list(_BANDS.values())


def band_candidates(text, case_insensitive=False):
    """Bands matching ``text`` (list, without duplicates), most specific rule first.

    Parameters
    ----------
    text : str
        A band name, alias, or system-prefixed name (``"2MASS_J"``).
    case_insensitive : bool, optional
        Compare names ignoring case.

    Returns
    -------
    list of Band
    """
    if text in _BANDS:
        return [_BANDS[text]]
    systems = None
    m = _PREFIX_RE.match(text)
    if m and m.group(2):
        systems = _SYSTEM_PREFIXES[m.group(1).lower()]
        text = m.group(2)
    key = _norm(text)
    if not key:
        return []
    hits = []
    for band in _BANDS.values():
        if systems is not None and band.system not in systems:
            continue
        keys = {_norm(band.name)} | {_norm(a) for a in band.aliases}
        if systems is not None and band.local_name:
            keys.add(_norm(band.local_name))
        if case_insensitive:
            ok = key.lower() in {k.lower() for k in keys}
        else:
            ok = key in keys
        if ok and band not in hits:
            hits.append(band)
    if systems is not None and len(hits) > 1:
        # "Johnson R": the band whose own name inside the system matches wins
        for rule in (lambda b: _norm(b.name) == key, lambda b: _norm(b.local_name or b.name) == key):
            chosen = [b for b in hits if rule(b)]
            if len(chosen) == 1:
                return chosen
    return hits


def _lookup(text):
    """Resolve a band name: exact spellings first, case-insensitive only if unambiguous."""
    exact = band_candidates(text, case_insensitive=False)
    if len(exact) == 1:
        return exact[0], exact
    if len(exact) > 1:
        return None, exact
    loose = band_candidates(text, case_insensitive=True)
    if len(loose) == 1:
        return loose[0], loose
    return None, loose


def get_band(name):
    """Look up a band by name.

    Exact names and aliases match first (``"U"`` is Johnson U, ``"u"`` is SDSS u);
    separators are ignored (``"K_s"`` = ``"Ks"``, ``"G_BP"`` = ``"BP"``); a system
    prefix may be given (``"2MASS_J"``, ``"Gaia G"``, ``"SDSS r"``, ``"Johnson R"``,
    ``"PS1 g"``); a different capitalisation is accepted only when it matches a single
    band. ``"R"`` and ``"I"`` are Cousins; Johnson R and I are ``"RJ"`` and ``"IJ"``.

    Parameters
    ----------
    name : str or Band
        Band name or alias; a :class:`Band` is returned unchanged.

    Returns
    -------
    Band

    Raises
    ------
    ParameterError
        Unknown or ambiguous name; the message lists the known bands.
    """
    if isinstance(name, Band):
        return name
    if not isinstance(name, str):
        raise param_error("band", "a band name (str) such as 'V', 'Ks' or 'BP', or a Band", name)
    band, hits = _lookup(name.strip())
    if band is not None:
        return band
    if hits:
        listed = ", ".join(f"{b.name!r} ({b.system})" for b in hits)
        raise ParameterError(
            f"The 'band' parameter {name!r} is ambiguous: it matches {listed}. "
            f"Got {name!r} instead. Hint: band names are case-sensitive "
            "('U' is Johnson U, 'u' is SDSS u); give the exact name or a system prefix such as 'SDSS_u'."
        )
    known = ", ".join(_BANDS)
    raise ParameterError(
        f"The 'band' parameter must be a known band ({known}). Got {name!r} instead. "
        "Hint: add_band(name, wavelength) registers a new band."
    )


def add_band(name, wavelength, source="user", *, system="user", aliases=(), transmission=None,
             replace=False):
    """Register a band by its effective wavelength, optionally with a transmission curve.

    Parameters
    ----------
    name : str
        New band name (case-sensitive; letters, digits, ``_`` and ``'``; no ``-`` or
        brackets, so that colour names such as ``E(X-Y)`` stay readable).
    wavelength : Quantity
        Effective wavelength (any spectral unit); used when there is no curve.
    source : str, optional
        Where the value comes from.
    system : str, optional
        Photometric system label.
    aliases : sequence of str, optional
        Other spellings.
    transmission : tuple or str or path, optional
        Transmission curve, as accepted by :func:`dustkit.bands.read_transmission`
        (photon-counting response). With a curve, band coefficients are integrated
        over it.
    replace : bool, optional
        Allow replacing a band added earlier (built-in bands cannot be replaced).

    Returns
    -------
    Band
    """
    from .curves import read_transmission

    if not isinstance(name, str) or not re.fullmatch(r"[A-Za-z0-9_']+", name.strip()):
        raise param_error(
            "name", "a band name made of letters, digits, '_' or \"'\" (no '-', spaces or brackets)", name
        )
    name = name.strip()
    if name in _BANDS and (_BANDS[name].builtin or not replace):
        what = "a built-in band" if _BANDS[name].builtin else "already registered (pass replace=True)"
        raise param_error("name", f"a new band name; {name!r} is {what}", name)
    lam = wavelength_micron(wavelength) if isinstance(wavelength, u.Quantity) else None
    if lam is None:
        raise param_error("wavelength", "a Quantity with a spectral unit, e.g. 0.5 * u.micron", wavelength)
    if lam.ndim != 0:
        raise param_error("wavelength", "a single effective wavelength", wavelength)
    if not isinstance(source, str):
        raise param_error("source", "a string saying where the wavelength comes from", source)
    curve = None
    curve_source = ""
    if transmission is not None:
        lam_t, thr = read_transmission(transmission)
        curve = (lam_t * u.micron, thr)
        curve_source = f"user ({transmission})" if isinstance(transmission, str) else "user (arrays)"
    band = Band(name, float(lam) * u.micron, source, str(system), tuple(aliases), curve, False,
                curve_source, None, name)
    _BANDS[name] = band
    return band


def remove_band(name):
    """Remove a band added with :func:`add_band` (built-in bands cannot be removed)."""
    band = get_band(name)
    if band.builtin:
        raise param_error("name", "a band added with add_band (built-in bands cannot be removed)", name)
    del _BANDS[band.name]


# =============================================================================
# Colour-excess names
# =============================================================================
_DASHES = str.maketrans({"\u2013": "-", "\u2014": "-", "\u2212": "-"})
_BRACKETED = re.compile(r"^[Ee]\s*[\(\[\{]\s*(.+?)\s*[\)\]\}]$")
_PREFIXED = re.compile(r"^[Ee][\s_\-.:]*(.+)$")


def _pairs(parts, joiner, case_insensitive):
    found = []
    for i in range(1, len(parts)):
        left, right = joiner.join(parts[:i]), joiner.join(parts[i:])
        lb = band_candidates(left, case_insensitive)
        rb = band_candidates(right, case_insensitive)
        if len(lb) == 1 and len(rb) == 1 and (lb[0].name, rb[0].name) not in found:
            if (case_insensitive and lb[0].system != rb[0].system
                    and (band_candidates(left, False) or band_candidates(right, False))):
                # 'E(b-y)', 'E(u-b)': a band spelt exactly ('y' of PS1) beside one matched in another case
                # ('b' as Johnson B) is a colour of some other system (Stromgren), not a mix of two systems
                continue
            found.append((lb[0].name, rb[0].name))
    return found


def _split_colour(inner):
    """Split the inside of a colour name into two band names; None, a pair, or a list if ambiguous."""
    if "-" in inner:
        plans = [(inner.split("-"), "-")]
    elif re.search(r"[_\s]", inner):
        plans = [(re.split(r"[_\s]+", inner), "_")]
    else:
        plans = [(list(inner), "")]
        if "m" in inner[1:-1]:  # "BmV", "gmr": 'm' for minus
            plans.append((inner.split("m"), "m"))
    for case_insensitive in (False, True):
        for parts, joiner in plans:
            if any(p == "" for p in parts):
                continue
            found = _pairs(parts, joiner, case_insensitive)
            if len(found) == 1:
                return found[0]
            if len(found) > 1:
                return found
    return None


def parse_excess_name(text, strict=True):
    """Recognise a colour-excess column name and return its two bands.

    Accepted shapes include ``E(B-V)``, ``E(BP-RP)``, ``E(J-Ks)``, ``E(V-I)``,
    ``E_BV``, ``E_BP_RP``, ``EBV``, ``ebv``, ``EJK`` and ``E_B-V``. Band names are
    resolved as in :func:`get_band` (exact case first).

    Parameters
    ----------
    text : str
        Column name.
    strict : bool, optional
        If False, return ``None`` instead of raising when ``text`` is not a
        colour-excess name.

    Returns
    -------
    (blue, red) : tuple of str
        Canonical band names, e.g. ``("B", "V")``; ``"EJK"`` gives ``("J", "K")``.

    Raises
    ------
    ParameterError
        ``text`` is not recognised (only when ``strict``), or is ambiguous.
    """
    if not isinstance(text, str):
        if strict:
            raise param_error("text", "a column name (str) such as 'E(B-V)'", text)
        return None
    s = text.strip().translate(_DASHES)
    m = _BRACKETED.match(s) or _PREFIXED.match(s)
    result = _split_colour(m.group(1).strip()) if m else None
    if isinstance(result, list):
        options = ", ".join(f"E({b}-{r})" for b, r in result)
        raise ParameterError(
            f"The colour-excess name {text!r} is ambiguous: it could be {options}. "
            f"Got {text!r} instead. Hint: write it as E(blue-red), e.g. 'E(B-V)'."
        )
    if result is None or result[0] == result[1]:
        if not strict:
            return None
        raise ParameterError(
            "The colour-excess name must look like 'E(B-V)', 'E_BP_RP' or 'EBV' with two known "
            f"bands. Got {text!r} instead. Hint: known bands are {', '.join(_BANDS)}; "
            "add_band registers others."
        )
    return result
