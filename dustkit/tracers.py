"""Catalogue ingestion: read extinction tracers and targets into validated arrays.

A *tracer* is an object (a star cluster, a field star) with a known position,
distance and reddening. :func:`read_tracers` reads a catalogue of them from a
file (CSV, ECSV, FITS table, VOTable, Parquet; all through astropy's
``Table.read``), an astropy ``Table``/``QTable`` or a pandas ``DataFrame``,
recognises the columns, converts everything to Galactic ``l``, ``b`` (deg),
distance (pc) and A_V (mag) with errors, and rejects unusable rows with a
reason per row. :func:`read_targets` reads a list of positions and distances
at which extinction is wanted.

Column recognition
------------------
Column names are matched case-insensitively after removing everything but
letters and digits (``"E(B-V)"``, ``"E_B-V"`` and ``"ebv"`` all read as
``ebv``). The roles, and the keys of the ``columns=`` mapping that names a
column explicitly (an explicit mapping always wins), are:

===================== =====================================================
key                   meaning (a few accepted spellings)
===================== =====================================================
name                  tracer name (``name``, ``id``, ``cluster``, ``source_id``)
l, b                  Galactic longitude, latitude in deg (``l``/``b``,
                      ``glon``/``glat``, ``GLON``/``GLAT``, ``_Glon``/``_Glat``)
ra, dec               ICRS right ascension, declination in deg, or
                      sexagesimal strings (``ra``/``dec``, ``RAJ2000``/``DEJ2000``,
                      ``RA_ICRS``/``DE_ICRS``, ``RAdeg``/``DEdeg``)
distance              distance; unit from the column, the name (``dist_kpc``),
                      or ``distance_unit`` (``distance``, ``dist``, ``d``)
distance_modulus      true distance modulus mu0 in mag (``dm``, ``mu0``, ``(m-M)0``)
apparent_modulus      apparent V-band modulus (m-M)_V in mag (``(m-M)V``, ``dmv``)
parallax              parallax in mas (``parallax``, ``plx``)
ebv                   E(B-V) in mag (``E(B-V)``, ``ebv``, ``E_BV``, ``reddening``)
av                    A_V in mag (``A_V``, ``Av``, ``A(V)``)
excess                any other colour excess (``E(BP-RP)``, ``E_J_Ks``); its
                      colour from ``excess_color`` or the column name
<key>_err             the error of any of the above (``e_X``, ``X_err``,
                      ``err_X``, ``sigma_X``, ``X_error``, ``eX``)
===================== =====================================================

Columns whose names mark them as errors (``e_...``, ``err_...``, ``sigma_...``,
``..._err``, ``..._error``, and ``eX`` beside a column ``X``) are never taken
as values; so ``e_B-V`` (the error of a colour ``B-V``) is not read as E(B-V).

When several candidates are present, the first of these is used: Galactic
before equatorial positions (noted in ``meta["assumptions"]``); distance, then
true distance modulus, then parallax, then apparent V modulus; E(B-V), then
A_V, then another colour excess (these two choices with an ``AssumptionWarning``).
"""

import hashlib
import os
import re
import warnings
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
from astropy import units as u
from astropy.coordinates import SkyCoord
from astropy.table import MaskedColumn, QTable, Table

from ._errors import AssumptionWarning, CatalogError, RowsRejectedWarning
from ._validation import check_real, param_error

__all__ = [
    "TracerSet",
    "TargetList",
    "read_tracers",
    "read_targets",
    "COLUMN_KEYS",
    "SUFFIX_FORMATS",
    "DEFAULT_REJECT_LIMITS",
]

#: File suffix -> astropy ``Table.read`` format. Add a suffix here to support a new format.
SUFFIX_FORMATS = {
    ".csv": "ascii.csv",
    ".csv.gz": "ascii.csv",
    ".ecsv": "ascii.ecsv",
    ".ecsv.gz": "ascii.ecsv",
    ".tsv": "ascii.tab",
    ".txt": "ascii",
    ".dat": "ascii",
    ".fits": "fits",
    ".fit": "fits",
    ".fts": "fits",
    ".fits.gz": "fits",
    ".fit.gz": "fits",
    ".vot": "votable",
    ".votable": "votable",
    ".xml": "votable",
    ".parquet": "parquet",
    ".pq": "parquet",
}

#: Keys accepted by the ``columns=`` mapping.
COLUMN_KEYS = (
    "name",
    "l",
    "b",
    "ra",
    "dec",
    "distance",
    "distance_err",
    "distance_modulus",
    "distance_modulus_err",
    "apparent_modulus",
    "apparent_modulus_err",
    "parallax",
    "parallax_err",
    "ebv",
    "ebv_err",
    "av",
    "av_err",
    "excess",
    "excess_err",
)

#: Row rejection limits: E(B-V) in mag (A_V and other excesses are compared
#: through their A_V = R_V * E(B-V) equivalent) and distance in pc.
DEFAULT_REJECT_LIMITS = {"ebv": (-0.3, 20.0), "distance": (0.0, 2.0e5)}

_PARALLAX_WARN_FRAC = 0.2
_KPC_HINT_MEDIAN = 30.0
_SUMMARY_NSIDE = 64
_CAUTION = (
    "Extinction estimates are statistical; check them against local data before "
    "using them for science or instrument time."
)

# --- column spellings (normalised: lower case, letters and digits only) -------------
_NAME_ALIASES = [
    "name", "id", "cluster", "clustername", "clname", "object", "objname", "objectname",
    "star", "starname", "sourceid", "source", "designation", "identifier", "mainid", "target",
]
_GALACTIC_PAIRS = [  # specific spellings first: a lone 'b' may be a B magnitude
    ("glon", "glat"), ("lii", "bii"), ("gall", "galb"), ("glondeg", "glatdeg"),
    ("galacticlongitude", "galacticlatitude"), ("galon", "galat"), ("ldeg", "bdeg"), ("l", "b"),
]
_EQUATORIAL_PAIRS = [
    ("ra", "dec"), ("ra", "de"), ("raj2000", "dej2000"), ("raj2000", "decj2000"),
    ("raicrs", "deicrs"), ("raicrs", "decicrs"), ("radeg", "dedeg"), ("radeg", "decdeg"),
    ("rightascension", "declination"), ("raj2000deg", "dej2000deg"),
]
_VALUE_ALIASES = {
    "distance": [
        "distance", "dist", "d", "dis", "distpc", "distkpc", "distancepc", "distancekpc",
        "dpc", "dkpc", "dispc", "diskpc",
    ],
    "distance_modulus": [
        "distancemodulus", "distmod", "dmod", "dm", "mu0", "mm0", "dm0", "truemodulus",
        "truedistancemodulus", "modulus",
    ],
    "apparent_modulus": [
        "apparentmodulus", "apparentdistancemodulus", "appmod", "mmv", "dmv", "muv", "dmodv",
    ],
    "parallax": ["parallax", "plx", "pi", "varpi", "parallaxmas", "plxmas"],
    "ebv": ["ebv", "ebmv", "ebminusv", "reddening", "ebvmag"],
    "av": ["av", "extinctionv", "extv", "avmag", "av0"],
}
_ERROR_PREFIX = re.compile(r"^e_")  # case-sensitive: 'E_BV' is a value, 'e_BV' an error
_ERROR_WORD = re.compile(r"(^(err|error|sigma|sig|unc)_)|(_(err|error|sigma|sig|unc)$)", re.I)
_EXCESS_NAME = re.compile(
    r"^E\s*[(\[_]\s*([A-Za-z]{1,3}[0-9]?)\s*[-_]\s*([A-Za-z]{1,3}[0-9]?)\s*[)\]]?\s*(mag)?$"
)
_DISTANCE_LIKE = ("distance", "distance_modulus", "parallax", "apparent_modulus")
_REDDENING_LIKE = ("ebv", "av", "excess")
_KIND_LABEL = {
    "distance": "distance",
    "distance_modulus": "distance modulus",
    "apparent_modulus": "apparent V modulus",
    "parallax": "parallax",
}
_MISSING_TOKENS = {"", "nan", "--", "null", "none", "na", "n/a", "-", "masked"}
_SEXAGESIMAL = (
    r"^\s*([+-]?)\s*(\d{1,3})(?:\s*[:hHdD\u00b0]\s*|\s+)(\d{1,2})(?:\s*[:mM']\s*|\s+)"
    r"(\d{1,2}(?:\.\d*)?)\s*[sS\"]?\s*$"
)


def _norm(name):
    return re.sub(r"[^a-z0-9]", "", str(name).lower())


# ======================================================================================
# Result classes
# ======================================================================================


def _empty_rejected():
    return Table(
        {
            "row": np.zeros(0, dtype=np.int64),
            "name": np.zeros(0, dtype=str),
            "reason": np.zeros(0, dtype=str),
            "column": np.zeros(0, dtype=str),
            "value": np.zeros(0, dtype=str),
        }
    )


def _frozen(arr, dtype=float):
    a = np.array(arr, dtype=dtype, copy=True)
    a.setflags(write=False)
    return a


def _row_names(rows):
    """``"row <i>"`` for input row numbers, in as narrow a string type as the numbers allow."""
    rows = np.asarray(rows, dtype=np.int64)
    if rows.size == 0:
        return np.zeros(0, dtype="U4")
    return np.char.add("row ", rows.astype(f"U{len(str(int(rows.max())))}"))


class _Names:
    """``TracerSet.name``: the names given, or ``"row <i>"`` made from ``row`` on first use.

    Catalogues of millions of field stars rarely carry names; making ten million strings
    up front cost seconds and gigabytes for nothing.
    """

    def __get__(self, obj, objtype=None):
        if obj is None:
            return None  # the dataclass default: no names given
        names = obj.__dict__.get("_names")
        if names is None:
            names = _frozen(_row_names(obj.row), dtype=str)
            obj.__dict__["_names"] = names
        return names

    def __set__(self, obj, value):
        obj.__dict__["_names"] = None if value is None else _frozen(value, dtype=str)


