"""The validated sets: TracerSet (tracers with A_V) and TargetList (positions and distances wanted)."""

from dataclasses import dataclass, field, replace

import numpy as np
from astropy import units as u
from astropy.table import QTable, Table

from .._lib.validation import check_real, param_error
from .assemble import build_tracers
from .context import emit, empty_duplicates, empty_rejected, row_names
from .distances import modulus_to_distance
from .reddening import reddening_to_av
from .rules import DEFAULT_DISTANCE_FRAC_ERR, DEFAULT_EXCESS_ERR, check_law

__all__ = [
    "TracerSet",
    "TargetList",
    "input_column_name",
]


_SUMMARY_NSIDE = 64


_CAUTION = (
    "Extinction estimates are statistical; check them against local data before "
    "using them for science or instrument time."
)


def input_column_name(colnames, name):
    """The name an input column called ``name`` takes when an output column of that name is added:
    ``input_<name>``, or ``input_<name>_2``, ``_3``, ... when the input has such columns already (a table
    that went through an estimate before holds both ``av`` and ``input_av``)."""
    taken = set(colnames)
    new, k = f"input_{name}", 2
    while new in taken:
        new, k = f"input_{name}_{k}", k + 1
    return new


def frozen(arr, dtype=float):
    a = np.array(arr, dtype=dtype, copy=True)
    a.setflags(write=False)
    return a


