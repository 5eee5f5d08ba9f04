"""The readers: read_tracers and read_targets from files, astropy tables or pandas DataFrames."""

import hashlib
import os
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from astropy import units as u
from astropy.table import MaskedColumn, Table

from ..exceptions import AssumptionWarning, CatalogError, RowsRejectedWarning
from ..laws import get_law
from .._lib.formats import CATALOGUE_FORMATS, format_for, parquet_parts, suffixes
from .._lib.validation import check_real, param_error
from .arrow import plain_parquet, read_parquet
from .assemble import build_tracers
from .columns import resolve_columns
from .context import Context, emit, empty_rejected
from .distances import distances
from .rules import (
    DEFAULT_DISTANCE_FRAC_ERR,
    DEFAULT_EXCESS_ERR,
    DUPLICATE_SEPARATION_ARCSEC,
    PARALLAX_ERR_FLOOR,
    PARALLAX_LENGTH_SCALE,
    check_limits,
    check_modulus_kind,
    zero_point,
)
from .sets import TargetList, TracerSet
from .values import COOSYS_META, names_of, positions

__all__ = [
    "SUFFIX_FORMATS",
    "TargetTemperatures",
    "target_temperatures",
    "catalogue_rows",
    "read_tracers",
    "read_targets",
]


#: File suffix -> astropy ``Table.read`` format: the catalogue formats of the registry
#: (``dustkit._lib.formats``); add a suffix there to support a new format everywhere.
SUFFIX_FORMATS = CATALOGUE_FORMATS


