"""Assembly: one validated table of tracers -> the fields of a TracerSet and the notes to emit."""

import numpy as np
from astropy import units as u
from astropy.table import MaskedColumn

from ..exceptions import AssumptionWarning, CatalogError, DuplicatesWarning, RowsRejectedWarning
from .._lib.validation import check_real, param_error
from .columns import DISTANCE_LIKE, KIND_LABEL, resolve_columns
from .context import Context, empty_duplicates
from .distances import distances
from .duplicates import find_duplicates, group_scale_factors, keys_apart, merge_groups
from .reddening import reddening
from .rules import (
    DUPLICATE_NSIGMA,
    DUPLICATE_SEPARATION_ARCSEC,
    PARALLAX_ERR_FLOOR,
    PARALLAX_LENGTH_SCALE,
    SAME_NAME_SEPARATION_ARCMIN,
    check_duplicates,
    check_law,
    check_limits,
    check_modulus_kind,
    reason,
    same_name_apart_notes,
    zero_point,
)
from .values import names_of, positions

__all__ = [
    "build_tracers",
    "scaled_text",
]


def build_tracers(
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
    distance_modulus_kind=None,
    parallax_err_floor=None,
    parallax_length_scale=None,
    duplicates="merge",
    source_temperature=None,
    intrinsic_color_bands=None,
    duplicate_separation=None,
    extras=None,
):
    """Validate a table of tracers: the fields of a ``TracerSet`` and the notes (warnings) to emit.

    A dict ``extras`` receives ``position_weight`` and ``scatter`` (see ``duplicates.merge_groups``;
    None when nothing was merged) and ``row_lb`` (input row, l and b of every accepted row, before merging), for merging
    tracers of several reads later (the chunked builds). Such a read (``extras`` given) does not note
    the rows of one name kept apart: the chunked build finds and reports them for the whole catalogue."""
    rv = check_real("rv", rv, 0.0, np.inf, low_inclusive=False)
    law, rv = check_law(law, rv)
    frac = check_real("default_distance_frac_err", default_distance_frac_err, 0.0, np.inf, low_inclusive=False)
    default_err = check_real("default_excess_err", default_excess_err, 0.0, np.inf, low_inclusive=False)
    zp = zero_point(parallax_zero_point)
    limits = check_limits(reject_limits)
    kind_arg = check_modulus_kind(distance_modulus_kind)
    floor = PARALLAX_ERR_FLOOR if parallax_err_floor is None else parallax_err_floor
    if isinstance(floor, u.Quantity):
        floor = floor.to_value(u.mas)
    floor = check_real("parallax_err_floor", floor, 0.0, 10.0)
    scale = PARALLAX_LENGTH_SCALE if parallax_length_scale is None else parallax_length_scale
    if isinstance(scale, u.Quantity):
        scale = scale.to_value(u.kpc)
    scale = check_real("parallax_length_scale", scale, 0.0, 1e3, low_inclusive=False)
    duplicates = check_duplicates(duplicates)
    sep = DUPLICATE_SEPARATION_ARCSEC if duplicate_separation is None else duplicate_separation
    if isinstance(sep, u.Quantity):
        try:
            sep = sep.to_value(u.arcsec)
        except u.UnitConversionError:
            raise param_error("duplicate_separation", "an angle such as 1 * u.arcsec", duplicate_separation) from None
    sep = check_real("duplicate_separation", sep, 0.0, 3600.0)
    ctx = Context(table, source_desc)
    ctx.modulus_kind = kind_arg
    cols = resolve_columns(table, columns, ctx, want_reddening=True)
    n = ctx.n
    if n == 0:
        raise CatalogError(f"{source_desc} has no rows; nothing to read.")
    l, b, _ = positions(table, cols, ctx)
    excess, excess_err, kind, color, av, av_err = reddening(
        table, cols, ctx, law, rv, default_err, limits, excess_color, source_temperature, intrinsic_color_bands
    )
    d, d_err, app, app_err, bounds = distances(
        table, cols, ctx, distance_unit, frac, zp, limits, av, av_err, floor, scale
    )
    corr = _correlation(table, columns, cols, ctx, av_err, app_err)
    names = names_of(table, cols)
    keep = ctx.rej.code < 0
    rejected = ctx.rej.table(names)
    if not keep.any():
        raise CatalogError(
            f"No usable tracer in {source_desc}: all {n} rows were rejected ({ctx.rej.reason_text()}). "
            f"Columns used: {', '.join(f'{k}={v!r}' for k, v in cols.items())}. "
            + (ctx.unit_hint or "Hint: check the column recognition (columns={...}), the units and reject_limits.")
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
    rows = np.flatnonzero(keep)
    kept_names = None if names is None else names[keep].astype("U", copy=False)
    per_row = dict(
        l=l[keep], b=b[keep], distance=d[keep], distance_err=d_err[keep], av=av[keep], av_err=av_err[keep],
        excess=excess[keep], excess_err=excess_err[keep], av_distance_corr=corr[keep], row=rows,
    )
    if bounds is not None:
        per_row["distance_err_low"], per_row["distance_err_high"] = bounds[0][keep], bounds[1][keep]
    if app is not None:
        per_row["apparent_modulus"], per_row["apparent_modulus_err"] = app[keep], app_err[keep]
    if kept_names is not None:
        per_row["name"] = kept_names
    if ctx.temperature is not None:
        per_row["temperature"] = ctx.temperature[keep]
    if duplicates == "merge":  # with 'keep' no search at all: the rows are taken as given
        try:
            group, exact, copied = find_duplicates(per_row["l"], per_row["b"], per_row["distance"],
                                                   per_row["distance_err"], per_row["av"], per_row["av_err"],
                                                   kept_names, tol_arcsec=sep)
        except CatalogError as err:  # a "name" shared by crowds of rows: say which column
            raise CatalogError(f"{source_desc}, name column {cols['name']!r}: {err}") from None
        n_apart = _same_name_apart(ctx, kept_names, group, per_row["l"], per_row["b"], note=extras is None)
        if extras is not None:
            extras["row_lb"] = (rows, per_row["l"], per_row["b"])
        sel, per_row, dup_report = merge_groups(group, exact, copied, per_row, rows, kept_names, duplicates)
    else:
        n_apart = 0
        sel, dup_report = rows, empty_duplicates()
    n_merged = int(rows.size - sel.size)
    scatter = per_row.pop("scatter", None)
    factors = group_scale_factors(scatter)
    n_scaled = 0 if factors is None else int(np.sum(factors > 1.0))
    if extras is not None:
        extras["position_weight"] = per_row.pop("position_weight", None)
        extras["scatter"] = scatter
    per_row.pop("position_weight", None)
    if len(dup_report):
        n_groups = int(np.unique(np.asarray(dup_report["group"])).size)
        n_exact = int(np.sum(np.asarray(dup_report["kind"]) == "exact"))  # rows in sets of exact copies
        what = (f"merged into {n_groups} tracers by inverse-variance means (exact copies counted once); "
                f"{scaled_text(n_scaled, 0.0 if factors is None else float(np.max(factors)))}; "
                "pass duplicates='keep' to keep them")
        ctx.note(
            DuplicatesWarning,
            f"{len(dup_report)} of {n} rows are duplicates in {n_groups} groups ({n_exact} exact copies; the others "
            f"the same name within {SAME_NAME_SEPARATION_ARCMIN:g} arcmin, or within {sep:g} arcsec with distance and A_V within "
            f"{DUPLICATE_NSIGMA:g} sigma): {what}. See TracerSet.duplicates for the groups.",
        )
    ctx.n_merged = n_merged
    arrays = [per_row[k] for k in ("l", "b", "distance", "distance_err", "av", "av_err")]
    meta = ctx.meta(file_sha, arrays + [per_row["row"] if kept_names is None else per_row["name"]])
    meta["n_merged"] = n_merged
    meta["n_scaled_groups"] = n_scaled
    meta["same_name_apart"] = n_apart
    meta["duplicates"] = duplicates
    meta["duplicate_separation_arcsec"] = sep
    fields = dict(
        l=arrays[0],
        b=arrays[1],
        distance=arrays[2],
        distance_err=arrays[3],
        av=arrays[4],
        av_err=arrays[5],
        name=per_row.get("name"),
        excess=per_row["excess"],
        excess_err=per_row["excess_err"],
        excess_kind=kind,
        law=law,
        rv=rv,
        rejected=rejected,
        meta=meta,
        row=per_row["row"],
        distance_kind=KIND_LABEL[next(k for k in DISTANCE_LIKE if k in cols)],
        excess_color=color,
        apparent_modulus=per_row.get("apparent_modulus"),
        apparent_modulus_err=per_row.get("apparent_modulus_err"),
        av_distance_corr=per_row["av_distance_corr"],
        distance_err_low=per_row.get("distance_err_low"),
        distance_err_high=per_row.get("distance_err_high"),
        duplicates=dup_report,
        temperature=per_row.get("temperature"),
    )
    return fields, ctx.notes


def scaled_text(n_scaled, largest):
    """How many merged groups had their errors scaled up (their measurements disagree), for the warnings."""
    if not n_scaled:
        return "no group's errors scaled up (the measurements of each agree within their errors)"
    return (f"the errors of {n_scaled} group{'s' if n_scaled != 1 else ''} scaled up by S = sqrt(chi2 / (N - 1)) "
            f"(largest {largest:.3g}) because their measurements disagree beyond the quoted errors")


def _same_name_apart(ctx, names, group, l, b, note=True):
    """The number of rows whose name is also that of rows of another tracer (rows of one name more
    than ``SAME_NAME_SEPARATION_ARCMIN`` apart, kept apart); noted (warning and assumption) with an
    example when ``note``."""
    if names is None:
        return 0
    apart, example = keys_apart(names, group)
    n_rows = int(apart.sum())
    if n_rows and note:
        row, other = example
        n_names = int(np.unique(names[apart]).size)
        message, assumption = same_name_apart_notes(n_rows, n_names, (str(names[row]), float(l[row]), float(b[row]),
                                                                      float(l[other]), float(b[other])))
        ctx.note(AssumptionWarning, message, assumption=False)
        ctx.assumptions.append(assumption)
    return n_rows


#: Normalised names of an input column holding corr(E(B-V), mu0) of each tracer.
CORRELATION_NAMES = ("ebvmu0corr", "correbvmu0", "rhoebvmu0")


def _correlation(table, columns, cols, ctx, av_err, app_err):
    """corr(A_V error, ln-distance error) per row (0 where independent).

    From an apparent V modulus: mu0 = (m-M)_V - A_V, so cov(A_V, mu0) = -var(A_V) and the
    correlation is -sigma_AV / sqrt(sigma_(m-M)V^2 + sigma_AV^2) (ln d = mu0 ln10 / 5 + const
    keeps it). From an input column ``ebv_mu0_corr`` (corr of E(B-V) and a true modulus):
    A_V and ln d are positive multiples of E(B-V) and mu0, so the value is kept; an empty
    cell reads as 0 and a value outside [-1, 1] rejects the row.
    """
    n = ctx.n
    corr = np.zeros(n)
    if app_err is not None:
        with np.errstate(invalid="ignore", divide="ignore"):
            corr = -av_err / np.hypot(app_err, av_err)
        corr = np.where(np.isfinite(corr), corr, 0.0)
    colname = (columns or {}).get("ebv_mu0_corr")
    if colname is None:
        from .columns import norm

        colname = next((c for c in table.colnames if norm(c) in CORRELATION_NAMES), None)
    if colname is None or colname not in table.colnames:
        return corr
    col = table[colname]
    raw = col
    data = np.asarray(col.filled(np.nan) if isinstance(col, MaskedColumn) and col.dtype.kind in "fiu" else col)
    try:
        vals = np.asarray(getattr(data, "value", data), dtype=float)
    except (TypeError, ValueError):
        txt = np.asarray(data).astype(str)
        vals = np.full(n, np.nan)
        for_num = np.char.strip(txt)
        ok = np.array([_is_float(x) for x in for_num], dtype=bool) if n <= 10**6 else np.zeros(n, bool)
        vals[ok] = for_num[ok].astype(float)
    ctx.rej.add(np.abs(vals) > 1, reason("correlation_outside", colname), colname, raw)
    vals = np.where(np.isfinite(vals) & (np.abs(vals) <= 1), vals, 0.0)
    ctx.used["ebv_mu0_corr"] = colname
    ctx.assumptions.append(
        f"corr(A_V, ln distance) from {colname!r} (correlation of E(B-V) and the true modulus; sign kept)"
    )
    if app_err is not None:
        return corr  # the apparent-modulus correlation is the one that applies
    return vals


def _is_float(x):
    try:
        float(x)
        return True
    except ValueError:
        return False