@dataclass(frozen=True, eq=False)
class TracerSet:
    """A validated set of extinction tracers.

    Build one with :func:`read_tracers` or :meth:`TracerSet.from_arrays`. All arrays
    are plain, read-only numpy arrays in the units below; :meth:`to_table` gives
    them back as a ``QTable`` with units.

    Attributes
    ----------
    l, b : ndarray
        Galactic longitude in [0, 360) and latitude in [-90, 90], deg.
    distance, distance_err : ndarray
        Distance and its 1-sigma error, pc.
    av, av_err : ndarray
        Extinction A_V and its 1-sigma error, mag.
    name : ndarray of str
        One name per tracer (``"row <i>"`` where the input had none).
    excess, excess_err : ndarray
        The reddening as given in the input (E(B-V), A_V, E(BP-RP), ...), mag.
    excess_kind : str
        What ``excess`` is, e.g. ``"E(B-V)"``, ``"A_V"``, ``"E(BP-RP)"``.
    law : str
        Extinction law used to turn ``excess`` into A_V.
    rv : float
        R_V used for that conversion.
    rejected : `~astropy.table.Table`
        One row per rejected input row: ``row`` (0-based input row index), ``name``,
        ``reason`` (the first problem found in that row), ``column``, ``value``.
    meta : dict
        ``source``, ``n_input``, ``columns`` (role -> input column), ``assumptions``
        (list of str), ``rejected_by_reason`` (reason -> count), ``sha256`` and
        ``sha256_of`` (``"file"``: checksum of the input file; ``"arrays"``: of the
        tracer arrays, for input from memory).
    row : ndarray of int
        Input row index of each tracer.
    distance_kind : str
        How the distance was given: ``"distance"``, ``"distance modulus"``,
        ``"apparent V modulus"`` or ``"parallax"``.
    excess_color : tuple of str or None
        ``(blue, red)`` bands of ``excess`` when it is a colour excess.
    apparent_modulus, apparent_modulus_err : ndarray or None
        The apparent V-band modulus the distance was derived from (so that
        :meth:`with_law` can re-derive it), else None.
    """

    l: np.ndarray
    b: np.ndarray
    distance: np.ndarray
    distance_err: np.ndarray
    av: np.ndarray
    av_err: np.ndarray
    excess: np.ndarray
    excess_err: np.ndarray
    name: np.ndarray = _Names()
    excess_kind: str = "A_V"
    law: str = "ccm89"
    rv: float = 3.1
    rejected: Table = field(default_factory=_empty_rejected)
    meta: dict = field(default_factory=dict)
    row: np.ndarray = None
    distance_kind: str = "distance"
    excess_color: tuple = None
    apparent_modulus: np.ndarray = None
    apparent_modulus_err: np.ndarray = None

    def __post_init__(self):
        n = np.size(self.l)
        for attr in ("l", "b", "distance", "distance_err", "av", "av_err", "excess", "excess_err"):
            object.__setattr__(self, attr, _frozen(getattr(self, attr)))
        row = np.arange(n) if self.row is None else self.row
        object.__setattr__(self, "row", _frozen(row, dtype=np.int64))
        for attr in ("apparent_modulus", "apparent_modulus_err"):
            if getattr(self, attr) is not None:
                object.__setattr__(self, attr, _frozen(getattr(self, attr)))
        object.__setattr__(self, "rv", float(self.rv))
        given = {a: getattr(self, a) for a in ("b", "distance", "distance_err", "av", "av_err", "excess", "excess_err", "row")}
        given["name"] = self.__dict__.get("_names")  # None: made from the row numbers when asked
        for attr, value in given.items():
            if value is not None and np.shape(value) != (n,):
                raise param_error(attr, f"a 1-d array of the same length as 'l' ({n})", np.shape(value))

    def __len__(self):
        return int(self.l.size)

    def __repr__(self):
        return (
            f"<TracerSet: {len(self)} tracers, A_V from {self.excess_kind} ({self.law}, R_V = {self.rv:g}), "
            f"{len(self.rejected)} rejected rows>"
        )

    # ----------------------------------------------------------------------------------
    @classmethod
    def from_arrays(cls, l, b, distance, distance_err, av, av_err, name=None, law="ccm89", rv=3.1):
        """Build a tracer set from arrays, validating them like a catalogue.

        Parameters
        ----------
        l, b : Quantity['angle'] or array_like
            Galactic longitude and latitude; plain numbers are taken as deg.
        distance, distance_err : Quantity['length'] or array_like
            Distance and its error; plain numbers are taken as pc.
        av, av_err : Quantity['mag'] or array_like
            A_V and its error; plain numbers are taken as mag.
        name : array_like of str, optional
            Names; default ``"row <i>"``.
        law : str
            Extinction law the A_V values refer to (kept for the record).
        rv : float
            R_V (kept for the record).

        Returns
        -------
        TracerSet
            Rows that fail validation (NaN, ``|b| > 90``, distance <= 0, absurd
            A_V, negative error) are rejected and reported as for a catalogue.
        """
        n = np.size(np.atleast_1d(getattr(l, "value", l)))

        def qty(x, unit, key):
            try:
                if isinstance(x, u.Quantity):
                    x = x.to_value(unit)
                return np.broadcast_to(np.atleast_1d(np.asarray(x, dtype=float)), (n,)).copy() * unit
            except u.UnitConversionError:
                raise param_error(key, f"a quantity convertible to {unit}", x) from None
            except (TypeError, ValueError):
                raise param_error(key, f"an array of numbers (in {unit}) of length {n}", x) from None

        t = QTable()
        if name is not None:
            t["name"] = np.broadcast_to(np.atleast_1d(np.asarray(name).astype(str)), (n,))
        t["l"] = qty(l, u.deg, "l")
        t["b"] = qty(b, u.deg, "b")
        t["distance"] = qty(distance, u.pc, "distance")
        t["distance_err"] = qty(distance_err, u.pc, "distance_err")
        t["av"] = qty(av, u.mag, "av")
        t["av_err"] = qty(av_err, u.mag, "av_err")
        cols = {k: k for k in t.colnames}
        ts, notes = _build_tracers(
            t,
            columns=cols,
            distance_unit=None,
            law=law,
            rv=rv,
            parallax_zero_point=0 * u.mas,
            default_distance_frac_err=0.1,
            default_excess_err=0.05,
            reject_limits=None,
            excess_color=None,
            source_desc="arrays (TracerSet.from_arrays)",
            file_sha=None,
        )
        _emit(notes)
        return ts

    # ----------------------------------------------------------------------------------
    def subset(self, mask):
        """Return the tracers selected by a boolean mask or an index array.

        The ``rejected`` table (a report on the input) is kept as it is.
        """
        sel = np.asarray(mask)
        if sel.dtype == bool:
            if sel.shape != (len(self),):
                raise param_error("mask", f"a boolean array of length {len(self)}", f"shape {sel.shape}")
        elif sel.dtype.kind in "iu":
            if sel.size and (sel.min() < -len(self) or sel.max() >= len(self)):
                raise param_error("mask", f"indices in [0, {len(self)})", f"{sel.min()}..{sel.max()}")
        else:
            raise param_error("mask", "a boolean mask or an integer index array", sel.dtype)
        meta = dict(self.meta)
        meta["assumptions"] = list(meta.get("assumptions", []))
        meta["subset_of"] = len(self)
        return replace(
            self,
            l=self.l[sel],
            b=self.b[sel],
            distance=self.distance[sel],
            distance_err=self.distance_err[sel],
            av=self.av[sel],
            av_err=self.av_err[sel],
            name=None if self.__dict__.get("_names") is None else self.name[sel],
            excess=self.excess[sel],
            excess_err=self.excess_err[sel],
            row=self.row[sel],
            apparent_modulus=None if self.apparent_modulus is None else self.apparent_modulus[sel],
            apparent_modulus_err=None if self.apparent_modulus_err is None else self.apparent_modulus_err[sel],
            meta=meta,
        )

    # ----------------------------------------------------------------------------------
    def with_law(self, law, rv):
        """Re-derive A_V (and distances from an apparent V modulus) under another law and R_V.

        Parameters
        ----------
        law : str
            Extinction law name (see ``dustkit.laws``).
        rv : float
            R_V.

        Returns
        -------
        TracerSet
            A new set; this one is unchanged. For E(B-V) input A_V = R_V E(B-V);
            for another colour excess the conversion goes through
            ``dustkit.bands.excess_to_av``; for A_V input, A_V does not change.
            Where the distance came from an apparent V modulus, mu0 = (m-M)_V - A_V
            is recomputed with the new A_V.
        """
        rv = check_real("rv", rv, 0.0, np.inf, low_inclusive=False)
        law, rv = _check_law(law, rv)
        av, av_err = _reddening_to_av(self.excess_kind, self.excess_color, self.excess, self.excess_err, law, rv)
        changes = dict(av=av, av_err=av_err, law=law, rv=rv)
        if self.apparent_modulus is not None:
            d, d_err = _modulus_to_distance(
                self.apparent_modulus - av, np.hypot(self.apparent_modulus_err, av_err)
            )
            changes.update(distance=d, distance_err=d_err)
        meta = dict(self.meta)
        meta["assumptions"] = list(meta.get("assumptions", [])) + [
            f"A_V re-derived from {self.excess_kind} with law {law!r}, R_V = {rv:g} "
            f"(was {self.law!r}, R_V = {self.rv:g})"
        ]
        changes["meta"] = meta
        changes["name"] = self.__dict__.get("_names")  # None: still made from the row numbers
        return replace(self, **changes)

    # ----------------------------------------------------------------------------------
    def to_table(self):
        """Return the tracers as a ``QTable`` with units (deg, pc, mag).

        Columns: ``row``, ``name``, ``l``, ``b``, ``distance``, ``distance_err``,
        ``av``, ``av_err``, ``excess``, ``excess_err``. ``meta`` carries the law,
        R_V, the excess kind and the source.
        """
        t = QTable()
        t["row"] = np.array(self.row)
        t["name"] = np.array(self.name)
        t["l"] = self.l * u.deg
        t["b"] = self.b * u.deg
        t["distance"] = self.distance * u.pc
        t["distance_err"] = self.distance_err * u.pc
        t["av"] = self.av * u.mag
        t["av_err"] = self.av_err * u.mag
        t["excess"] = self.excess * u.mag
        t["excess_err"] = self.excess_err * u.mag
        t.meta.update(
            {
                "excess_kind": self.excess_kind,
                "law": self.law,
                "rv": self.rv,
                "distance_kind": self.distance_kind,
                "source": self.meta.get("source", ""),
                "sha256": self.meta.get("sha256", ""),
            }
        )
        return t

    # ----------------------------------------------------------------------------------
    def sky_area(self, nside=_SUMMARY_NSIDE):
        """Approximate sky area covered: HEALPix pixels holding a tracer times the pixel area.

        Parameters
        ----------
        nside : int
            HEALPix NSIDE (power of two, 1 to 1024); pixel area 4 pi / (12 NSIDE^2) sr
            (Gorski et al. 2005).

        Returns
        -------
        area : Quantity['solid angle']
            In deg^2. Sparse tracers under-count the footprint; use it as a guide.
        n_pixels : int
            Number of occupied pixels at ``nside``.
        """
        from ._healpix import ang2pix, pixarea_deg2
        from ._validation import check_nside

        nside = check_nside(nside)
        if len(self) == 0:
            return 0 * u.deg**2, 0
        npix = int(np.unique(ang2pix(nside, self.l, self.b)).size)
        return npix * pixarea_deg2(nside) * u.deg**2, npix

    def summary(self):
        """A plain-text summary: count, sky coverage, distances, A_V, rejected rows, assumptions."""
        n = len(self)
        lines = [
            f"TracerSet: {n} tracers from {self.meta.get('source', 'unknown source')} "
            f"({self.meta.get('n_input', n)} input rows, {len(self.rejected)} rejected)"
        ]
        if n:
            lo, hi = _longitude_span(self.l)
            if lo == 0.0 and hi == 360.0:
                l_text = "l all longitudes"
            else:
                l_text = f"l {lo:.2f} .. {hi:.2f} deg" + (" (through l = 0)" if lo > hi else "")
            area, npix = self.sky_area()
            area_text = f"{area.value:,.0f}" if area.value >= 100 else f"{area.value:.3g}"
            lines.append(
                f"  Sky:       {l_text}, b {self.b.min():.2f} .. {self.b.max():.2f} deg; "
                f"about {area_text} deg^2 covered ({npix} HEALPix pixels at NSIDE {_SUMMARY_NSIDE} "
                f"holding a tracer)"
            )
            frac = np.median(self.distance_err / self.distance)
            lines.append(
                f"  Distance:  {self.distance.min():.0f} .. {self.distance.max():.0f} pc "
                f"(median {np.median(self.distance):.0f} pc, median error {100 * frac:.0f}%), "
                f"from {self.distance_kind}"
            )
            lines.append(
                f"  A_V:       {self.av.min():.2f} .. {self.av.max():.2f} mag (median {np.median(self.av):.2f} mag, "
                f"median error {np.median(self.av_err):.2f} mag), from {self.excess_kind} with law "
                f"{self.law!r}, R_V = {self.rv:g}"
            )
        if len(self.rejected):
            lines.append(f"  Rejected:  {len(self.rejected)} rows (see .rejected)")
            reasons, counts = np.unique(np.asarray(self.rejected["reason"]), return_counts=True)
            for k in np.argsort(-counts, kind="stable"):
                lines.append(f"    {counts[k]:>8d}  {reasons[k]}")
        else:
            lines.append("  Rejected:  none")
        assumptions = self.meta.get("assumptions", [])
        if assumptions:
            lines.append("  Assumptions:")
            lines.extend(f"    - {a}" for a in assumptions)
        lines.append(f"  Caution: {_CAUTION}")
        return "\n".join(lines)

    def summary_table(self):
        """The numbers of :meth:`summary` as a one-row ``QTable`` with units."""
        n = len(self)
        area, npix = self.sky_area()
        lo, hi = _longitude_span(self.l) if n else (np.nan, np.nan)
        nan = np.nan
        t = QTable()
        t["n_tracers"] = [n]
        t["n_input"] = [self.meta.get("n_input", n)]
        t["n_rejected"] = [len(self.rejected)]
        t["l_min"] = [lo] * u.deg
        t["l_max"] = [hi] * u.deg
        t["b_min"] = [self.b.min() if n else nan] * u.deg
        t["b_max"] = [self.b.max() if n else nan] * u.deg
        t["sky_area"] = [area.value] * u.deg**2
        t["distance_min"] = [self.distance.min() if n else nan] * u.pc
        t["distance_max"] = [self.distance.max() if n else nan] * u.pc
        t["av_min"] = [self.av.min() if n else nan] * u.mag
        t["av_max"] = [self.av.max() if n else nan] * u.mag
        t["av_err_median"] = [np.median(self.av_err) if n else nan] * u.mag
        return t


