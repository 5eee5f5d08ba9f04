"""Member photometry: recognise magnitude, colour, error, membership and parallax columns.

The result is a set of *observables*: each is a magnitude or a colour, written as a linear
combination of the sequence bands, with a value and an error per star (NaN where a star
has none). Magnitudes are used where the table has them; a colour column is used only
when its two bands are not both present as magnitudes (so nothing counts twice).
"""

import re
import warnings
from dataclasses import dataclass

import numpy as np
from astropy import units as u
from astropy.table import Table

from ..exceptions import AssumptionWarning, CatalogError
from .._lib.validation import param_error
from .sequence import SEQUENCE_BANDS

__all__ = ["Photometry", "read_photometry", "DEFAULT_MAG_ERR"]

#: Error assumed for photometry given without errors (mag).
DEFAULT_MAG_ERR = 0.03

# normalised spellings (lower case, letters and digits only) of each band's magnitude column
_MAG_SPELLINGS = {
    "U": ["u", "umag", "ujohnson"],
    "B": ["b", "bmag", "bjohnson"],
    "V": ["v", "vmag", "vjohnson"],
    "R": ["rc", "rcmag", "rcousins"],
    "I": ["ic", "icmag", "icousins"],
    "G": ["g", "gmag", "photgmeanmag", "ggaia"],
    "BP": ["bp", "bpmag", "gbp", "gbpmag", "photbpmeanmag"],
    "RP": ["rp", "rpmag", "grp", "grpmag", "photrpmeanmag"],
    "J": ["j", "jmag", "j2mass"],
    "H": ["h", "hmag", "h2mass"],
    "Ks": ["ks", "ksmag", "k", "kmag", "ks2mass"],
}
# not "pm": in Gaia catalogues that is the total proper motion (mas/yr), which would be read
# as a membership in per cent
_PROB_SPELLINGS = ["prob", "pmem", "pmemb", "membership", "memberprob", "probability", "p", "proba"]
_PLX_SPELLINGS = ["parallax", "plx", "parallaxmas", "plxmas"]
_COLOUR = re.compile(r"^\(?\s*([A-Za-z]{1,2})(?:mag)?\s*[-_]\s*([A-Za-z]{1,2})(?:mag)?\s*\)?$")


def _norm(name):
    return re.sub(r"[^a-z0-9]", "", name.lower())


def _band_of(token):
    t = _norm(token)
    for band, spellings in _MAG_SPELLINGS.items():
        if t in spellings[:2] or t == band.lower():
            return band
    return None


