"""The intrinsic (unreddened) main sequence: reading, interpolating, shifting.

The default sequence is the mean dwarf colour and absolute-magnitude sequence of
Pecaut & Mamajek (2013) in E. Mamajek's updated table, read from the copy that the
``MeanStars`` package ships. Users may give their own sequence as a table.

Notes
-----
Pecaut, M. J. & Mamajek, E. E. 2013, ApJS 208, 9 (Table 5); the updated table
"A Modern Mean Dwarf Stellar Color and Effective Temperature Sequence" by E. Mamajek.
It is a mean sequence of roughly solar-metallicity dwarfs: metallicity and age shift a
cluster's main sequence (of order 0.1-0.3 mag in distance modulus), and young clusters
may hold pre-main-sequence stars that lie above it.
"""

import importlib.metadata
import importlib.util
import math
import re
from pathlib import Path

import numpy as np
from astropy.table import Table
from scipy.interpolate import PchipInterpolator

from ..exceptions import CatalogError
from .._lib.validation import param_error

__all__ = ["MainSequence", "default_sequence", "read_sequence_file", "SEQUENCE_BANDS"]

#: Bands of the sequence, in the names :func:`dustkit.bands.get_band` knows
#: (R and I are Cousins Rc and Ic).
SEQUENCE_BANDS = ("U", "B", "V", "R", "I", "G", "BP", "RP", "J", "H", "Ks")

_TABLE_FILE = "EEM_dwarf_UBVIJHK_colors_Teff.txt"
_MISSING = re.compile(r"^\.+$")


def _number(token):
    """A float from one table token: '...' and friends are missing; a trailing ':' marks an
    uncertain value in the table and is dropped."""
    token = token.strip().rstrip(":")
    if not token or _MISSING.match(token):
        return math.nan
    try:
        return float(token)
    except ValueError:
        return math.nan


def read_sequence_file(path):
    """Read a Mamajek-style whitespace table (header line starting with ``SpT``).

    Parameters
    ----------
    path : str or path-like

    Returns
    -------
    table : `~astropy.table.Table`
        One row per spectral type; column ``SpT`` (str) and float columns named as in the
        file's header (missing values are NaN). ``table.meta`` holds ``version`` (from a
        ``# Version ...`` line, if any) and ``path``.

    Raises
    ------
    CatalogError
        No header line, or no data rows.
    """
    path = Path(path)
    lines = path.read_text(encoding="utf-8", errors="replace").splitlines()
    version = None
    header = None
    rows = []
    for line in lines:
        stripped = line.strip()
        if header is None:
            m = re.match(r"^#\s*Version\s+(\S+)", stripped, re.I)
            if m and version is None:
                version = m.group(1)
            if stripped.startswith("SpT"):
                header = stripped.split()
            continue
        if not stripped or stripped.startswith("#"):
            if rows and stripped.startswith("#SpT"):
                break  # the repeated header closes the table; notes follow
            continue
        tokens = stripped.split()
        if len(tokens) < 2:
            continue
        rows.append(tokens)
    if header is None or not rows:
        raise CatalogError(
            f"'{path}' does not look like a mean dwarf sequence table: no header line starting "
            "with 'SpT' followed by data rows. Hint: pass your own sequence as a table instead."
        )
    names = [h for h in header if not h.startswith("#")]
    n = len(names)
    cols = {name: [] for name in names}
    for tokens in rows:
        tokens = (tokens + ["..."] * n)[:n]
        cols[names[0]].append(tokens[0])
        for name, tok in zip(names[1:], tokens[1:]):
            cols[name].append(_number(tok))
    table = Table({k: (np.array(v) if k == names[0] else np.array(v, dtype=float)) for k, v in cols.items()})
    table.meta["version"] = version
    table.meta["path"] = str(path)
    return table


# absolute magnitude of every sequence band from the table's columns
def _band_magnitudes(get):
    mv = get("Mv", "M_V", "MV")
    bv = get("B-V")
    ub = get("U-B")
    mg = get("M_G", "MG")
    bprp = get("Bp-Rp", "BP-RP")
    grp = get("G-Rp", "G-RP")
    gv = get("G-V")
    if mg is None and gv is not None and mv is not None:
        mg = mv + gv
    out = {"V": mv}
    out["B"] = None if mv is None or bv is None else mv + bv
    out["U"] = None if out["B"] is None or ub is None else out["B"] + ub
    vr, vi = get("V-Rc", "V-R"), get("V-Ic", "V-I")
    out["R"] = None if mv is None or vr is None else mv - vr
    out["I"] = None if mv is None or vi is None else mv - vi
    out["G"] = mg
    out["RP"] = None if mg is None or grp is None else mg - grp
    out["BP"] = None if out["RP"] is None or bprp is None else out["RP"] + bprp
    mj, mk = get("M_J", "MJ"), get("M_Ks", "M_K", "MKs")
    hk = get("H-Ks", "H-K")
    vk = get("V-Ks", "V-K")
    if mk is None and mv is not None and vk is not None:
        mk = mv - vk
    out["J"] = mj
    out["Ks"] = mk
    out["H"] = None if mk is None or hk is None else mk + hk
    return {b: v for b, v in out.items() if v is not None}