@dataclass(frozen=True, eq=False)
class TargetList:
    """Positions and distances at which extinction is wanted.

    Attributes
    ----------
    table : `~astropy.table.Table`
        The input table, all columns kept, all rows kept.
    l, b : ndarray
        Galactic longitude [0, 360) and latitude, deg; NaN for invalid rows.
    distance, distance_err : ndarray
        Distance and error, pc; NaN for invalid rows.
    valid : ndarray of bool
        True where the row has a usable position and distance.
    rejected : `~astropy.table.Table`
        One row per invalid input row: ``row``, ``name``, ``reason``, ``column``, ``value``.
    meta : dict
        ``source``, ``n_input``, ``columns``, ``assumptions``, ``sha256``, ``sha256_of``.
    """

    table: Table
    l: np.ndarray
    b: np.ndarray
    distance: np.ndarray
    distance_err: np.ndarray
    valid: np.ndarray
    rejected: Table = field(default_factory=_empty_rejected)
    meta: dict = field(default_factory=dict)

    def __post_init__(self):
        for attr in ("l", "b", "distance", "distance_err"):
            object.__setattr__(self, attr, _frozen(getattr(self, attr)))
        object.__setattr__(self, "valid", _frozen(self.valid, dtype=bool))

    def __len__(self):
        return int(self.l.size)

    def __repr__(self):
        return f"<TargetList: {len(self)} targets, {int(self.valid.sum())} usable>"

    def to_table(self):
        """The input table plus ``l``, ``b``, ``distance``, ``distance_err`` (with units) and ``valid``.

        Existing input columns with those names are kept under ``input_<name>``.
        """
        t = QTable(self.table, copy=True)
        for c, vals, unit in (
            ("l", self.l, u.deg),
            ("b", self.b, u.deg),
            ("distance", self.distance, u.pc),
            ("distance_err", self.distance_err, u.pc),
            ("valid", self.valid, None),
        ):
            if c in t.colnames:
                t.rename_column(c, f"input_{c}")
            t[c] = vals * unit if unit is not None else np.array(vals)
        return t


# ======================================================================================
# Public readers
# ======================================================================================