@dataclass(frozen=True)
class Photometry:
    """Observables of a set of stars (plain arrays; one row per star).

    Attributes
    ----------
    names : tuple of str
        Observable names, e.g. ``("V", "B-V", "U-B")``.
    coefficients : ndarray, shape (n_observables, n_bands)
        Each observable as a combination of ``bands`` (1 for a magnitude; +1/-1 for a colour).
    bands : tuple of str
        The sequence bands involved.
    values, errors : ndarray, shape (n_stars, n_observables)
        Magnitudes/colours and their 1-sigma errors (mag); NaN where missing.
    columns : dict
        Observable name -> the table column(s) it came from.
    probability : ndarray or None
        Membership probabilities (0-1) if the table has them.
    parallax, parallax_err : ndarray or None
        Parallaxes and their errors (mas) if the table has them.
    """

    names: tuple
    coefficients: np.ndarray
    bands: tuple
    values: np.ndarray
    errors: np.ndarray
    columns: dict
    probability: object = None
    parallax: object = None
    parallax_err: object = None

    @property
    def is_magnitude(self):
        """True for observables that are magnitudes (they move with the distance modulus)."""
        return np.isclose(self.coefficients.sum(axis=1), 1.0)

    def quantity(self, spec):
        """Values and errors of a magnitude (``"V"``) or a colour (``("B", "V")`` or ``"B-V"``)
        per star, from the magnitudes or colour columns the table has; NaN where missing."""
        if isinstance(spec, str) and "-" in spec:
            spec = tuple(spec.split("-", 1))
        if isinstance(spec, str):
            if spec in self.names:
                k = self.names.index(spec)
                return self.values[:, k], self.errors[:, k]
            raise CatalogError(f"No {spec} magnitude in the members table (found: {', '.join(self.names)}).")
        blue, red = spec
        name = f"{blue}-{red}"
        if name in self.names:
            k = self.names.index(name)
            return self.values[:, k], self.errors[:, k]
        if blue in self.names and red in self.names:
            kb, kr = self.names.index(blue), self.names.index(red)
            return self.values[:, kb] - self.values[:, kr], np.hypot(self.errors[:, kb], self.errors[:, kr])
        # a magnitude and a colour: V and B-V give B
        for k, n in enumerate(self.names):
            if "-" in n:
                b1, b2 = n.split("-", 1)
                if b2 == red and blue == b1:
                    return self.values[:, k], self.errors[:, k]
                if b1 == blue and b2 in self.names and red == b2:
                    return self.values[:, k], self.errors[:, k]
        if blue == "B" and red == "V" and "V" in self.names and "B-V" in self.names:
            k = self.names.index("B-V")
            return self.values[:, k], self.errors[:, k]
        raise CatalogError(f"No {name} colour in the members table (found: {', '.join(self.names)}).")

    def subset(self, names):
        """The same stars with only the observables ``names``."""
        idx = [self.names.index(n) for n in names]
        used = np.any(self.coefficients[idx] != 0, axis=0)
        bands = tuple(b for b, k in zip(self.bands, used) if k)
        coef = self.coefficients[idx][:, used]
        return Photometry(tuple(names), coef, bands, self.values[:, idx], self.errors[:, idx],
                          {k: v for k, v in self.columns.items() if k in names or k not in self.names},
                          self.probability, self.parallax, self.parallax_err)


def _numeric(table, col, what):
    c = table[col]
    try:
        if hasattr(c, "unit") and c.unit is not None and u.Unit(c.unit) != u.dimensionless_unscaled:
            try:
                vals = u.Quantity(c).to_value(u.mag if what == "mag" else u.mas)
            except (u.UnitConversionError, TypeError):
                vals = np.asarray(c, dtype=float)
        else:
            vals = np.asarray(np.ma.getdata(c), dtype=float)
    except (TypeError, ValueError):
        mask = np.asarray(getattr(c, "mask", np.zeros(len(c), bool)), dtype=bool)
        text = np.asarray(np.ma.getdata(c)).astype(str)
        empty = mask | np.isin(np.char.strip(text), ["", "--", "nan", "NaN", "..."])
        if all(_is_float(v) for v in text[~empty]):  # an empty or partly empty column
            out = np.full(len(c), np.nan)
            out[~empty] = text[~empty].astype(float)
            return out
        bad = next((v for v in text[~empty] if not _is_float(v)), "?")
        raise CatalogError(
            f"The column {col!r} is not numeric (e.g. {bad!r}). Hint: clean it, or leave it out of the members table."
        ) from None
    if hasattr(c, "mask") and np.ndim(c.mask):
        vals = np.where(np.asarray(c.mask), np.nan, vals)
    return np.asarray(vals, dtype=float)


def _is_float(s):
    try:
        float(s)
        return True
    except ValueError:
        return False


def _find_error(names, col):
    n = _norm(col)
    for c in names:
        cn = c.lower()
        if cn in (f"e_{col.lower()}", f"{col.lower()}_err", f"{col.lower()}_error", f"err_{col.lower()}",
                  f"sigma_{col.lower()}", f"{col.lower()}_sigma", f"{col.lower()}err", f"e{col.lower()}"):
            return c
    for c in names:
        cn = _norm(c)
        if cn in (f"e{n}", f"{n}err", f"{n}error", f"err{n}", f"sigma{n}", f"sig{n}", f"{n}sigma"):
            return c
        if n.endswith("mag") and cn in (f"e{n[:-3]}mag", f"{n[:-3]}magerr", f"e{n[:-3]}"):
            return c
    return None