class MainSequence:
    """An intrinsic main sequence: absolute magnitudes in several bands along one parameter.

    Every band's absolute magnitude is interpolated with a monotone cubic (PCHIP) along the
    sequence parameter (the absolute V magnitude for the default table), so colours vary
    smoothly; :meth:`at_colour` reads any quantity at a given colour.

    Parameters
    ----------
    table : `~astropy.table.Table`
        One row per point of the sequence. Recognised columns: ``Mv`` (or ``M_V``), ``B-V``,
        ``U-B``, ``V-Rc``, ``V-Ic``, ``M_G``, ``Bp-Rp``, ``G-Rp``, ``G-V``, ``M_J``, ``M_Ks``,
        ``H-Ks``, ``V-Ks`` (magnitudes); missing values NaN.
    source : str
        Where the sequence comes from (recorded in every fit).
    version : str, optional
        Its version (recorded in every fit).

    Attributes
    ----------
    bands : tuple of str
        Bands with an absolute magnitude.
    parameter : ndarray
        The sequence parameter at the table rows (increasing).
    """

    def __init__(self, table, source="user table", version=None):
        if not isinstance(table, Table):
            try:
                table = Table(table)
            except Exception:
                raise param_error("sequence", "an astropy Table (or something Table() accepts)", table) from None
        self.source = str(source)
        self.version = None if version is None else str(version)
        lower = {c.lower(): c for c in table.colnames}

        def get(*names):
            for n in names:
                c = lower.get(n.lower())
                if c is not None:
                    try:
                        return np.asarray(table[c], dtype=float)
                    except (TypeError, ValueError):
                        raise CatalogError(f"The sequence column {c!r} is not numeric.") from None
            return None

        mags = _band_magnitudes(get)
        if "V" not in mags and not mags:
            raise CatalogError(
                "The sequence table has no absolute magnitude column (Mv/M_V, M_G, M_J or M_Ks). "
                f"Columns found: {', '.join(table.colnames)}."
            )
        key = "V" if "V" in mags else next(iter(mags))
        par = mags[key]
        ok = np.isfinite(par)
        order = np.argsort(par[ok], kind="stable")
        par_sorted = par[ok][order]
        keep = np.concatenate([[True], np.diff(par_sorted) > 0])  # strictly increasing
        self.parameter = par_sorted[keep]
        self.parameter_band = key
        if self.parameter.size < 4:
            raise CatalogError("The sequence table needs at least 4 rows with an absolute magnitude.")
        self._values = {}
        self._interp = {}
        self._range = {}
        spt = None
        for c in table.colnames:
            if c.lower() in ("spt", "#spt", "sptype", "spectral_type"):
                spt = np.asarray(table[c]).astype(str)[ok][order][keep]
                break
        self.spectral_type = spt
        for band, values in mags.items():
            v = values[ok][order][keep]
            self._values[band] = v
            good = np.isfinite(v)
            if np.count_nonzero(good) < 4:
                continue
            self._interp[band] = PchipInterpolator(self.parameter[good], v[good], extrapolate=False)
            self._range[band] = (self.parameter[good][0], self.parameter[good][-1])
        self.bands = tuple(b for b in SEQUENCE_BANDS if b in self._interp)

    def __repr__(self):
        ver = f", version {self.version}" if self.version else ""
        return f"<MainSequence {self.source}{ver}: bands {', '.join(self.bands)}>"

    def describe(self):
        """One line naming the sequence, its version and bands (for results and figures)."""
        ver = f" (version {self.version})" if self.version else ""
        return f"{self.source}{ver}"

    def parameter_range(self, bands):
        """Range of the sequence parameter where all ``bands`` have values."""
        lo, hi = -np.inf, np.inf
        for b in bands:
            if b not in self._range:
                raise param_error("bands", f"bands the sequence has ({', '.join(self.bands)})", b)
            lo = max(lo, self._range[b][0])
            hi = min(hi, self._range[b][1])
        if not lo < hi:
            raise CatalogError(f"The sequence has no stretch where all of {', '.join(bands)} have values.")
        return lo, hi

    def absolute(self, band, parameter):
        """Absolute magnitude in ``band`` at ``parameter`` (NaN outside the band's range)."""
        if band not in self._interp:
            raise param_error("band", f"one of the sequence's bands ({', '.join(self.bands)})", band)
        return self._interp[band](np.asarray(parameter, dtype=float))

    def colour(self, blue, red, parameter):
        """Intrinsic colour blue - red at ``parameter``."""
        return self.absolute(blue, parameter) - self.absolute(red, parameter)

    def grid(self, bands, step=0.02):
        """The parameter on a regular grid over the stretch where all ``bands`` exist, and
        the absolute magnitudes there, shape (n_grid, n_bands)."""
        lo, hi = self.parameter_range(bands)
        n = max(int(np.ceil((hi - lo) / step)) + 1, 8)
        p = np.linspace(lo, hi, n)
        return p, np.column_stack([self.absolute(b, p) for b in bands])

    def at_colour(self, blue, red, colour, what="V"):
        """Read the sequence at a given intrinsic colour.

        Parameters
        ----------
        blue, red : str
            The colour's bands, e.g. ``"B", "V"``.
        colour : float or array_like
            Intrinsic colour (mag).
        what : str or tuple, optional
            A band (its absolute magnitude is returned) or a pair of bands (that colour).

        Returns
        -------
        ndarray
            NaN where the colour is outside the sequence or ambiguous there (the first
            crossing from the blue end is used where the colour is not monotonic).
        """
        bands = [blue, red] + ([what] if isinstance(what, str) else list(what))
        p, m = self.grid(tuple(dict.fromkeys(bands)), step=0.005)
        idx = {b: i for i, b in enumerate(dict.fromkeys(bands))}
        c = m[:, idx[blue]] - m[:, idx[red]]
        target = m[:, idx[what]] if isinstance(what, str) else m[:, idx[what[0]]] - m[:, idx[what[1]]]
        colour = np.atleast_1d(np.asarray(colour, dtype=float))
        out = np.full(colour.shape, np.nan)
        # first crossing of each requested colour along the sequence from the blue end
        above = c[None, :] >= colour[:, None]
        cross = above[:, :-1] != above[:, 1:]
        has = cross.any(axis=1)
        k = np.argmax(cross, axis=1)
        kk = k[has]
        c0, c1 = c[kk], c[kk + 1]
        f = np.where(c1 != c0, (colour[has] - c0) / np.where(c1 != c0, c1 - c0, 1), 0.0)
        out[has] = target[kk] + f * (target[kk + 1] - target[kk])
        exact = np.isclose(c[None, :], colour[:, None], atol=1e-12, rtol=0)
        ex = exact.any(axis=1) & ~has
        out[ex] = target[np.argmax(exact[ex], axis=1)]
        return out if out.size > 1 or np.ndim(colour) else out[0]