def read_tracers(
    source,
    *,
    columns=None,
    distance_unit=None,
    law="ccm89",
    rv=3.1,
    parallax_zero_point=0 * u.mas,
    default_distance_frac_err=0.10,
    default_excess_err=0.05,
    reject_limits=None,
    excess_color=None,
    format=None,
):
    """Read a catalogue of extinction tracers into a validated :class:`TracerSet`.

    Parameters
    ----------
    source : str, path-like, `~astropy.table.Table`, `~astropy.table.QTable` or pandas.DataFrame
        A file (CSV, ECSV, FITS table, VOTable, Parquet; format from the suffix,
        see ``SUFFIX_FORMATS``) or a table in memory.
    columns : dict, optional
        Explicit role -> column mapping, e.g. ``{"ebv": "E_BV", "distance": "Dist"}``;
        always wins over recognition. Keys: see ``COLUMN_KEYS`` and the module docstring.
    distance_unit : str or `~astropy.units.Unit`, optional
        Unit of a distance column; wins over the column's own unit and a unit in its
        name. Without any of these a bare number is taken as pc, with an
        ``AssumptionWarning`` (which also says when the values look like kpc).
    law : str
        Extinction law for turning a colour excess into A_V (see ``dustkit.laws``).
    rv : float
        R_V. For E(B-V), A_V = R_V E(B-V).
    parallax_zero_point : Quantity['angle'] or float
        Parallax zero point (plain numbers in mas); the corrected parallax is
        ``parallax - parallax_zero_point`` (e.g. -0.017 mas for Gaia EDR3,
        Lindegren et al. 2021).
    default_distance_frac_err : float
        Fractional distance error assumed where the catalogue gives none (0.10).
        For a modulus this is the equivalent 5/ln(10) * 0.10 = 0.217 mag; for a
        parallax, 10% of the corrected parallax.
    default_excess_err : float
        Reddening error assumed where the catalogue gives none, in mag of E(B-V)
        (0.05). A_V gets R_V times this; another colour excess the equivalent error.
    reject_limits : dict, optional
        Override ``DEFAULT_REJECT_LIMITS``: ``"ebv"`` (low, high) in mag of E(B-V)
        (A_V and other excesses are compared through A_V / R_V) and ``"distance"``
        (low, high) in pc (low exclusive).
    excess_color : tuple of str or str, optional
        ``(blue, red)`` bands (or ``"BP-RP"``) of an ``excess`` column whose name
        does not say it.
    format : str, optional
        astropy ``Table.read`` format, overriding the suffix map.

    Returns
    -------
    TracerSet

    Raises
    ------
    CatalogError
        Unreadable file, missing required column, or no usable row left.

    Warns
    -----
    AssumptionWarning
        A unit or an error was assumed, several candidate columns were found, or
        parallaxes are too uncertain for 1/parallax to be a good distance.
    RowsRejectedWarning
        Some rows were rejected (how many, and why; see ``TracerSet.rejected``).

    Notes
    -----
    Distances: d = 10^(mu0/5 + 1) pc from a true modulus; mu0 = (m-M)_V - A_V
    from an apparent V modulus (errors of (m-M)_V and A_V added in quadrature,
    i.e. treated as independent); d = 1000 / (parallax - zero point) pc from a
    parallax in mas. 1/parallax is biased when the fractional parallax error is
    above about 10-20% (Bailer-Jones 2015, PASP 127, 994); such rows are kept
    with a warning.

    Rejected rows: missing (empty/NaN) or non-numeric values in a used column,
    |b| > 90 or |dec| > 90, ra outside [0, 360], l outside [-180, 360],
    distance <= 0 or beyond the distance limit, parallax - zero point <= 0,
    negative errors, and reddening outside the limits (E(B-V) < -0.3 or > 20 by
    default). Slightly negative reddening (e.g. E(B-V) = -0.05) is kept: it is
    measurement noise around zero and removing it would bias A_V upwards.
    Empty or zero errors are replaced by the defaults (with a warning).
    Equatorial columns are taken as ICRS (FK5 J2000 differs by < 0.1 arcsec).
    """
    table, desc, file_sha = _load(source, format)
    ts, notes = _build_tracers(
        table,
        columns=columns,
        distance_unit=distance_unit,
        law=law,
        rv=rv,
        parallax_zero_point=parallax_zero_point,
        default_distance_frac_err=default_distance_frac_err,
        default_excess_err=default_excess_err,
        reject_limits=reject_limits,
        excess_color=excess_color,
        source_desc=desc,
        file_sha=file_sha,
    )
    _emit(notes)
    return ts


def read_targets(
    source,
    *,
    columns=None,
    distance_unit=None,
    parallax_zero_point=0 * u.mas,
    default_distance_frac_err=None,
    reject_limits=None,
    format=None,
):
    """Read positions and distances at which extinction is wanted.

    Parameters
    ----------
    source : str, path-like, Table, QTable or pandas.DataFrame
        As for :func:`read_tracers`.
    columns : dict, optional
        Explicit mapping for ``name``, ``l``/``b`` or ``ra``/``dec``, ``distance``,
        ``distance_modulus``, ``parallax`` and their ``_err`` keys.
    distance_unit, parallax_zero_point, reject_limits, format
        As for :func:`read_tracers` (only the ``"distance"`` limit applies).
    default_distance_frac_err : float or None
        Fractional distance error assumed where the input gives none. None (the
        default): such distances are taken as exact (``distance_err = 0``), silently,
        since a target list usually gives plain distances.

    Returns
    -------
    TargetList
        No row is dropped: a row without a usable position or distance gets NaN
        ``l``, ``b``, ``distance`` and ``distance_err``, ``valid == False``, and is
        listed in ``rejected`` with its reason.

    Raises
    ------
    CatalogError
        Unreadable file, missing position or distance column, an apparent modulus
        as the only distance (it needs the reddening, which is what is being
        estimated), or no usable row at all.
    """
    table, desc, file_sha = _load(source, format)
    ctx = _Context(table, desc)
    cols = _resolve_columns(table, columns, ctx, want_reddening=False)
    limits = _check_limits(reject_limits)
    if default_distance_frac_err is None:
        frac = 0.0
        ctx.quiet_default_errors = True
        ctx.assumptions.append("distances without an error are taken as exact (distance_err = 0)")
    else:
        frac = check_real("default_distance_frac_err", default_distance_frac_err, 0.0, np.inf, low_inclusive=False)
    zp = _zero_point(parallax_zero_point)
    n = len(table)
    if n == 0:
        raise CatalogError(f"{desc} has no rows; nothing to read.")
    l, b, _ = _positions(table, cols, ctx)
    d, d_err, _, _ = _distances(table, cols, ctx, distance_unit, frac, zp, limits, None, None)
    valid = ctx.rej.code < 0
    l = np.where(valid, l, np.nan)
    b = np.where(valid, b, np.nan)
    d = np.where(valid, d, np.nan)
    d_err = np.where(valid, d_err, np.nan)
    names = _names(table, cols)
    rejected = ctx.rej.table(names)
    if not valid.any():
        raise CatalogError(
            f"No usable target in {desc}: all {n} rows were rejected ({ctx.rej.reason_text()}). "
            "Hint: check the column recognition with columns={...} and the units."
        )
    if len(rejected):
        ctx.note(
            RowsRejectedWarning,
            f"{len(rejected)} of {n} target rows cannot be placed and are kept with NaN "
            f"(valid == False): {ctx.rej.reason_text()}. See TargetList.rejected.",
        )
    meta = ctx.meta(file_sha, [l, b, d, d_err])
    tl = TargetList(table=table, l=l, b=b, distance=d, distance_err=d_err, valid=valid, rejected=rejected, meta=meta)
    _emit(ctx.notes)
    return tl


# ======================================================================================
# Loading
# ======================================================================================


def _is_dataframe(obj):
    return type(obj).__module__.split(".")[0] == "pandas" and hasattr(obj, "columns") and hasattr(obj, "iloc")


def _load(source, fmt=None):
    """Return (Table, description, sha256-of-file or None)."""
    if isinstance(source, Table):  # includes QTable
        return source, f"a {type(source).__name__} in memory", None
    if _is_dataframe(source):
        try:
            return Table.from_pandas(source), "a pandas DataFrame in memory", None
        except Exception as exc:  # pragma: no cover - pandas edge cases
            raise CatalogError(
                f"Could not convert the pandas DataFrame to a table: {exc}. "
                "Hint: make the columns plain numbers or strings."
            ) from exc
    if not isinstance(source, (str, os.PathLike)):
        raise param_error(
            "source", "a file path, an astropy Table/QTable or a pandas DataFrame", type(source).__name__
        )
    path = Path(source).expanduser()
    if not path.is_file():
        raise CatalogError(
            f"Catalogue file '{path}' does not exist or is not a file. Hint: check the path "
            f"(current folder: {os.getcwd()})."
        )
    if fmt is None:
        lower = path.name.lower()
        for suffix in sorted(SUFFIX_FORMATS, key=len, reverse=True):
            if lower.endswith(suffix):
                fmt = SUFFIX_FORMATS[suffix]
                break
    known = ", ".join(sorted(SUFFIX_FORMATS))
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", u.UnitsWarning)
            table = Table.read(path, format=fmt) if fmt else Table.read(path)
    except Exception as exc:
        raise CatalogError(
            f"Could not read catalogue file '{path}' (format {fmt or 'guessed'}): "
            f"{type(exc).__name__}: {exc}. Hint: dustkit reads CSV, ECSV, FITS tables, VOTable and Parquet "
            f"through astropy (suffixes {known}); check that the file is complete and in one of these "
            "formats, or read it with astropy.table.Table.read(..., format=...) and pass the Table."
        ) from exc
    sha = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            sha.update(chunk)
    return table, f"file '{path}'", sha.hexdigest()


# ======================================================================================
# Context: notes (warnings) and row rejections
# ======================================================================================


class _Rejections:
    """First reason per rejected row; the table is built by looping over reasons only."""

    def __init__(self, n):
        self.code = np.full(n, -1, dtype=np.int32)
        self.reasons = []  # (reason, column, raw values)

    def add(self, bad, reason, column, raw):
        bad = np.asarray(bad, dtype=bool)
        new = bad & (self.code < 0)
        if new.any():
            self.code[new] = len(self.reasons)
            self.reasons.append((reason, column, raw))
        return bad

    def counts(self):
        return np.bincount(self.code[self.code >= 0], minlength=len(self.reasons))

    def reason_text(self):
        counts = self.counts()
        order = np.argsort(-counts, kind="stable")
        return "; ".join(f"{counts[k]} {self.reasons[k][0]}" for k in order if counts[k])

    def table(self, names):
        if not self.reasons:
            return _empty_rejected()
        parts = []
        for k, (reason, column, raw) in enumerate(self.reasons):
            rows = np.flatnonzero(self.code == k)
            parts.append((rows, reason, column, _value_strings(raw, rows)))
        rows = np.concatenate([p[0] for p in parts])
        order = np.argsort(rows, kind="stable")
        t = Table()
        t["row"] = rows[order].astype(np.int64)
        t["name"] = (_row_names(rows) if names is None else np.asarray(names)[rows])[order].astype(str)
        t["reason"] = np.concatenate([np.full(p[0].size, p[1]) for p in parts])[order].astype(str)
        t["column"] = np.concatenate([np.full(p[0].size, p[2]) for p in parts])[order].astype(str)
        t["value"] = np.concatenate([p[3] for p in parts])[order].astype(str)
        return t


