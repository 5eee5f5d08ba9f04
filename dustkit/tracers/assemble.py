"""Assembly: one validated table of tracers -> the fields of a TracerSet and the notes to emit."""

import numpy as np

from ..exceptions import CatalogError, RowsRejectedWarning
from .._lib.validation import check_real
from .columns import DISTANCE_LIKE, KIND_LABEL, resolve_columns
from .context import Context
from .distances import distances
from .reddening import reddening
from .rules import check_law, check_limits, zero_point
from .values import names_of, positions

__all__ = [
    "build_tracers",
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
):
    """Validate a table of tracers: the fields of a ``TracerSet`` and the notes (warnings) to emit."""
    rv = check_real("rv", rv, 0.0, np.inf, low_inclusive=False)
    law, rv = check_law(law, rv)
    frac = check_real("default_distance_frac_err", default_distance_frac_err, 0.0, np.inf, low_inclusive=False)
    default_err = check_real("default_excess_err", default_excess_err, 0.0, np.inf, low_inclusive=False)
    zp = zero_point(parallax_zero_point)
    limits = check_limits(reject_limits)
    ctx = Context(table, source_desc)
    cols = resolve_columns(table, columns, ctx, want_reddening=True)
    n = ctx.n
    if n == 0:
        raise CatalogError(f"{source_desc} has no rows; nothing to read.")
    l, b, _ = positions(table, cols, ctx)
    excess, excess_err, kind, color, av, av_err = reddening(
        table, cols, ctx, law, rv, default_err, limits, excess_color
    )
    d, d_err, app, app_err = distances(table, cols, ctx, distance_unit, frac, zp, limits, av, av_err)
    names = names_of(table, cols)
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
    fields = dict(
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
        distance_kind=KIND_LABEL[next(k for k in DISTANCE_LIKE if k in cols)],
        excess_color=color,
        apparent_modulus=None if app is None else app[keep],
        apparent_modulus_err=None if app_err is None else app_err[keep],
    )
    return fields, ctx.notes