def read_tracers(
    source,
    *,
    columns=None,
    distance_unit=None,
    law="ccm89",
    rv=3.1,
    parallax_zero_point=0 * u.mas,
    default_distance_frac_err=DEFAULT_DISTANCE_FRAC_ERR,
    default_excess_err=DEFAULT_EXCESS_ERR,
    reject_limits=None,
    excess_color=None,
    format=None,
    distance_modulus_kind=None,
    parallax_err_floor=PARALLAX_ERR_FLOOR * u.mas,
    parallax_length_scale=PARALLAX_LENGTH_SCALE * u.kpc,
    duplicates="merge",
    source_temperature=None,
    intrinsic_color_bands=None,
    duplicate_separation=DUPLICATE_SEPARATION_ARCSEC * u.arcsec,
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
        ``{"name": None}`` reads no name column (no rows are one tracer by their name).
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
    distance_modulus_kind : {None, 'true', 'apparent'}
        What a modulus column whose name does not say it (``dm``, ``distmod``,
        ``modulus``, ``distance_modulus``) holds: the true modulus mu0 or the apparent
        V modulus (m-M)_V = mu0 + A_V. None (default): such a column stops the read
        with a ``CatalogError`` instead of a guess.
    parallax_err_floor : Quantity['angle'] or float
        Systematic floor added in quadrature to parallax errors (0.01 mas; from memory
        of Gaia EDR3 validation work; it matters for cluster-mean parallaxes).
    parallax_length_scale : Quantity['length'] or float
        Length scale of the exponentially decreasing space density prior (1.35 kpc;
        plain numbers in kpc).
    duplicates : {'merge', 'keep'}
        Rows that repeat a tracer (exact copies; the same name within 30 arcmin; or positions within
        1 arcsec with distance and A_V within their errors) are merged into one tracer
        by inverse-variance means (default; errors scaled up by S = sqrt(chi2 / (N - 1)) where
        the measurements disagree, counted in ``meta["n_scaled_groups"]``) or kept. Either
        way the groups are listed in ``TracerSet.duplicates``.
    source_temperature : Quantity['temperature'], optional
        Blackbody temperature of the source star for rows without their own temperature
        or intrinsic colour (default 5800 K, ``dustkit.bands.DEFAULT_TEMPERATURE``). Used
        only to turn a colour excess other than E(B-V) into A_V (see Notes).
    intrinsic_color_bands : tuple of str or str, optional
        ``(blue, red)`` bands (or ``"BP-RP"``) of an ``intrinsic_color`` column whose name
        does not say it (names like ``(BP-RP)_0`` or ``bp_rp0`` say it).
        ``'merge'`` (default): rows that repeat a tracer (exact copies; the same name within
        ``SAME_NAME_SEPARATION_ARCMIN``, 30 arcmin, on the sky, farther apart kept apart and reported; or
        positions within ``duplicate_separation`` with distance *and* A_V within 2 sigma of
        their combined errors) are merged into one tracer by inverse-variance means (each
        merged error scaled up by S = sqrt(chi2 / (N - 1)) where S > 1: the measurements
        disagree beyond their errors), and the groups listed in ``TracerSet.duplicates``. ``'keep'``: the rows are taken as given,
        with no search for duplicates (and so no report).
    duplicate_separation : Quantity['angle'] or float
        Sky separation within which two rows may be one tracer (1 arcsec; plain numbers in
        arcsec; 0: only names and exact copies). Distinct stars of a crowded field closer
        than this stay apart unless their distances and A_V agree within their errors.

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
    from an apparent V modulus (errors of (m-M)_V and A_V added in quadrature, and
    their anti-correlation kept in ``av_distance_corr``); from a parallax, the mode
    of the posterior under the exponentially decreasing space density prior
    (Bailer-Jones 2015, PASP 127, 994), for every parallax including <= 0, with the
    16th and 84th percentiles in ``distance_err_low``/``distance_err_high``.
    A bare distance column with a median below 30 stops the read (kpc taken as pc).

    Rejected rows: missing (empty/NaN) or non-numeric values in a used column,
    |b| > 90 or |dec| > 90, ra outside [0, 360], l outside [-180, 360],
    distance <= 0 or beyond the distance limit, parallax - zero point <= 0 without
    an error, negative errors, and reddening outside the limits (E(B-V) < -0.3 or > 20 by
    default). Slightly negative reddening (e.g. E(B-V) = -0.05) is kept: it is
    measurement noise around zero and removing it would bias A_V upwards.
    Empty or zero errors are replaced by the defaults (with a warning).
    Equatorial columns are taken as ICRS (FK5 J2000 differs by < 0.1 arcsec).

    Reddening -> A_V: A_V = R_V E(B-V) for E(B-V) under every law (the one E(B-V)
    convention of :mod:`dustkit.bands`), whatever the star. Another colour excess
    (E(BP-RP), E(J-Ks), E(G-RP), ...) is converted through the passbands of its two
    bands for the row's star: its temperature from a column ``temperature`` (``teff``,
    ``T_eff``, ``Teff_K``, ``teff_gspphot``, ``logTeff`` in log10 K, ...) or, failing
    that, its intrinsic colour from a column ``intrinsic_color`` (``(BP-RP)_0``,
    ``bp_rp0``, ``(B-V)_0``, ``intrinsic_BP-RP``; a blackbody of the same colour,
    :func:`dustkit.bands.colour_temperature`). Rows without a value, and catalogues
    without such a column, use ``source_temperature`` (announced with an
    ``AssumptionWarning``). Text or infinite values and temperatures <= 0 reject the row;
    values beyond the 2 000-100 000 K of the coefficient tables are set to the nearest
    edge (announced). The temperatures used are kept in ``TracerSet.temperature``.
    """
    table, desc, file_sha = _load(source, format)
    fields, notes = build_tracers(
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
        distance_modulus_kind=distance_modulus_kind,
        parallax_err_floor=parallax_err_floor,
        parallax_length_scale=parallax_length_scale,
        duplicates=duplicates,
        source_temperature=source_temperature,
        intrinsic_color_bands=intrinsic_color_bands,
        duplicate_separation=duplicate_separation,
    )
    for message in table.meta.get(LOAD_NOTES, ()):
        notes.insert(0, (AssumptionWarning, message))
        fields["meta"]["assumptions"] = [message] + list(fields["meta"].get("assumptions", []))
    mismatch = _fitted_under_other_law(table.meta, law, rv)
    if mismatch:
        notes.append((AssumptionWarning, mismatch))
        fields["meta"]["assumptions"] = list(fields["meta"].get("assumptions", [])) + [mismatch]
    emit(notes)
    return TracerSet(**fields)


def _fitted_under_other_law(meta, law, rv):
    """A note when a table of cluster fits says its reddenings were fitted under another law or R_V
    (:func:`dustkit.clusters.fit_clusters` and the explorer's cluster panel record the law, R_V
    and the sequence in the table's metadata), else None.

    A fitted E(B-V) depends a little on the law the fit assumed (its band ratios), and its A_V
    is R_V E(B-V): read under another R_V, the A_V are not those the fit found.
    """
    if not meta or "rv" not in meta or "sequence_source" not in meta:  # not a table of cluster fits
        return None
    try:
        meta_rv = float(meta["rv"])
    except (TypeError, ValueError):
        return None
    meta_law = meta.get("law")
    same_law = True
    if meta_law is not None:
        try:
            same_law = get_law(meta_law).name == get_law(law).name
        except (KeyError, ValueError, TypeError):
            same_law = str(meta_law).lower() == str(law).lower()
    if np.isfinite(meta_rv) and abs(meta_rv - float(rv)) < 1e-9 and same_law:
        return None
    fitted = f"law {meta_law!r}, R_V = {meta_rv:g}" if meta_law is not None else f"R_V = {meta_rv:g}"
    return (f"The catalogue's metadata says its reddenings were fitted under {fitted}; they are read under "
            f"law {str(getattr(law, 'name', law))!r}, R_V = {float(rv):g}, so their A_V = R_V E(B-V) differ from "
            f"the fit's. Hint: pass law= and rv= as the fit had them, unless you mean to convert.")


def read_targets(
    source,
    *,
    columns=None,
    distance_unit=None,
    parallax_zero_point=0 * u.mas,
    default_distance_frac_err=None,
    reject_limits=None,
    format=None,
    distance_modulus_kind=None,
):
    """Read positions and distances at which extinction is wanted.

    Parameters
    ----------
    source : str, path-like, Table, QTable or pandas.DataFrame
        As for :func:`read_tracers`.
    columns : dict, optional
        Explicit mapping for ``name``, ``l``/``b`` or ``ra``/``dec``, ``distance``,
        ``distance_modulus``, ``parallax`` and their ``_err`` keys.
    distance_unit, parallax_zero_point, reject_limits, format, distance_modulus_kind
        As for :func:`read_tracers` (only the ``"distance"`` limit applies). A parallax gives
        d = 1000 / parallax (zero point subtracted), no prior; parallaxes whose error exceeds
        ``PARALLAX_WARN_FRAC`` (20%) of the parallax are counted in an ``AssumptionWarning``.
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
    ctx = Context(table, desc)
    for message in table.meta.get(LOAD_NOTES, ()):
        ctx.note(AssumptionWarning, message)
    ctx.rows_are = "targets"
    ctx.modulus_kind = check_modulus_kind(distance_modulus_kind)
    cols = resolve_columns(table, columns, ctx, want_reddening=False)
    limits = check_limits(reject_limits)
    if default_distance_frac_err is None:
        frac = 0.0
        ctx.quiet_default_errors = True
        ctx.assumptions.append("distances without an error are taken as exact (distance_err = 0)")
    else:
        frac = check_real("default_distance_frac_err", default_distance_frac_err, 0.0, np.inf, low_inclusive=False)
    zp = zero_point(parallax_zero_point)
    n = len(table)
    if n == 0:
        raise CatalogError(f"{desc} has no rows; nothing to read.")
    l, b, _ = positions(table, cols, ctx)
    d, d_err, _, _, _ = distances(table, cols, ctx, distance_unit, frac, zp, limits, None, None, parallax_prior=False)
    valid = ctx.rej.code < 0
    l = np.where(valid, l, np.nan)
    b = np.where(valid, b, np.nan)
    d = np.where(valid, d, np.nan)
    d_err = np.where(valid, d_err, np.nan)
    names = names_of(table, cols)
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
    emit(ctx.notes)
    return tl


@dataclass(frozen=True)
class TargetTemperatures:
    """The targets' star temperatures for band extinctions (:func:`target_temperatures`).

    Attributes
    ----------
    values : ndarray
        K per row: the column's value (set to the tables' edge beyond 2 000-100 000 K), the
        default star for empty cells, NaN for bad cells (their band extinctions stay empty).
    source : str
        What the temperatures are, with the counts (for reports, ``meta["band_temperature"]``).
    rejected : astropy.table.Table
        One row per bad cell: ``row``, ``name``, ``reason``, ``column``, ``value``.
    notes : list of (warning class, message)
        What the read announces: rows with the default star, values set to the edge, bad rows.
    """

    values: np.ndarray
    source: str
    rejected: Table
    notes: list


def target_temperatures(targets, temperature=None):
    """Blackbody temperature (K) of each target's star, for the band extinctions of ``estimate_targets``.

    A broad band's extinction depends on the star behind the dust (Gaia G by up to 30% between a
    cool and a hot star), so each target's band extinction is integrated for its own star.

    Parameters
    ----------
    targets : TargetList or astropy.table.Table
        The targets (a :class:`TargetList` from :func:`read_targets`, or its input table).
    temperature : Quantity['temperature'], str or None
        One temperature, one per row, or the name of a column (in K unless the column has a
        unit; ``log...`` names hold log10 K; a name such as ``(BP-RP)_0`` holds an intrinsic
        colour). None: the column named with ``read_targets(columns={"temperature": ...})`` or
        ``{"intrinsic_color": ...}``, else a recognised temperature column (``teff``, ``T_eff``,
        ``teff_gspphot``, ``logTeff``, ...), else a recognised intrinsic-colour column
        (``(BP-RP)_0``, ``bp_rp0``, ``(B-V)_0``, ...), else the default source
        (:data:`dustkit.bands.DEFAULT_TEMPERATURE`, 5800 K) for every row.

    Returns
    -------
    TargetTemperatures
        A column is read as ``read_tracers`` reads it, with the same checks and the same code
        (:func:`dustkit.tracers.temperatures.temperature_values`; an intrinsic colour through
        :func:`dustkit.tracers.reddening.colour_temperatures`, blackbodies of the same colour):
        text or infinite cells, temperatures <= 0 K and log10 values outside (0, 6) are bad rows
        (NaN, named in ``rejected``), empty cells take 5800 K and values beyond 2 000-100 000 K
        the nearest edge, both counted.
    """
    from ..bands import DEFAULT_TEMPERATURE, star_temperatures
    from ..bands.inputs import temperature_input
    from .reddening import colour_temperatures
    from .temperatures import announce_temperatures, rows_have, temperature_values

    table = targets.table if isinstance(targets, TargetList) else targets
    n = len(table)
    t_default = float(DEFAULT_TEMPERATURE.to_value(u.K))
    if temperature is not None and not isinstance(temperature, str):
        t = temperature_input(temperature, DEFAULT_TEMPERATURE, stacklevel=5)
        if t.ndim and t.shape != (n,):
            raise param_error("temperature", f"one temperature, one per target ({n}) or a column name",
                              f"{t.size} values")
        values = np.broadcast_to(t, (n,)).astype(float)
        return TargetTemperatures(values, f"a {float(values[0]):g} K blackbody" if t.ndim == 0 else
                                  "the temperatures given per target", empty_rejected(), [])
    col, role = _target_star_column(targets, table, temperature)
    if col is None:
        return TargetTemperatures(np.full(n, t_default), f"a {t_default:g} K blackbody for every target (the "
                                  "default: no temperature column such as 'teff' nor intrinsic colour such as "
                                  "'(BP-RP)_0')", empty_rejected(), [])
    desc = targets.meta.get("source", "the targets") if isinstance(targets, TargetList) else "the targets"
    ctx = Context(table, desc)
    what = "the band-extinction conversion"
    if role == "intrinsic_color":
        st, described = colour_temperatures(table, col, ctx, t_default, bands_option=None)
        source = f"the temperatures from {described}"
    else:
        st = star_temperatures(n, temperature=temperature_values(table, col, ctx) * u.K)
        source = f"the temperatures in column {col!r}"
    good = ctx.rej.code < 0
    n_default, n_clipped = announce_temperatures(st, col, ctx, what, t_default, good, rows="targets")
    names = table[targets.meta["columns"]["name"]] if isinstance(targets, TargetList) and \
        "name" in targets.meta.get("columns", {}) else None
    rejected = ctx.rej.table(None if names is None else np.asarray(names).astype(str))
    n_bad = len(rejected)
    if n_bad:
        rows = ", ".join(f"row {int(r)} ({nm})" for r, nm in zip(rejected["row"][:5], rejected["name"][:5]))
        ctx.note(RowsRejectedWarning, f"{rows_have(n_bad, 'targets')} no usable value in {col!r} ("
                 f"{ctx.rej.reason_text()}) [{rows}{', ...' if n_bad > 5 else ''}]: their band extinctions are "
                 "left empty (NaN); their A_V is kept. Hint: fix or empty those cells (empty cells take a "
                 f"{t_default:g} K star), or pass temperature=.")
    notes = [f"{k} without a value: {t_default:g} K" for k in [n_default] if k]
    notes += [f"{k} beyond 2000-100000 K: set to the nearest edge" for k in [n_clipped] if k]
    notes += [f"{k} unusable: band extinctions left empty" for k in [n_bad] if k]
    source += f" ({'; '.join(notes)})" if notes else ""
    return TargetTemperatures(np.where(good, st.temperature.to_value(u.K), np.nan), source, rejected, ctx.notes)


def _target_star_column(targets, table, temperature=None):
    """(column, role) of the targets' stars: ``temperature`` (a column name) or the column named at the read,
    else one recognised as the tracer reader recognises it (a temperature first, then an intrinsic colour);
    role is ``"temperature"`` or ``"intrinsic_color"``; (None, None) without one."""
    from .columns import recognised_column
    from .reddening import intrinsic_color_bands

    if isinstance(temperature, str):
        if temperature not in table.colnames:
            raise param_error("temperature", f"a column of the targets ({', '.join(table.colnames)}) or a "
                              "temperature such as 4500 * u.K", temperature)
        is_colour = (intrinsic_color_bands(temperature) is not None
                     and recognised_column([temperature], "temperature") is None)
        return temperature, "intrinsic_color" if is_colour else "temperature"
    named = targets.meta.get("columns", {}) if isinstance(targets, TargetList) else {}
    roles = ("temperature", "intrinsic_color")
    for role in roles:  # named at the read (columns=): that one
        if named.get(role) is not None:
            return named[role], role
    for role in roles:
        col = recognised_column(table.colnames, role, exclude=set(named.values()))
        if col is not None:
            return col, role
    return None, None


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
    if path.is_dir():
        return _load_folder(path)
    if not path.is_file():
        raise CatalogError(
            f"Catalogue file '{path}' does not exist or is not a file. Hint: check the path "
            f"(current folder: {os.getcwd()})."
        )
    if fmt is None:
        fmt = format_for(path, "catalogue", strict=False)  # an unknown suffix: astropy guesses
    known = ", ".join(suffixes("catalogue"))
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", u.UnitsWarning)
            table = _read_plain_parquet(path) if fmt == "parquet" else None
            if table is None and fmt in _COMMENTED_FORMATS:
                table = _read_commented(path, fmt)
            if table is None and fmt == "votable":
                table = _read_votable(path)
            if table is None:
                table = Table.read(path, format=fmt) if fmt else Table.read(path)
    except Exception as exc:
        raise CatalogError(
            f"Could not read catalogue file '{path}' (format {fmt or 'guessed'}): "
            f"{type(exc).__name__}: {exc}. Hint: dustkit reads CSV, ECSV, FITS tables, VOTable and Parquet "
            f"through astropy (suffixes {known}); check that the file is complete and in one of these "
            "formats, or read it with astropy.table.Table.read(..., format=...) and pass the Table."
        ) from exc
    if fmt in _TEXT_FORMATS:
        table = _units_line(table)
    seps = [sep for sep in (";", "\t", "|") if len(table.colnames) == 1 and sep in table.colnames[0]]
    if seps:
        raise CatalogError(
            f"Catalogue file '{path}' reads as one column named {table.colnames[0]!r}: its values seem to be "
            f"separated by {seps[0]!r}, not by commas. Hint: read it with astropy.table.Table.read(path, "
            f"format='ascii.csv', delimiter={seps[0]!r}) (or pandas.read_csv(path, sep={seps[0]!r})) and pass "
            "the table."
        )
    sha = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            sha.update(chunk)
    return table, f"file '{path}'", sha.hexdigest()


#: Text formats whose files often start with '#' comment lines (a title, the units, the source), which
#: astropy's reader of the format takes as the header or as data unless told (its tab-separated and
#: whitespace readers skip them already).
_COMMENTED_FORMATS = ("ascii.csv",)


def _read_commented(path, fmt):
    """A CSV file read with whole lines starting with '#' as comments, or None when that
    reading fails or finds numbers as column names (the header itself starts with '#', as in
    '#l,b,dist,ebv': the plain reading takes it, as before)."""
    try:
        table = Table.read(path, format=fmt, comment=r"\s*#")
    except Exception:  # the plain reading reports the problem
        return None
    for name in table.colnames:
        try:
            float(name)
        except ValueError:
            return table
    return None


#: Text formats whose files may carry a line of units under the header (and a rule of dashes under it).
_TEXT_FORMATS = ("ascii.csv", "ascii.tab", "ascii", "ascii.basic")
#: ``table.meta`` key of what the reading of the file itself announces (e.g. a units line), for the readers.
LOAD_NOTES = "dustkit_load_notes"


def _text_cells(col):
    """A column's cells as stripped text, '' where empty (masked), and whether the column is text."""
    text = col.dtype.kind in "US"
    data = np.asarray(col.filled("") if hasattr(col, "filled") and col.dtype.kind in "US" else col)
    cells = np.char.strip(data.astype(str)) if data.size else data.astype(str)
    if hasattr(col, "mask"):
        cells = np.where(np.ma.getmaskarray(col), "", cells)
    return cells, text


def _is_unit_cell(cell):
    from .._lib.units import as_unit, sexagesimal_unit

    if cell == "" or sexagesimal_unit(cell) is not None:
        return True
    try:
        float(cell)
        return False
    except ValueError:
        pass
    try:
        as_unit(cell)
        return True
    except (ValueError, TypeError):
        return False


def _units_line(table):
    """A text table whose first row is a line of units ('deg', 'kpc', '"h:m:s"', '---') and/or a rule of
    dashes (as VizieR's TSV files and many compilations write them under the header): those lines taken
    out, the units set on the columns and text columns of numbers turned into numbers, with a note in
    ``table.meta[LOAD_NOTES]``. Any other table is returned as it is."""
    if len(table) < 2 or not table.colnames:
        return table
    cells = {c: _text_cells(table[c]) for c in table.colnames}
    row = lambda i: [cells[c][0][i] for c in table.colnames]  # noqa: E731
    is_rule = lambda i: all(set(x) <= set("-=") for x in row(i)) and any(row(i))  # noqa: E731
    units = None
    first = row(0)
    if (all(cells[c][1] or first[k] == "" for k, c in enumerate(table.colnames)) and all(map(_is_unit_cell, first))
            and any(x and not set(x) <= set("-") for x in first)):
        units = first
    skip = 1 if units is not None else 0
    if skip < len(table) - 1 and is_rule(skip):
        skip += 1
    if skip == 0:
        return table
    out = table[skip:]
    out.meta = dict(table.meta)
    for k, c in enumerate(table.colnames):
        col = out[c]
        if col.dtype.kind in "US":
            text = np.char.strip(np.asarray(col.filled("") if hasattr(col, "filled") else col).astype(str))
            empty = (text == "") | (np.ma.getmaskarray(col) if hasattr(col, "mask") else False)
            try:
                numbers = np.where(empty, "nan", text).astype(float)
            except ValueError:
                numbers = None
            if numbers is not None:
                out[c] = MaskedColumn(numbers, mask=empty) if empty.any() else numbers
        if units is not None and units[k] and not set(units[k]) <= set("-"):
            out[c].unit = units[k].strip().strip("\"'")
    said = []
    if units is not None:
        said.append("the first line under the header as the columns' units (" + ", ".join(
            f"{c!r}: {str(x)!r}" for c, x in zip(table.colnames, units) if x and not set(x) <= set("-")) + ")")
    if skip > (units is not None):
        said.append("the line of dashes under it as a rule" if units is not None else
                    "the first line under the header, of dashes, as a rule")
    out.meta[LOAD_NOTES] = [f"Read {' and '.join(said)}; rows are counted from the line after them."]
    return out


def _read_votable(path):
    """A VOTable read once with astropy, keeping what ``Table.read`` drops: the COOSYS (system, equinox)
    each field refers to, in ``table.meta[COOSYS_META]`` (read by ``values.equatorial_frame``)."""
    from astropy.io.votable import parse

    vot = parse(str(path))
    table = Table.read(vot, format="votable")
    systems = {c.ID: (c.system, c.equinox) for c in vot.iter_coosys() if c.ID is not None}
    element = next(vot.iter_tables())
    refs = {name: systems[f.ref] for name, f in zip(table.colnames, element.fields)
            if getattr(f, "ref", None) in systems}
    if refs:
        table.meta[COOSYS_META] = refs
    return table


def _read_plain_parquet(path):
    """A Parquet file of plain columns read with pyarrow directly (numbers without a copy, nulls masked,
    units from astropy's metadata; the conversion the chunked reads use), or None for a file that needs
    astropy's reader (mixin columns, nested types)."""
    import pyarrow.parquet as pq

    if not plain_parquet(pq.read_schema(path)):
        return None
    return read_parquet(path)


def _parquet_parts(path):
    parts = parquet_parts(path)
    if not parts:
        raise CatalogError(
            f"The folder '{path}' holds no Parquet files. Hint: a catalogue folder holds the Parquet parts of one "
            "table (part-0.parquet, part-1.parquet, ...)."
        )
    return parts


def _load_folder(path):
    """A folder of Parquet parts read as one table, in the order of the file names."""
    from astropy.table import vstack

    tables, sha = [], hashlib.sha256()
    for q in _parquet_parts(path):
        t, _, part_sha = _load(q)
        tables.append(t)
        sha.update(part_sha.encode())
    table = tables[0] if len(tables) == 1 else vstack(tables, join_type="exact", metadata_conflicts="silent")
    return table, f"folder '{path}' ({len(tables)} Parquet parts)", sha.hexdigest()


def catalogue_rows(source):
    """Number of rows of a catalogue file or Parquet folder from its metadata, or None if unknown.

    Parquet: the footer's row count (all parts of a folder); FITS: NAXIS2 of the first table
    extension. Other formats (CSV, ECSV, VOTable) carry no row count and give None.
    """
    path = Path(source).expanduser()
    try:
        if path.is_dir():
            import pyarrow.parquet as pq

            return int(sum(pq.ParquetFile(q).metadata.num_rows for q in _parquet_parts(path)))
        fmt = format_for(path, "catalogue", strict=False)
        if fmt == "parquet":
            import pyarrow.parquet as pq

            return int(pq.ParquetFile(path).metadata.num_rows)
        if fmt == "fits":
            from astropy.io import fits

            with fits.open(path, memmap=True) as hdul:
                for hdu in hdul[1:]:
                    if hdu.header.get("XTENSION", "").strip() in ("BINTABLE", "TABLE"):
                        return int(hdu.header.get("NAXIS2", 0))
    except CatalogError:
        raise
    except Exception:  # unreadable metadata: let the reader report the problem
        return None
    return None