def _value_strings(raw, rows):
    if raw is None:
        return np.full(rows.size, "")
    data = raw
    mask = None
    if isinstance(raw, MaskedColumn) or np.ma.isMaskedArray(raw):
        mask = np.ma.getmaskarray(raw)[rows]
        data = np.ma.getdata(raw)
    vals = np.asarray(getattr(data, "value", data))[rows]
    if vals.dtype.kind == "S":
        vals = np.char.decode(vals, "utf-8", "replace")
    if vals.dtype.kind == "f":
        out = np.char.mod("%.10g", vals)
    else:
        out = vals.astype(str)
    if mask is not None:
        out = np.where(mask, "(empty)", out)
    return out


class _Context:
    def __init__(self, table, desc):
        self.table = table
        self.desc = desc
        self.n = len(table)
        self.rej = _Rejections(self.n)
        self.notes = []  # (warning class, message)
        self.assumptions = []
        self.used = {}
        self.quiet_default_errors = False

    def note(self, cls, msg, assumption=True):
        self.notes.append((cls, msg))
        if assumption and cls is AssumptionWarning:
            self.assumptions.append(msg)

    def meta(self, file_sha, arrays):
        counts = self.rej.counts()
        if file_sha is None:
            sha = hashlib.sha256()
            for a in arrays:  # hashed in place: no byte copies of large arrays
                sha.update(np.ascontiguousarray(a).reshape(-1).view(np.uint8))
            digest, of = sha.hexdigest(), "arrays"
        else:
            digest, of = file_sha, "file"
        return {
            "source": self.desc,
            "n_input": self.n,
            "columns": dict(self.used),
            "assumptions": list(self.assumptions),
            "rejected_by_reason": {r[0]: int(c) for r, c in zip(self.rej.reasons, counts)},
            "sha256": digest,
            "sha256_of": of,
        }


def _emit(notes):
    for cls, msg in notes:
        warnings.warn(msg, cls, stacklevel=3)


# ======================================================================================
# Column recognition
# ======================================================================================


def _spellings(role):
    if role in _VALUE_ALIASES:
        return ", ".join(_VALUE_ALIASES[role][:6])
    if role in ("l", "b"):
        return ", ".join("/".join(p) for p in [_GALACTIC_PAIRS[-1]] + _GALACTIC_PAIRS[:3])
    if role in ("ra", "dec"):
        return ", ".join("/".join(p) for p in _EQUATORIAL_PAIRS[:5])
    return ""


def _found_text(table):
    names = table.colnames
    shown = ", ".join(repr(c) for c in names[:40])
    return shown + (f" and {len(names) - 40} more" if len(names) > 40 else "")


def _resolve_columns(table, columns, ctx, want_reddening=True):
    """Map roles to column names: explicit mapping first, then recognised spellings."""
    if columns is None:
        columns = {}
    if not isinstance(columns, dict):
        raise param_error("columns", "a dict mapping roles to column names, e.g. {'ebv': 'E_BV'}", columns)
    names = list(table.colnames)
    lower = {}
    for c in names:
        lower.setdefault(c.lower(), c)
    explicit = {}
    for key, col in columns.items():
        if key not in COLUMN_KEYS:
            raise param_error("columns", f"a dict whose keys are among {', '.join(COLUMN_KEYS)}", key)
        if col in names:
            explicit[key] = col
        elif isinstance(col, str) and col.lower() in lower:
            explicit[key] = lower[col.lower()]
        else:
            raise CatalogError(
                f"columns={{{key!r}: {col!r}}} names a column that is not in {ctx.desc}. "
                f"Columns found: {_found_text(table)}."
            )
    if not want_reddening:
        for key in _REDDENING_LIKE + ("apparent_modulus",):
            if key in explicit:
                what = (
                    "An apparent modulus cannot place a target: turning it into a distance needs the "
                    "reddening, which is what is being estimated. Give a distance, a true distance modulus "
                    "or a parallax instead."
                    if key == "apparent_modulus"
                    else "Targets need positions and distances only; reddening columns are not used."
                )
                raise CatalogError(f"columns={{{key!r}: {explicit[key]!r}}}: {what}")

    taken = set(explicit.values())
    candidates = [c for c in names if c not in taken and not _looks_like_error(c, names)]
    by_norm = {}
    for c in candidates:
        by_norm.setdefault(_norm(c), c)

    def find(aliases, exclude=()):
        for a in aliases:
            c = by_norm.get(a)
            if c is not None and c not in exclude:
                return c
        return None

    cols = {}
    # ---- positions ------------------------------------------------------------------
    pos_keys = [k for k in ("l", "b", "ra", "dec") if k in explicit]
    if pos_keys:
        gal = any(k in explicit for k in ("l", "b"))
        equ = any(k in explicit for k in ("ra", "dec"))
        if gal and equ:
            raise CatalogError(
                "columns= names both Galactic (l/b) and equatorial (ra/dec) columns; give one pair."
            )
        pair, pairs = (("l", "b"), _GALACTIC_PAIRS) if gal else (("ra", "dec"), _EQUATORIAL_PAIRS)
        for i, k in enumerate(pair):
            if k in explicit:
                cols[k] = explicit[k]
            else:
                c = find([p[i] for p in pairs], exclude=set(explicit.values()))
                if c is None:
                    raise CatalogError(
                        f"columns= names {pair[1 - i]!r} but no {k!r} column was found in {ctx.desc}. "
                        f"Columns found: {_found_text(table)}. Hint: add {k!r} to columns=."
                    )
                cols[k] = c
    else:
        chosen = None
        for system, pairs in (("galactic", _GALACTIC_PAIRS), ("icrs", _EQUATORIAL_PAIRS)):
            for pl, pb in pairs:
                if pl in by_norm and pb in by_norm:
                    chosen = (system, by_norm[pl], by_norm[pb])
                    break
            if chosen:
                break
        if chosen is None:
            raise CatalogError(
                f"No position columns found in {ctx.desc}. Columns found: {_found_text(table)}. "
                f"Needed: Galactic longitude/latitude in deg (spellings: {_spellings('l')}, ...) or ICRS "
                f"ra/dec in deg or sexagesimal (spellings: {_spellings('ra')}, ...). "
                "Hint: name them explicitly, e.g. columns={'l': 'LON', 'b': 'LAT'}."
            )
        system, c1, c2 = chosen
        if system == "galactic":
            cols["l"], cols["b"] = c1, c2
            other = [(by_norm[p], by_norm[q]) for p, q in _EQUATORIAL_PAIRS if p in by_norm and q in by_norm]
            if other:
                ctx.assumptions.append(
                    f"Galactic columns ({c1!r}, {c2!r}) used; equatorial columns {other[0]!r} also present, not used"
                )
        else:
            cols["ra"], cols["dec"] = c1, c2
    used = set(cols.values()) | set(explicit.values())

    # ---- distance -------------------------------------------------------------------
    exp_dist = [k for k in _DISTANCE_LIKE if k in explicit]
    if len(exp_dist) > 1:
        raise CatalogError(
            f"columns= names several distance columns ({', '.join(exp_dist)}); give only one of "
            "distance, distance_modulus, parallax, apparent_modulus."
        )
    kinds = _DISTANCE_LIKE if want_reddening else ("distance", "distance_modulus", "parallax")
    if exp_dist:
        cols[exp_dist[0]] = explicit[exp_dist[0]]
    else:
        found = [(k, find(_VALUE_ALIASES[k], used)) for k in kinds]
        found = [(k, c) for k, c in found if c is not None]
        if not found:
            if not want_reddening and find(_VALUE_ALIASES["apparent_modulus"], used):
                c = find(_VALUE_ALIASES["apparent_modulus"], used)
                raise CatalogError(
                    f"The only distance-like column in {ctx.desc} is {c!r}, an apparent V modulus. It cannot "
                    "place a target: turning it into a distance needs the reddening, which is what is being "
                    "estimated. Hint: give a distance, a true distance modulus or a parallax column."
                )
            raise CatalogError(
                f"No distance column found in {ctx.desc}. Columns found: {_found_text(table)}. Needed one of: "
                + "; ".join(f"{_KIND_LABEL[k]} ({_spellings(k)}, ...)" for k in kinds)
                + ". Hint: name it explicitly, e.g. columns={'distance': 'Dist'} (and distance_unit='kpc' if so)."
            )
        cols[found[0][0]] = found[0][1]
        if len(found) > 1:
            ctx.note(
                AssumptionWarning,
                "Several distance columns found: "
                + ", ".join(f"{c!r} ({_KIND_LABEL[k]})" for k, c in found)
                + f"; using {found[0][1]!r}. Pass columns={{'{found[0][0]}': ...}} (or another key) to choose.",
            )
    used |= set(cols.values())

    # ---- reddening ------------------------------------------------------------------
    if want_reddening:
        exp_red = [k for k in _REDDENING_LIKE if k in explicit]
        if len(exp_red) > 1:
            raise CatalogError(
                f"columns= names several reddening columns ({', '.join(exp_red)}); give only one of ebv, av, excess."
            )
        if exp_red:
            cols[exp_red[0]] = explicit[exp_red[0]]
        else:
            found = [(k, find(_VALUE_ALIASES[k], used)) for k in ("ebv", "av")]
            found_cols = {c for _, c in found}
            exc = [
                c
                for c in candidates
                if c not in used and c not in found_cols and _EXCESS_NAME.match(c)
                and not _is_bv(_parse_color_name(c))
            ]
            if exc:
                found.append(("excess", exc[0]))
            found = [(k, c) for k, c in found if c is not None]
            if not found:
                raise CatalogError(
                    f"No reddening column found in {ctx.desc}. Columns found: {_found_text(table)}. Needed one of: "
                    f"E(B-V) ({_spellings('ebv')}, ...); A_V ({_spellings('av')}, ...); another colour excess "
                    "named like E(BP-RP) or E_J_Ks. Hint: name it explicitly, e.g. columns={'ebv': 'Red'} or "
                    "columns={'excess': 'EBR'}, excess_color=('BP', 'RP')."
                )
            cols[found[0][0]] = found[0][1]
            if len(found) > 1:
                ctx.note(
                    AssumptionWarning,
                    "Several reddening columns found: "
                    + ", ".join(f"{c!r}" for k, c in found)
                    + f"; using {found[0][1]!r}. Pass columns={{'ebv': ...}}, {{'av': ...}} or {{'excess': ...}} to choose.",
                )
        used |= set(cols.values())

    # ---- name -----------------------------------------------------------------------
    if "name" in explicit:
        cols["name"] = explicit["name"]
    else:
        c = find(_NAME_ALIASES, used)
        if c is not None:
            cols["name"] = c
    used |= set(cols.values())

    # ---- errors ---------------------------------------------------------------------
    for role in list(cols):
        if role in ("name", "l", "b", "ra", "dec"):
            continue
        key = f"{role}_err"
        if key in explicit:
            cols[key] = explicit[key]
            continue
        c = _find_error(names, cols[role], role, used)
        if c is not None:
            cols[key] = c
            used.add(c)
    for key, col in explicit.items():  # stray explicit *_err for an unused role
        if key.endswith("_err") and key[:-4] not in cols:
            raise CatalogError(
                f"columns={{{key!r}: {col!r}}} gives the error of {key[:-4]!r}, but {key[:-4]!r} is not the "
                f"column being used (using: {', '.join(f'{k}={v!r}' for k, v in cols.items())})."
            )
    ctx.used = dict(cols)
    return cols