class _Names:
    """``TracerSet.name``: the names given, or ``"row <i>"`` made from ``row`` on first use.

    Catalogues of millions of field stars rarely carry names; making ten million strings
    up front cost seconds and gigabytes for nothing.
    """

    def __get__(self, obj, objtype=None):
        if obj is None:
            return None  # the dataclass default: no names given
        names = obj.__dict__.get("names_of")
        if names is None:
            names = frozen(row_names(obj.row), dtype=str)
            obj.__dict__["names_of"] = names
        return names

    def __set__(self, obj, value):
        obj.__dict__["names_of"] = None if value is None else frozen(value, dtype=str)


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
    av_distance_corr : ndarray
        Correlation coefficient between the error of A_V and the error of ln(distance),
        per tracer (0 where independent). From an apparent V modulus mu0 = (m-M)_V - A_V,
        so delta mu0 = -R_V delta E(B-V): corr = -sigma_AV / sqrt(sigma_(m-M)V^2 + sigma_AV^2).
        From an input column ``ebv_mu0_corr`` (corr of E(B-V) and a true modulus) the value
        is kept (ln d = mu0 ln10/5 + const, A_V = R_V E(B-V): both positive multiples).
    distance_err_low, distance_err_high : ndarray or None
        Distances from parallaxes: mode minus 16th percentile and 84th percentile minus
        mode of the distance posterior, pc (the lower one 0 where a skewed posterior has
        its mode below the 16th percentile); ``distance_err`` is half the 16th-84th
        percentile range. None for other distances.
    duplicates : `~astropy.table.Table`
        One row per input row that was found to duplicate another: ``group``, ``row``,
        ``name``, ``kind`` (``"exact"`` or ``"near"``), ``merged_into`` (tracer row kept,
        -1 when kept separately).
    temperature : ndarray or None
        Blackbody temperature of each tracer's source star, K, used to turn a colour
        excess other than E(B-V) into A_V through the passbands (from a temperature or
        intrinsic-colour column, else the default source; see :func:`read_tracers`).
        :meth:`with_law` converts with the same temperatures. None when A_V does not
        depend on the star (E(B-V) or A_V input).
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
    rejected: Table = field(default_factory=empty_rejected)
    meta: dict = field(default_factory=dict)
    row: np.ndarray = None
    distance_kind: str = "distance"
    excess_color: tuple = None
    apparent_modulus: np.ndarray = None
    apparent_modulus_err: np.ndarray = None
    av_distance_corr: np.ndarray = None
    distance_err_low: np.ndarray = None
    distance_err_high: np.ndarray = None
    duplicates: Table = None
    temperature: np.ndarray = None

    def __post_init__(self):
        n = np.size(self.l)
        for attr in ("l", "b", "distance", "distance_err", "av", "av_err", "excess", "excess_err"):
            object.__setattr__(self, attr, frozen(getattr(self, attr)))
        row = np.arange(n) if self.row is None else self.row
        object.__setattr__(self, "row", frozen(row, dtype=np.int64))
        if self.av_distance_corr is None:
            object.__setattr__(self, "av_distance_corr", np.zeros(n))
        object.__setattr__(
            self, "av_distance_corr", frozen(np.broadcast_to(np.asarray(self.av_distance_corr, float), (n,)))
        )
        if self.duplicates is None:
            object.__setattr__(self, "duplicates", empty_duplicates())
        for attr in ("apparent_modulus", "apparent_modulus_err", "distance_err_low", "distance_err_high",
                     "temperature"):
            if getattr(self, attr) is not None:
                object.__setattr__(self, attr, frozen(getattr(self, attr)))
        object.__setattr__(self, "rv", float(self.rv))
        given = {a: getattr(self, a) for a in ("b", "distance", "distance_err", "av", "av_err", "excess", "excess_err", "row",
                                               "temperature")}
        given["name"] = self.__dict__.get("names_of")  # None: made from the row numbers when asked
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
    def from_arrays(cls, l, b, distance, distance_err, av, av_err, name=None, law="ccm89", rv=3.1,
                    av_distance_corr=None, duplicates="keep"):
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
        av_distance_corr : array_like, optional
            Correlation of the A_V and ln-distance errors per tracer, in [-1, 1] (default 0).
        duplicates : {'keep', 'merge'}
            Keep duplicated rows (default: arrays are taken as given) or merge them as
            :func:`read_tracers` does.

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
        if av_distance_corr is not None:
            t["ebv_mu0_corr"] = qty(av_distance_corr, u.dimensionless_unscaled, "av_distance_corr").value
        cols = {k: k for k in t.colnames}
        fields, notes = build_tracers(
            t,
            columns=cols,
            distance_unit=None,
            law=law,
            rv=rv,
            parallax_zero_point=0 * u.mas,
            default_distance_frac_err=DEFAULT_DISTANCE_FRAC_ERR,
            default_excess_err=DEFAULT_EXCESS_ERR,
            reject_limits=None,
            excess_color=None,
            source_desc="arrays (TracerSet.from_arrays)",
            file_sha=None,
            duplicates=duplicates,
        )
        emit(notes)
        return cls(**fields)

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
            name=None if self.__dict__.get("names_of") is None else self.name[sel],
            excess=self.excess[sel],
            excess_err=self.excess_err[sel],
            row=self.row[sel],
            apparent_modulus=None if self.apparent_modulus is None else self.apparent_modulus[sel],
            apparent_modulus_err=None if self.apparent_modulus_err is None else self.apparent_modulus_err[sel],
            av_distance_corr=self.av_distance_corr[sel],
            distance_err_low=None if self.distance_err_low is None else self.distance_err_low[sel],
            distance_err_high=None if self.distance_err_high is None else self.distance_err_high[sel],
            temperature=None if self.temperature is None else self.temperature[sel],
            meta=meta,
        )

    def av_ratio(self, other):
        """Median of these tracers' A_V over ``other``'s, row by row where ``other``'s is positive (1.0 if none is).

        The scale between two conversions of the same tracers (another law or R_V,
        :meth:`with_law`), by which a layer given in A_V of the first is carried to the second.
        """
        old, new = np.asarray(other.av, float), np.asarray(self.av, float)
        ok = old > 0
        return float(np.median(new[ok] / old[ok])) if ok.any() else 1.0

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
            ``dustkit.bands.excess_to_av`` with the tracers' own source temperatures
            (``temperature``, as at reading); for A_V input, A_V does not change.
            Where the distance came from an apparent V modulus, mu0 = (m-M)_V - A_V
            is recomputed with the new A_V.
        """
        rv = check_real("rv", rv, 0.0, np.inf, low_inclusive=False)
        law, rv = check_law(law, rv)
        av, av_err = reddening_to_av(self.excess_kind, self.excess_color, self.excess, self.excess_err, law, rv,
                                     temperature=self.temperature)
        changes = dict(av=av, av_err=av_err, law=law, rv=rv)
        if self.apparent_modulus is not None:
            d, d_err = modulus_to_distance(
                self.apparent_modulus - av, np.hypot(self.apparent_modulus_err, av_err)
            )
            with np.errstate(invalid="ignore", divide="ignore"):
                corr = -av_err / np.hypot(self.apparent_modulus_err, av_err)
            changes.update(distance=d, distance_err=d_err, av_distance_corr=np.where(np.isfinite(corr), corr, 0.0))
        meta = dict(self.meta)
        meta["assumptions"] = list(meta.get("assumptions", [])) + [
            f"A_V re-derived from {self.excess_kind} with law {law!r}, R_V = {rv:g} "
            f"(was {self.law!r}, R_V = {self.rv:g})"
        ]
        changes["meta"] = meta
        changes["name"] = self.__dict__.get("names_of")  # None: still made from the row numbers
        return replace(self, **changes)

    # ----------------------------------------------------------------------------------
    def to_table(self):
        """Return the tracers as a ``QTable`` with units (deg, pc, mag).

        Columns: ``row``, ``name``, ``l``, ``b``, ``distance``, ``distance_err``,
        ``av``, ``av_err``, ``excess``, ``excess_err``, ``av_distance_corr`` (and
        ``distance_err_low``/``distance_err_high`` for parallaxes, ``temperature`` in K where
        the conversion used one). ``meta`` carries the law,
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
        t["av_distance_corr"] = np.array(self.av_distance_corr)
        if self.distance_err_low is not None:
            t["distance_err_low"] = self.distance_err_low * u.pc
            t["distance_err_high"] = self.distance_err_high * u.pc
        if self.temperature is not None:
            t["temperature"] = self.temperature * u.K
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
        from .._lib.healpix import ang2pix, pixarea_deg2
        from .._lib.validation import check_nside

        nside = check_nside(nside)
        if len(self) == 0:
            return 0 * u.deg**2, 0
        npix = int(np.unique(ang2pix(nside, self.l, self.b)).size)
        return npix * pixarea_deg2(nside) * u.deg**2, npix

    def summary(self):
        """A plain-text summary: count, sky coverage, distances, A_V, rejected rows, assumptions."""
        n = len(self)
        # the rejected rows themselves, or (tracers of a loaded model file) the record of their count
        if len(self.rejected):
            reasons, counts = np.unique(np.asarray(self.rejected["reason"]), return_counts=True)
            kept_rows = True
        else:
            record = self.meta.get("rejected_by_reason") or {}
            reasons, counts = np.array(list(record), dtype=str), np.array(list(record.values()), dtype=int)
            kept_rows = False
        n_rejected = int(counts.sum()) if counts.size else 0
        lines = [
            f"TracerSet: {n} tracers from {self.meta.get('source', 'unknown source')} "
            f"({self.meta.get('n_input', n)} input rows, {n_rejected} rejected)"
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
        if len(self.duplicates):
            n_groups = int(np.unique(np.asarray(self.duplicates["group"])).size)
            n_scaled = int(self.meta.get("n_scaled_groups", 0))
            scaled = f"; errors of {n_scaled} scaled up, their values disagree" if n_scaled else ""
            how = (f"merged ({self.meta.get('n_merged', 0)} rows folded in{scaled})"
                   if self.meta.get("duplicates", "merge") == "merge" else "kept")
            lines.append(f"  Duplicates: {len(self.duplicates)} rows in {n_groups} groups, {how} (see .duplicates)")
        elif self.meta.get("duplicates") == "keep":
            lines.append("  Duplicates: not searched (duplicates='keep': rows taken as given)")
        if n_rejected:
            lines.append(f"  Rejected:  {n_rejected} rows " + ("(see .rejected)" if kept_rows else
                                                            "(as read; the rows themselves are not kept in a model file)"))
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
    rejected: Table = field(default_factory=empty_rejected)
    meta: dict = field(default_factory=dict)

    def __post_init__(self):
        for attr in ("l", "b", "distance", "distance_err"):
            object.__setattr__(self, attr, frozen(getattr(self, attr)))
        object.__setattr__(self, "valid", frozen(self.valid, dtype=bool))

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
                t.rename_column(c, input_column_name(t.colnames, c))
            t[c] = vals * unit if unit is not None else np.array(vals)
        return t


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