def _is_error_name(c):
    cl = c.lower()
    return bool(re.match(r"^(e_|err_|sigma_|sig_)", cl) or re.search(r"(_err|_error|_sigma|err)$", cl))


def read_photometry(members, *, columns=None, default_err=DEFAULT_MAG_ERR):
    """Find the photometry of a members table.

    Parameters
    ----------
    members : `~astropy.table.Table` or table-like
        One row per star. Magnitude columns are recognised by their band names (``U``,
        ``B``, ``V``, ``Vmag``, ``G``/``Gmag``/``phot_g_mean_mag``, ``BP``, ``RP``, ``J``,
        ``H``, ``Ks``/``K``, ...), colours by names like ``B-V``, ``U-B``, ``BP-RP``,
        ``J-Ks``; errors by ``e_X``, ``X_err``, ``sigma_X``; membership probabilities by
        ``prob``, ``pmem``, ``membership``, ...; parallaxes by ``parallax``/``plx`` (mas).
    columns : dict, optional
        Explicit names: band or colour -> column (e.g. ``{"V": "Vj", "B-V": "BV"}``), and
        ``"probability"``, ``"parallax"``, ``"parallax_err"``.
    default_err : float
        Error (mag) assumed where a magnitude or colour has no error column (announced
        with an :class:`~dustkit.AssumptionWarning`).

    Returns
    -------
    photometry : Photometry
    notes : list of str
        What was decided about ambiguous columns.

    Raises
    ------
    CatalogError
        No usable magnitude (a colour-magnitude fit needs at least one magnitude and one
        colour; a colour-colour fit needs B-V and U-B).
    """
    if not isinstance(members, Table):
        try:
            members = Table(members)
        except Exception:
            raise param_error("members", "an astropy Table (or a dict of columns / DataFrame)", type(members).__name__) from None
    columns = dict(columns or {})
    names = list(members.colnames)
    explicit_cols = set(columns.values())
    mags = {}
    colours = {}
    for key, col in columns.items():
        if col not in names:
            raise CatalogError(f"columns={{{key!r}: {col!r}}} names a column that is not in the members table. "
                               f"Columns found: {', '.join(names)}.")
        if key in SEQUENCE_BANDS:
            mags[key] = col
        else:
            m = _COLOUR.match(key)
            if m and _band_of(m.group(1)) and _band_of(m.group(2)):
                colours[(_band_of(m.group(1)), _band_of(m.group(2)))] = col
            elif key not in ("probability", "parallax", "parallax_err"):
                raise param_error("columns", "a dict whose keys are bands (U, B, V, R, I, G, BP, RP, J, H, Ks), "
                                  "colours like 'B-V', or 'probability', 'parallax', 'parallax_err'", key)
    notes = []
    by_norm = {}
    for c in names:
        if c in explicit_cols or _is_error_name(c):
            continue
        by_norm.setdefault(_norm(c), c)
    for band, spellings in _MAG_SPELLINGS.items():
        if band in mags:
            continue
        exact = next((c for c in (band, f"{band}mag", f"{band}_mag") if c in names and c not in explicit_cols), None)
        if exact is not None:  # exact case first: 'B' is a magnitude, 'b' may be a latitude
            mags[band] = exact
            continue
        for s in spellings:
            if s in by_norm:
                if band == "Ks" and s in ("k", "kmag") and "ks" in by_norm:
                    continue
                if band == "B" and s == "b" and "l" in by_norm:
                    notes.append("columns 'l' and 'b' read as Galactic coordinates, not as a B magnitude")
                    continue
                mags[band] = by_norm[s]
                break
    for c in names:
        if c in explicit_cols or _is_error_name(c):
            continue
        m = _COLOUR.match(c.strip())
        if m:
            b1, b2 = _band_of(m.group(1)), _band_of(m.group(2))
            if b1 and b2 and b1 != b2 and (b1, b2) not in colours:
                colours[(b1, b2)] = c
    obs = []  # (name, {band: coeff}, value col(s))
    for band in SEQUENCE_BANDS:
        if band in mags:
            obs.append((band, {band: 1.0}, mags[band]))
    for (b1, b2), col in colours.items():
        if b1 in mags and b2 in mags:
            notes.append(f"colour column {col!r} not used: both {b1} and {b2} magnitudes are there")
            continue
        obs.append((f"{b1}-{b2}", {b1: 1.0, b2: -1.0}, col))
    if not obs:
        raise CatalogError(
            "No photometry found in the members table. Columns found: " + ", ".join(names) + ". Needed: "
            "magnitudes named by band (U, B, V, G, BP, RP, J, H, Ks, or Vmag, Gmag, ...) and/or colours "
            "(B-V, U-B, BP-RP, J-Ks). Hint: name them explicitly, e.g. columns={'V': 'Vj', 'B-V': 'BVj'}."
        )
    bands = tuple(b for b in SEQUENCE_BANDS if any(b in o[1] for o in obs))
    coef = np.zeros((len(obs), len(bands)))
    values = np.empty((len(members), len(obs)))
    errors = np.empty_like(values)
    colmap = {}
    missing_err, gaps = [], []
    for k, (name, comb, col) in enumerate(obs):
        for b, c in comb.items():
            coef[k, bands.index(b)] = c
        values[:, k] = _numeric(members, col, "mag")
        ecol = columns.get(f"{name}_err") or _find_error(names, col)
        if ecol is not None:
            err = _numeric(members, ecol, "mag")
            bad = np.isfinite(err) & (err < 0)
            if np.any(bad):
                raise CatalogError(f"The error column {ecol!r} has negative values (first at row {int(np.argmax(bad))}).")
            filled = np.isfinite(values[:, k]) & ~(np.isfinite(err) & (err > 0))
            if np.any(filled):
                gaps.append(f"{int(filled.sum())} of {int(np.isfinite(values[:, k]).sum())} in {ecol!r} "
                            f"(first at row {int(np.argmax(filled))})")
            errors[:, k] = np.where(np.isfinite(err) & (err > 0), err, default_err)
            colmap[name] = (col, ecol)
        else:
            errors[:, k] = default_err
            missing_err.append(col)
            colmap[name] = (col, None)
    if gaps:
        warnings.warn(
            f"Magnitude errors empty or zero: {'; '.join(gaps)}; {default_err:g} mag assumed for those stars. "
            "Hint: fill them in, or drop the stars, if that error is not right for them.",
            AssumptionWarning, stacklevel=3)
    if missing_err:
        warnings.warn(
            f"No error column found for {', '.join(repr(c) for c in missing_err)}; assuming {default_err:g} mag. "
            "Hint: add e_X or X_err columns.", AssumptionWarning, stacklevel=3)
    prob = None
    pcol = columns.get("probability") or next((by_norm[s] for s in _PROB_SPELLINGS if s in by_norm), None)
    if pcol is not None:
        prob = _numeric(members, pcol, "")
        fin = prob[np.isfinite(prob)]
        if fin.size and fin.max() > 1.0 and fin.max() <= 100.0:
            prob = prob / 100.0
            notes.append(f"membership column {pcol!r} read as per cent")
        if fin.size and (fin.min() < 0 or np.nanmax(prob) > 1.0):
            raise CatalogError(f"The membership column {pcol!r} must hold probabilities in 0-1 (or per cent). "
                               f"Got values from {fin.min():g} to {fin.max():g}.")
        colmap["probability"] = pcol
    plx = plx_err = None
    xcol = columns.get("parallax") or next((by_norm[s] for s in _PLX_SPELLINGS if s in by_norm), None)
    if xcol is not None:
        plx = _numeric(members, xcol, "mas")
        ecol = columns.get("parallax_err") or _find_error(names, xcol)
        if ecol is None:
            raise CatalogError(f"The parallax column {xcol!r} has no error column (e.g. {xcol}_error). "
                               "Hint: name it with columns={'parallax_err': ...}; parallaxes without errors are not used.")
        plx_err = _numeric(members, ecol, "mas")
        colmap["parallax"] = (xcol, ecol)
    return Photometry(tuple(o[0] for o in obs), coef, bands, values, errors, colmap, prob, plx, plx_err), notes