def _looks_like_error(colname, names):
    """True for error-column names: 'e_X', 'err_X', 'X_err', 'sigma_X', ..., and 'eX' when 'X' is a column."""
    if _ERROR_PREFIX.search(colname) or _ERROR_WORD.search(colname):
        return True
    return len(colname) > 1 and colname[0] == "e" and colname[1].isupper() and colname[1:] in names


def _find_error(names, value_col, role, used):
    by_norm = {}
    for c in names:
        if c not in used and c != value_col:
            by_norm.setdefault(_norm(c), c)
    bases = [_norm(value_col)] + [a for a in _VALUE_ALIASES.get(role, []) if a != _norm(value_col)]
    for base in bases:
        for cand in (
            "e" + base,
            base + "err",
            "err" + base,
            "error" + base,
            "sigma" + base,
            "sig" + base,
            base + "error",
            base + "sigma",
            base + "unc",
            "unc" + base,
        ):
            c = by_norm.get(cand)
            if c is not None:
                return c
    return None


# ======================================================================================
# Column values
# ======================================================================================


def _numeric(table, colname, ctx, *, sexagesimal=None):
    """Return (float values, unit or None, raw column) and reject missing / non-numeric rows.

    ``sexagesimal`` is ``"hour"`` or ``"deg"`` when strings like '12:30:00' are allowed.
    """
    col = table[colname]
    unit = getattr(col, "unit", None)
    if np.ndim(col) != 1:
        raise CatalogError(
            f"Column {colname!r} in {ctx.desc} has shape {np.shape(col)}; dustkit needs one number per row. "
            "Hint: split it into separate columns."
        )
    mask = None
    if isinstance(col, MaskedColumn):
        mask = np.asarray(col.mask, dtype=bool) if np.ndim(col.mask) else np.full(len(col), bool(col.mask))
        data = np.asarray(col.data.data)
    elif hasattr(col, "unmasked") and hasattr(col, "mask"):  # astropy Masked quantity
        mask = np.asarray(col.mask, dtype=bool)
        data = np.asarray(getattr(col.unmasked, "value", col.unmasked))
    elif isinstance(col, u.Quantity):
        data = np.asarray(col.value)
    else:
        data = np.asarray(col)
    if unit is not None and (unit == u.dimensionless_unscaled):
        unit = None
    nonnumeric = np.zeros(len(data), dtype=bool)
    if data.dtype.kind in "fiub":
        values = data.astype(float)
    else:
        strings = data.astype(str) if data.dtype.kind != "S" else np.char.decode(data, "utf-8", "replace")
        try:
            values = strings.astype(float)
        except (TypeError, ValueError):
            import pandas as pd

            values = np.array(pd.to_numeric(pd.Series(strings), errors="coerce"), dtype=float)
            bad = np.isnan(values)
            stripped = np.char.lower(np.char.strip(strings))
            blank = np.isin(stripped, list(_MISSING_TOKENS))
            if sexagesimal is not None and (bad & ~blank).any():
                sx = _parse_sexagesimal(strings[bad & ~blank], hours=(sexagesimal == "hour"))
                values[np.flatnonzero(bad & ~blank)] = sx
                bad = np.isnan(values)
                if sexagesimal == "hour" and np.isfinite(sx).any():
                    ctx.note(
                        AssumptionWarning,
                        f"Column {colname!r} holds sexagesimal strings; read as hours:minutes:seconds of right "
                        "ascension (numbers in the same column are read as deg).",
                    )
                    unit = None
            nonnumeric = bad & ~blank
    missing = (np.isnan(values) & ~nonnumeric) | (mask if mask is not None else False)
    values = np.where(mask, np.nan, values) if mask is not None else values
    infinite = np.isinf(values)
    ctx.rej.add(missing, f"missing value in {colname!r}", colname, col)
    ctx.rej.add(nonnumeric, f"non-numeric value in {colname!r}", colname, col)
    ctx.rej.add(infinite, f"infinite value in {colname!r}", colname, col)
    values = np.where(np.isfinite(values), values, np.nan)
    return values, unit, col


def _parse_sexagesimal(strings, hours):
    import pandas as pd

    parts = pd.Series(strings).str.extract(_SEXAGESIMAL)
    sign = np.where(parts[0].to_numpy() == "-", -1.0, 1.0)
    d = pd.to_numeric(parts[1], errors="coerce").to_numpy(dtype=float)
    m = pd.to_numeric(parts[2], errors="coerce").to_numpy(dtype=float)
    s = pd.to_numeric(parts[3], errors="coerce").to_numpy(dtype=float)
    ok = (m < 60) & (s < 60)
    val = np.where(ok, sign * (d + m / 60.0 + s / 3600.0), np.nan)
    return val * 15.0 if hours else val


def _as_unit(unit):
    """An astropy unit from a column unit, retrying in lower case (FITS files write 'KPC', 'Mas')."""
    unit = u.Unit(unit, parse_strict="silent")
    if isinstance(unit, u.UnrecognizedUnit):
        unit = u.Unit(str(unit).strip().lower())
    return unit


def _to_unit(values, unit, target, colname, ctx, what):
    """Convert ``values`` from a column unit to ``target``; None means no unit."""
    if unit is None:
        return values
    try:
        unit = _as_unit(unit)
        return values * unit.to(target)
    except (ValueError, TypeError, u.UnitsError):
        raise CatalogError(
            f"Column {colname!r} in {ctx.desc} has unit {str(unit)!r}, which is not {what}. "
            f"Hint: fix the column's unit or map the column to the right role with columns={{...}}."
        ) from None


def _positions(table, cols, ctx):
    """Galactic l, b in deg (NaN where rejected) and the mask of rows with a usable position."""
    if "l" in cols:
        lc, bc = cols["l"], cols["b"]
        l, lu, lraw = _numeric(table, lc, ctx)
        b, bu, braw = _numeric(table, bc, ctx)
        l = _to_unit(l, lu, u.deg, lc, ctx, "an angle")
        b = _to_unit(b, bu, u.deg, bc, ctx, "an angle")
        ctx.rej.add(np.abs(b) > 90, f"{bc!r} outside [-90, 90] deg", bc, braw)
        ctx.rej.add((l < -180) | (l > 360), f"{lc!r} outside [-180, 360] deg", lc, lraw)
        ok = ctx.rej.code < 0
        l = np.where(ok, np.mod(l, 360.0), np.nan)
        b = np.where(ok, b, np.nan)
    else:
        rc, dc = cols["ra"], cols["dec"]
        ra, ru, rraw = _numeric(table, rc, ctx, sexagesimal="hour")
        dec, du, draw = _numeric(table, dc, ctx, sexagesimal="deg")
        ra = _to_unit(ra, ru, u.deg, rc, ctx, "an angle")
        dec = _to_unit(dec, du, u.deg, dc, ctx, "an angle")
        ctx.rej.add(np.abs(dec) > 90, f"{dc!r} outside [-90, 90] deg", dc, draw)
        ctx.rej.add((ra < 0) | (ra > 360), f"{rc!r} outside [0, 360] deg", rc, rraw)
        ok = ctx.rej.code < 0
        l = np.full(ctx.n, np.nan)
        b = np.full(ctx.n, np.nan)
        if ok.any():
            gal = SkyCoord(ra=ra[ok] * u.deg, dec=dec[ok] * u.deg, frame="icrs").galactic
            l[ok] = np.mod(gal.l.deg, 360.0)
            b[ok] = gal.b.deg
        ctx.assumptions.append(
            f"ra/dec ({rc!r}, {dc!r}) taken as ICRS and converted to Galactic l, b with astropy.coordinates"
        )
    if l.size:
        l = np.where(l >= 360.0, 0.0, l)
    return l, b, ok


def _zero_point(zp):
    if isinstance(zp, u.Quantity):
        try:
            return float(zp.to_value(u.mas))
        except u.UnitConversionError:
            raise param_error("parallax_zero_point", "an angle such as -0.017 * u.mas", zp) from None
    return check_real("parallax_zero_point", zp, -10.0, 10.0)