def _meanstars_file():
    spec = importlib.util.find_spec("MeanStars")
    if spec is None or not spec.submodule_search_locations:
        raise CatalogError(
            "The default main sequence is read from the table the 'MeanStars' package ships, "
            "but MeanStars is not installed. Hint: pip install meanstars, or pass your own "
            "sequence table (sequence=...)."
        )
    for folder in spec.submodule_search_locations:
        f = Path(folder) / _TABLE_FILE
        if f.is_file():
            return f
    raise CatalogError(f"The MeanStars package has no {_TABLE_FILE}. Hint: reinstall meanstars.")


_DEFAULT = {}


def default_sequence():
    """The Pecaut & Mamajek (2013) mean dwarf sequence (E. Mamajek's updated table).

    Read once from the ``MeanStars`` package's copy of the table and cached.

    Returns
    -------
    MainSequence
        ``source`` names the paper, the table and the package version; ``version`` is the
        table's own version line.

    Notes
    -----
    Pecaut & Mamajek 2013, ApJS 208, 9; table by E. Mamajek. A mean sequence for roughly
    solar-metallicity dwarfs.
    """
    if "seq" not in _DEFAULT:
        path = _meanstars_file()
        table = read_sequence_file(path)
        try:
            pkg = importlib.metadata.version("MeanStars")
        except importlib.metadata.PackageNotFoundError:
            pkg = "unknown"
        source = (f"Pecaut & Mamajek 2013 (ApJS 208, 9) mean dwarf sequence, E. Mamajek's table "
                  f"{_TABLE_FILE} from MeanStars {pkg}")
        _DEFAULT["seq"] = MainSequence(table, source=source, version=table.meta.get("version"))
        _DEFAULT["table"] = table
    return _DEFAULT["seq"]