def _check_limits(reject_limits):
    limits = {k: tuple(v) for k, v in DEFAULT_REJECT_LIMITS.items()}
    if reject_limits is None:
        return limits
    if not isinstance(reject_limits, dict):
        raise param_error("reject_limits", "a dict like {'ebv': (-0.3, 20.0), 'distance': (0, 2e5)}", reject_limits)
    for k, v in reject_limits.items():
        if k not in limits:
            raise param_error("reject_limits", f"a dict with keys among {', '.join(limits)}", k)
        try:
            lo, hi = v
            if isinstance(lo, u.Quantity) or isinstance(hi, u.Quantity):
                unit = u.pc if k == "distance" else u.mag
                lo = u.Quantity(lo).to_value(unit)
                hi = u.Quantity(hi).to_value(unit)
            lo, hi = float(lo), float(hi)
        except (TypeError, ValueError, u.UnitsError):
            raise param_error(f"reject_limits['{k}']", "a (low, high) pair of numbers", v) from None
        if not lo < hi:
            raise param_error(f"reject_limits['{k}']", "a (low, high) pair with low < high", v)
        limits[k] = (lo, hi)
    return limits


def _error_values(table, cols, key, ctx, default, value_desc, default_desc):
    """Error column values (NaN where missing/zero is replaced by ``default``), negative ones rejected."""
    colname = cols.get(key)
    if colname is None:
        if ctx.quiet_default_errors:
            return np.broadcast_to(default, (ctx.n,)).astype(float), None, None
        ctx.note(
            AssumptionWarning,
            f"No error column for {value_desc}; using the default {default_desc} for every row.",
        )
        return np.broadcast_to(default, (ctx.n,)).astype(float), None, None
    col = table[colname]
    # errors: missing/zero -> default, negative -> reject (do not reject missing errors)
    sub = _Context(table, ctx.desc)
    vals, unit, raw = _numeric(table, colname, sub)
    # non-numeric text in an error column is bad input, reject those rows
    for k, (reason, c, r) in enumerate(sub.rej.reasons):
        if reason.startswith("non-numeric") or reason.startswith("infinite"):
            ctx.rej.add(sub.rej.code == k, reason, c, r)
    ctx.rej.add(vals < 0, f"negative error in {colname!r}", colname, col)
    fill = ~(vals > 0)
    fill &= ctx.rej.code < 0
    vals = np.where(np.isfinite(vals) & (vals > 0), vals, np.nan)
    if fill.any() and not ctx.quiet_default_errors:
        ctx.note(
            AssumptionWarning,
            f"{int(fill.sum())} rows have an empty or zero error in {colname!r}; using the default "
            f"{default_desc} for them.",
        )
    return np.where(np.isnan(vals), default, vals), unit, colname


def _modulus_to_distance(mu, mu_err):
    """d = 10^(mu/5 + 1) pc; sigma_d = d ln(10)/5 sigma_mu."""
    with np.errstate(over="ignore", invalid="ignore"):
        d = 10.0 ** (mu / 5.0 + 1.0)
        return d, d * np.log(10.0) / 5.0 * mu_err


def _distance_unit_arg(distance_unit):
    if distance_unit is None:
        return None
    try:
        unit = u.Unit(distance_unit)
        unit.to(u.pc)
    except (ValueError, TypeError, u.UnitsError):
        raise param_error("distance_unit", "a length unit such as 'pc' or 'kpc'", distance_unit) from None
    return unit


def _name_unit(colname):
    n = _norm(colname)
    if n.endswith("kpc"):
        return u.kpc
    if n.endswith("pc"):
        return u.pc
    return None


def _distances(table, cols, ctx, distance_unit, frac, zp, limits, av, av_err):
    """Distance and error in pc (NaN where rejected), and the apparent modulus and its error if used."""
    dunit_arg = _distance_unit_arg(distance_unit)
    lo, hi = limits["distance"]
    kind = next(k for k in _DISTANCE_LIKE if k in cols)
    colname = cols[kind]
    vals, unit, raw = _numeric(table, colname, ctx)
    mu_default = 5.0 / np.log(10.0) * frac
    frac_desc = f"{100 * frac:g}% of the distance (default_distance_frac_err)"
    if kind == "distance":
        if dunit_arg is not None:
            unit_used, how = dunit_arg, "the distance_unit argument"
        elif unit is not None:
            try:
                unit_used, how = _as_unit(unit), "the column's unit"
                unit_used.to(u.pc)
            except (ValueError, TypeError, u.UnitsError):
                hint = (
                    f" It looks like a magnitude: if it is a distance modulus, use columns={{'distance_modulus': {colname!r}}}."
                    if str(unit).strip().lower().startswith("mag")
                    else ""
                )
                raise CatalogError(
                    f"Column {colname!r} in {ctx.desc} has unit {str(unit)!r}, which is not a length.{hint} "
                    "Hint: or pass distance_unit='pc'/'kpc' to override it."
                ) from None
        elif _name_unit(colname) is not None:
            unit_used, how = _name_unit(colname), "the column name"
        else:
            unit_used, how = u.pc, None
            good = vals[np.isfinite(vals) & (vals > 0)]
            med = float(np.median(good)) if good.size else np.nan
            msg = (
                f"Column {colname!r} has no unit; assuming the distances are in pc. "
                "Pass distance_unit='kpc' (or give the column a unit) if not."
            )
            if np.isfinite(med) and med < _KPC_HINT_MEDIAN:
                msg += (
                    f" The median value is {med:.3g}, which looks like kpc (a median distance below "
                    f"{_KPC_HINT_MEDIAN:g} pc is unusual): pass distance_unit='kpc' if so."
                )
            ctx.note(AssumptionWarning, msg)
        if how is not None:
            ctx.assumptions.append(f"distance column {colname!r} in {unit_used} (from {how})")
        scale = unit_used.to(u.pc)
        d = vals * scale
        ctx.rej.add(d <= 0, f"distance <= 0 in {colname!r}", colname, raw)
        err, eunit, ecol = _error_values(
            table, cols, "distance_err", ctx, np.nan, f"the distance {colname!r}", frac_desc
        )
        if ecol is not None:
            escale = scale
            if eunit is not None and dunit_arg is None:
                try:
                    escale = _as_unit(eunit).to(u.pc)
                except (ValueError, TypeError, u.UnitsError):
                    escale = scale
            err = err * escale
        d_err = np.where(np.isnan(err), frac * d, err)
    elif kind in ("distance_modulus", "apparent_modulus"):
        label = "true distance modulus" if kind == "distance_modulus" else "apparent V modulus"
        err, _, _ = _error_values(
            table, cols, f"{kind}_err", ctx, mu_default, f"the {label} {colname!r}",
            f"{mu_default:.3f} mag (= {100 * frac:g}% in distance, default_distance_frac_err)",
        )
        if kind == "apparent_modulus":
            mu = vals - av
            mu_err = np.hypot(err, av_err)
            ctx.assumptions.append(
                "true modulus = apparent V modulus - A_V; their errors added in quadrature (as independent)"
            )
        else:
            mu, mu_err = vals, err
        d, d_err = _modulus_to_distance(mu, mu_err)
    else:  # parallax
        if unit is not None:
            plx = _to_unit(vals, unit, u.mas, colname, ctx, "an angle (parallax)")
            pscale = _as_unit(unit).to(u.mas)
        else:
            plx, pscale = vals, 1.0
            ctx.note(AssumptionWarning, f"Parallax column {colname!r} has no unit; assuming mas.")
        corr = plx - zp
        zp_text = f" - zero point ({zp:g} mas)" if zp != 0 else ""
        ctx.rej.add(corr <= 0, f"parallax{zp_text} <= 0 in {colname!r}", colname, raw)
        err, eunit, ecol = _error_values(
            table, cols, "parallax_err", ctx, np.nan, f"the parallax {colname!r}",
            f"{100 * frac:g}% of the parallax (default_distance_frac_err)",
        )
        if ecol is not None and eunit is not None:
            try:
                pscale = _as_unit(eunit).to(u.mas)
            except (ValueError, TypeError, u.UnitsError):
                pass
        err = np.where(np.isnan(err), frac * corr, err * pscale)
        with np.errstate(divide="ignore", invalid="ignore"):
            d = 1000.0 / corr
            d_err = 1000.0 * err / corr**2
            fe = err / corr
        ok_now = ctx.rej.code < 0
        noisy = ok_now & (fe > _PARALLAX_WARN_FRAC)
        if noisy.any():
            ctx.note(
                AssumptionWarning,
                f"{int(noisy.sum())} of {int(ok_now.sum())} usable parallaxes in {colname!r} have a fractional "
                f"error above {100 * _PARALLAX_WARN_FRAC:g}%: there 1/parallax is a biased and noisy distance "
                "estimator (Bailer-Jones 2015, PASP 127, 994). They are kept; consider prior-based distances, "
                "or drop them with TracerSet.subset().",
            )
        if zp != 0:
            ctx.assumptions.append(f"parallax zero point {zp:g} mas subtracted before d = 1000 / parallax")
    ok_now = ctx.rej.code < 0
    d = np.where(ok_now, d, np.nan)
    outside = ok_now & ~((d > lo) & (d <= hi))
    word = "in" if kind == "distance" else "from"
    ctx.rej.add(outside, f"distance {word} {colname!r} outside ({lo:g}, {hi:g}] pc", colname, raw)
    d = np.where(ctx.rej.code < 0, d, np.nan)
    d_err = np.where(np.isfinite(d), d_err, np.nan)
    if kind == "apparent_modulus":
        return d, d_err, vals, err
    return d, d_err, None, None


# ======================================================================================
# Reddening
# ======================================================================================


def _check_law(law, rv):
    """Validate the law name and R_V through dustkit.laws (when present); return (law, rv)."""
    if not isinstance(law, str) or not law.strip():
        raise param_error("law", "the name of an extinction law, e.g. 'ccm89'", law)
    try:
        from . import laws as _laws
    except ImportError:
        return law, rv
    if hasattr(_laws, "get_law"):
        obj = _laws.get_law(law)
        if hasattr(obj, "check_rv"):
            rv = float(obj.check_rv(rv))
        name = getattr(obj, "name", None)
        if isinstance(name, str) and name:
            law = name
    return law, rv


def _color_tuple(excess_color):
    if excess_color is None:
        return None
    if isinstance(excess_color, str):
        parts = re.split(r"\s*-\s*", excess_color.strip().strip("()"))
        if len(parts) == 2 and all(parts):
            return (parts[0], parts[1])
    elif isinstance(excess_color, (tuple, list)) and len(excess_color) == 2:
        return (str(excess_color[0]), str(excess_color[1]))
    raise param_error("excess_color", "a (blue, red) pair of band names such as ('BP', 'RP') or 'BP-RP'", excess_color)


def _parse_color_name(colname):
    """(blue, red) from a column name such as 'E(BP-RP)', via dustkit.bands where available."""
    try:
        from . import bands as _bands
    except ImportError:
        _bands = None
    if _bands is not None and hasattr(_bands, "parse_excess_name"):
        try:
            blue, red = _bands.parse_excess_name(colname)
            return str(blue), str(red)
        except Exception:
            pass
    m = _EXCESS_NAME.match(colname)
    if m:
        return m.group(1), m.group(2)
    return None


def _is_bv(color):
    return color is not None and color[0].upper() == "B" and color[1].upper() == "V"


def _reddening_to_av(kind, color, excess, excess_err, law, rv):
    """A_V and its error from the reddening as given."""
    excess = np.asarray(excess, dtype=float)
    excess_err = np.asarray(excess_err, dtype=float)
    if kind == "A_V":
        return excess.copy(), excess_err.copy()
    if kind == "E(B-V)":
        return rv * excess, rv * excess_err
    try:
        from . import bands as _bands
    except ImportError:
        _bands = None
    if _bands is None or not hasattr(_bands, "excess_to_av"):
        raise CatalogError(
            f"Converting {kind} to A_V needs dustkit.bands.excess_to_av, which is not available in this "
            "installation. Hint: give E(B-V) or A_V instead."
        )
    av, av_err = _bands.excess_to_av(excess, excess_err, color[0], color[1], law=law, rv=rv)
    av = av.to_value(u.mag) if isinstance(av, u.Quantity) else np.asarray(av, dtype=float)
    av_err = av_err.to_value(u.mag) if isinstance(av_err, u.Quantity) else np.asarray(av_err, dtype=float)
    return np.broadcast_to(av, excess.shape).astype(float), np.broadcast_to(av_err, excess.shape).astype(float)


def _reddening(table, cols, ctx, law, rv, default_err, limits, excess_color):
    """Return (excess, excess_err, kind, color, av, av_err); NaN where rejected."""
    role = next(k for k in _REDDENING_LIKE if k in cols)
    colname = cols[role]
    vals, _, raw = _numeric(table, colname, ctx)
    if role == "ebv":
        kind, color = "E(B-V)", ("B", "V")
    elif role == "av":
        kind, color = "A_V", None
    else:
        color = _color_tuple(excess_color) or _parse_color_name(colname)
        if color is None:
            raise CatalogError(
                f"Cannot tell which colour excess column {colname!r} holds. "
                "Hint: pass excess_color=('BP', 'RP') (the blue and red band), or name the column like 'E(BP-RP)'."
            )
        if _is_bv(color):
            kind, color = "E(B-V)", ("B", "V")
        else:
            kind = f"E({color[0]}-{color[1]})"
    # A_V per unit of excess, for the default error and the limits
    per_unit, _ = _reddening_to_av(kind, color, np.ones(1), np.zeros(1), law, rv)
    k = float(per_unit[0])
    if not np.isfinite(k) or k <= 0:
        raise CatalogError(f"The {kind} -> A_V conversion factor for law {law!r}, R_V = {rv:g} is {k!r}; cannot use it.")
    default = rv * default_err / k
    err, _, _ = _error_values(
        table, cols, f"{role}_err", ctx, default, f"the reddening {colname!r} ({kind})",
        f"{default:.3g} mag in {kind} (default_excess_err = {default_err:g} mag of E(B-V))",
    )
    av, av_err = _reddening_to_av(kind, color, vals, err, law, rv)
    lo, hi = limits["ebv"]
    ebv_eq = av / rv
    ok_now = ctx.rej.code < 0
    bad = ok_now & ((ebv_eq < lo) | (ebv_eq > hi))
    if kind == "E(B-V)":
        reason = f"E(B-V) in {colname!r} outside [{lo:g}, {hi:g}] mag"
    else:
        reason = (
            f"{kind} in {colname!r} outside the A_V range [{rv * lo:.3g}, {rv * hi:.3g}] mag "
            f"(E(B-V) limits [{lo:g}, {hi:g}] times R_V)"
        )
    ctx.rej.add(bad, reason, colname, raw)
    return vals, err, kind, (None if kind == "A_V" else color), av, av_err


# ======================================================================================
# Assembly
# ======================================================================================


def _names(table, cols):
    n = len(table)
    if "name" not in cols:  # "row <i>", made only when someone asks (TracerSet.name)
        return None
    col = table[cols["name"]]
    data = np.asarray(col.data.data if isinstance(col, MaskedColumn) else getattr(col, "value", col))
    if data.dtype.kind == "S":
        data = np.char.decode(data, "utf-8", "replace")
    names = data.astype(str)
    empty = names == ""
    if isinstance(col, MaskedColumn):
        empty |= np.ma.getmaskarray(col)
    if empty.any():
        names = names.astype(object)
        idx = np.flatnonzero(empty)
        names[idx] = np.char.add("row ", idx.astype(str))
        names = names.astype(str)
    return names


def _build_tracers(
    table,
    *,
    columns,
    distance_unit,
    law,
    rv,
    parallax_zero_point,
    default_distance_frac_err,
    default_excess_err,
    reject_limits,
    excess_color,
    source_desc,
    file_sha,
):
    rv = check_real("rv", rv, 0.0, np.inf, low_inclusive=False)
    law, rv = _check_law(law, rv)
    frac = check_real("default_distance_frac_err", default_distance_frac_err, 0.0, np.inf, low_inclusive=False)
    default_err = check_real("default_excess_err", default_excess_err, 0.0, np.inf, low_inclusive=False)
    zp = _zero_point(parallax_zero_point)
    limits = _check_limits(reject_limits)
    ctx = _Context(table, source_desc)
    cols = _resolve_columns(table, columns, ctx, want_reddening=True)
    n = ctx.n
    if n == 0:
        raise CatalogError(f"{source_desc} has no rows; nothing to read.")
    l, b, _ = _positions(table, cols, ctx)
    excess, excess_err, kind, color, av, av_err = _reddening(
        table, cols, ctx, law, rv, default_err, limits, excess_color
    )
    d, d_err, app, app_err = _distances(table, cols, ctx, distance_unit, frac, zp, limits, av, av_err)
    names = _names(table, cols)
    keep = ctx.rej.code < 0
    rejected = ctx.rej.table(names)
    if not keep.any():
        raise CatalogError(
            f"No usable tracer in {source_desc}: all {n} rows were rejected ({ctx.rej.reason_text()}). "
            f"Columns used: {', '.join(f'{k}={v!r}' for k, v in cols.items())}. "
            "Hint: check the column recognition (columns={...}), the units and reject_limits."
        )
    if len(rejected):
        ctx.note(
            RowsRejectedWarning,
            f"{len(rejected)} of {n} rows rejected: {ctx.rej.reason_text()}. See TracerSet.rejected for the rows.",
        )
    ctx.assumptions.append(
        {
            "E(B-V)": f"A_V = R_V * E(B-V) with R_V = {rv:g} (law {law!r})",
            "A_V": "A_V taken as given",
        }.get(kind, f"A_V from {kind} through law {law!r} with R_V = {rv:g} (dustkit.bands.excess_to_av)")
    )
    arrays = [l[keep], b[keep], d[keep], d_err[keep], av[keep], av_err[keep]]
    kept_names = None if names is None else names[keep].astype("U", copy=False)
    meta = ctx.meta(file_sha, arrays + [np.flatnonzero(keep) if kept_names is None else kept_names])
    ts = TracerSet(
        l=arrays[0],
        b=arrays[1],
        distance=arrays[2],
        distance_err=arrays[3],
        av=arrays[4],
        av_err=arrays[5],
        name=kept_names,
        excess=excess[keep],
        excess_err=excess_err[keep],
        excess_kind=kind,
        law=law,
        rv=rv,
        rejected=rejected,
        meta=meta,
        row=np.flatnonzero(keep),
        distance_kind=_KIND_LABEL[next(k for k in _DISTANCE_LIKE if k in cols)],
        excess_color=color,
        apparent_modulus=None if app is None else app[keep],
        apparent_modulus_err=None if app_err is None else app_err[keep],
    )
    return ts, ctx.notes


def _longitude_span(l):
    """Smallest arc [lo, hi] (deg, possibly wrapping through 0) containing all longitudes.

    Returns (0, 360) when no gap between neighbouring longitudes reaches 10 deg.
    """
    s = np.sort(np.mod(np.asarray(l, dtype=float), 360.0))
    if s.size == 0:
        return np.nan, np.nan
    if s.size == 1:
        return float(s[0]), float(s[0])
    gaps = np.diff(np.concatenate([s, [s[0] + 360.0]]))
    k = int(np.argmax(gaps))
    if gaps[k] < 10.0:  # no gap of 10 deg: report all longitudes
        return 0.0, 360.0
    lo = s[(k + 1) % s.size]
    hi = s[k]
    return float(lo), float(hi)
