"""Answers of a fitted model: A_V with its uncertainty anywhere, sight-line profiles, target lists.

The functions here take a *fitted model* and rely only on this small interface, so any
model class that provides it (the binned :class:`~dustkit.model.ExtinctionModel`, or
another model) answers through the same code:

``model.check_fitted()``
    raise :class:`~dustkit.exceptions.ModelNotFittedError` when not fitted;
``model.av_pc(l, b, d, distance_err=None) -> (av, av_err)``
    plain float arrays: l, b in deg, d and distance_err in pc, A_V and its 1-sigma error in mag;
``model.layer_av_pc(l, b, d)``
    A_V (mag) of the model's smooth part alone (plain arrays);
``model.law``, ``model.rv``
    the extinction law and R_V its A_V refers to;
``model.grid_``
    a :class:`~dustkit.grid.Grid` giving the model's sky resolution and distance range;
``model.tracers_`` (optional)
    the tracers it was built from (listed with cone profiles).

:func:`interpolate` and :func:`binned_av` are the binned model's evaluation: the residual
from the layer interpolated bilinearly on the sky (the HEALPix interpolation of
``healpy.get_interp_weights``) and linearly in distance, plus the predictive variance.
"""

import os
import sys
import warnings
from concurrent.futures import ThreadPoolExecutor

import numpy as np
from astropy import units as u
from astropy.table import MaskedColumn, QTable, Table

from ._lib import healpix
from ._lib.sky import separation_deg
from ._lib.validation import Described, check_int, check_real, param_error, to_scalar, to_value
from .binned.calibration import predictive_variance
from .exceptions import AssumptionWarning, ParameterError

__all__ = [
    "CAUTION",
    "estimate_columns",
    "interpolate",
    "sky_positions",
    "binned_av",
    "binned_slope",
    "av_quantities",
    "query_table",
    "profile_table",
    "estimate_targets",
    "grid_table",
]

#: Shown wherever model answers are reported.
CAUTION = (
    "Extinction estimates from a model are statistical: they describe the average dust "
    "toward a direction and distance, with an uncertainty that includes the typical "
    "small-scale scatter. Check them against local data before using them for science or "
    "for planning instrument time."
)

ANSWER_BLOCK = 32_768  # positions per block when answering many at once


def interpolate(grid, values, l, b, d):
    """Bilinear-on-the-sky, linear-in-distance interpolation of node arrays.

    ``values`` is a tuple of arrays of shape (npix, n_edges). Distances beyond the last edge
    take the last edge's value; the returned fraction ``f`` lets callers extrapolate. Many
    positions are answered in cache-sized blocks, spread over the CPU's cores.
    """
    l, b, d = (np.asarray(x, float) for x in (l, b, d))
    n = l.size
    if n <= ANSWER_BLOCK or l.ndim != 1:
        return _interp_block(grid, values, l, b, d)
    out = [np.empty(n) for _ in values]
    k, f = np.empty(n, dtype=np.int64), np.empty(n)

    def run(lo_hi):
        for s in range(*lo_hi, ANSWER_BLOCK):
            e = min(s + ANSWER_BLOCK, lo_hi[1])
            vals, k[s:e], f[s:e] = _interp_block(grid, values, l[s:e], b[s:e], d[s:e])
            for o, v in zip(out, vals):
                o[s:e] = v

    workers = max(1, min(os.cpu_count() or 1, 8, n // ANSWER_BLOCK))
    cuts = np.linspace(0, -(-n // ANSWER_BLOCK), workers + 1).astype(int) * ANSWER_BLOCK
    spans = [(int(a), int(min(c, n))) for a, c in zip(cuts[:-1], cuts[1:]) if a < min(c, n)]
    with ThreadPoolExecutor(len(spans)) as pool:
        list(pool.map(run, spans))
    return out, k, f


def _interp_block(grid, values, l, b, d):
    pix, wts = grid.interp_weights(l, b)
    k, f = grid.edge_position(d)
    fc = np.clip(f, 0.0, 1.0)
    lin = pix * grid.n_edges + k  # (4, n) flat index of the lower edge
    out = []
    for v in values:
        flat = np.ravel(v)
        lo = np.einsum("ij,ij->j", np.take(flat, lin), wts)
        hi = np.einsum("ij,ij->j", np.take(flat, lin + 1), wts)
        out.append(lo + fc * (hi - lo))
    return out, k, f


def _is_skycoord(obj):
    """True for a SkyCoord; astropy.coordinates (0.2 s to import) is not imported for the question:
    while nobody imported it, nothing can be one."""
    coords = sys.modules.get("astropy.coordinates")
    return coords is not None and isinstance(obj, coords.SkyCoord)


ANSWER_HINT = ("Hint: dustkit.estimate_targets(model, table) answers a target list, keeping the rows it cannot "
               "place as NaN and counting them by reason.")


def _position_error(name, requirement, values, bad, hint=ANSWER_HINT):
    """ParameterError naming the argument, how many values are bad, the first of them and their indices."""
    idx = np.flatnonzero(bad)
    got = f"{idx.size} such value{'s' if idx.size > 1 else ''}: {values[idx[:3]].tolist()} at index {idx[:3].tolist()}"
    return ParameterError(f"The '{name}' parameter must be {requirement}. Got {got} instead. {hint}".rstrip())


def _unmasked(name, value):
    """``value`` without its mask; masked entries (a masked column, a MaskedQuantity) raise, naming their indices.

    A masked cell has no value to answer at: the data under the mask are placeholders, and answering them gave
    numbers for positions nobody asked about.
    """
    mask = getattr(value, "mask", None)
    if mask is None or _is_skycoord(value) or isinstance(value, (str, bytes)):
        return value
    mask = np.ravel(np.broadcast_to(np.asarray(mask, bool), np.shape(value)))
    if mask.any():
        idx = np.flatnonzero(mask)
        raise ParameterError(f"The '{name}' parameter must be free of masked values. Got {idx.size} masked, at index "
                             f"{idx[:3].tolist()} instead. {ANSWER_HINT}")
    return value.unmasked if hasattr(value, "unmasked") else np.ma.getdata(value)


def _broadcast(named):
    """Broadcast the answers' arrays together, or say which shapes clash."""
    try:
        return np.broadcast_shapes(*(np.shape(v) for v in named.values()))
    except ValueError:
        shapes = ", ".join(f"{k} {np.shape(v)}" for k, v in named.items())
        raise param_error(", ".join(named), "scalars or arrays of one shape (or shapes that broadcast together)",
                          Described(shapes)) from None


def sky_positions(l, b=None, distance=None):
    """Plain arrays from the answers' inputs: l (deg, in [0, 360)), b (deg), distance (pc), and the input shape.

    ``l`` is a Galactic longitude (Quantity) with ``b`` and ``distance``, or a SkyCoord (any
    frame) with distances (or ``distance=``). Non-finite longitudes, latitudes outside
    [-90, 90] deg, negative or non-finite distances, masked values and shapes that do not
    broadcast together raise ``ParameterError`` naming the argument and the indices.
    """
    is_coord = _is_skycoord(l)
    if is_coord:
        c = l.galactic
        lv = np.asarray(c.l.deg, float)
        bv = np.asarray(c.b.deg, float)
        if distance is None:
            if c.distance.unit.physical_type != "length":
                raise param_error("coords", "a SkyCoord with distances (or pass distance=)", "SkyCoord without distance")
            distance = c.distance
        dv = to_value("distance", _unmasked("distance", distance), u.pc)
    else:
        if b is None or distance is None:
            raise param_error("l, b, distance", "given together (or pass one SkyCoord with distances)", "missing values")
        lv = to_value("l", _unmasked("l", l), u.deg)
        bv = to_value("b", _unmasked("b", b), u.deg)
        dv = to_value("distance", _unmasked("distance", distance), u.pc)
    shape = _broadcast({"l": lv, "b": bv, "distance": dv} if not is_coord else {"coords": lv, "distance": dv})
    lv, bv, dv = (np.ravel(np.broadcast_to(np.asarray(x, float), shape)) for x in (lv, bv, dv))
    if not np.all(np.isfinite(lv)):
        raise _position_error("l", "a finite longitude (deg)", lv, ~np.isfinite(lv))
    if np.any(np.abs(bv) > 90) or not np.all(np.isfinite(bv)):
        raise _position_error("b", "a latitude in [-90, 90] deg", bv, ~(np.abs(bv) <= 90))
    if np.any(dv < 0) or not np.all(np.isfinite(dv)):
        raise _position_error("distance", "finite and non-negative", dv, ~(dv >= 0) | ~np.isfinite(dv))
    return np.mod(lv, 360.0), bv, dv, shape


def binned_av(grid, layer, resid, post_var, walk_variance, scatter, l, b, d, distance_err=None):
    """A_V and its predictive 1-sigma error (mag) of a binned model at plain positions (deg, pc).

    The layer at the exact position plus the interpolated residual; beyond the last edge
    the residual is carried forward with the random walk's growing variance. A target's own
    ``distance_err`` (pc) enters through the local slope of the binned model.
    """
    (r, pv), k, f = interpolate(grid, (resid, post_var), l, b, d)
    beyond = np.maximum(d - grid.distance_edges[-1], 0.0) / 1000.0
    pv = pv + walk_variance * beyond  # carried forward with growing uncertainty
    a = np.maximum(layer.av_pc(b, d) + r, 0.0)
    var = predictive_variance(scatter, pv, a, walk_variance * np.maximum(d, 0.0) / 1000.0)  # prior: q d
    if distance_err is not None:
        slope = binned_slope(grid, layer, resid, l, b, d)
        var = var + (slope * distance_err) ** 2
    return a, np.sqrt(var)


def binned_slope(grid, layer, resid, l, b, d):
    """Local dA_V/dd (mag/pc) of a binned model at the given positions (deg, pc)."""
    k, _ = grid.edge_position(d)
    e = grid.distance_edges
    (r_near,), _, _ = interpolate(grid, (resid,), l, b, e[k])
    (r_far,), _, _ = interpolate(grid, (resid,), l, b, e[k + 1])
    near = layer.av_pc(b, e[k]) + r_near
    far = layer.av_pc(b, e[k + 1]) + r_far
    return np.maximum(far - near, 0.0) / (e[k + 1] - e[k])


def distance_errors(distance_err, shape):
    """Distance errors (pc) as a flat float array for positions of ``shape`` (None stays None)."""
    if distance_err is None:
        return None
    de = to_value("distance_err", _unmasked("distance_err", distance_err), u.pc)
    try:
        de = np.broadcast_to(de, shape).ravel()
    except ValueError:
        raise param_error("distance_err", f"a scalar or one error per position (shape {shape})",
                          f"shape {np.shape(de)}") from None
    bad = ~(de >= 0) | ~np.isfinite(de)
    if bad.any():  # NaN errors made NaN av_err, negative ones were squared into an error
        raise _position_error("distance_err", "finite and non-negative (0 * u.pc for an exact distance)", de, bad)
    return de


def av_quantities(model, l, b=None, distance=None, distance_err=None):
    """A_V and its predictive 1-sigma uncertainty (Quantity, mag) in the shape of the input."""
    model.check_fitted()
    lv, bv, dv, shape = sky_positions(l, b, distance)
    a, e = model.av_pc(lv, bv, dv, distance_errors(distance_err, shape))
    return a.reshape(shape) * u.mag, e.reshape(shape) * u.mag


def query_table(model, l, b=None, distance=None, distance_err=None, bands=(), law=None, rv=None,
                temperature=None):
    """A table of answers: position, A_V, its error, the smooth part's A_V, and A in each band.

    Band extinctions use the model's law and R_V unless ``law``/``rv`` are given, and are
    integrated over each band's passband for a blackbody of ``temperature`` (K; a scalar or
    one value per position; default :data:`dustkit.bands.DEFAULT_TEMPERATURE`) extincted by
    the answer's own A_V (:func:`dustkit.bands.av_to_band`).
    """
    model.check_fitted()
    lv, bv, dv, shape = sky_positions(l, b, distance)
    a, e = model.av_pc(lv, bv, dv, distance_errors(distance_err, shape))
    t = QTable()
    t["l"] = lv * u.deg
    t["b"] = bv * u.deg
    t["distance"] = dv * u.pc
    t["av"] = a * u.mag
    t["av_err"] = e * u.mag
    t["av_layer"] = model.layer_av_pc(lv, bv, dv) * u.mag
    if bands:
        from .bands import av_to_band

        law = law or model.law
        rv = model.rv if rv is None else rv
        if law != model.law or float(np.max(rv)) != model.rv or float(np.min(rv)) != model.rv:
            note = (f"band extinctions under {law!r}, R_V = {rv!r} from the model's A_V, which is held fixed (it "
                    f"refers to {model.law!r}, R_V = {model.rv:g}); for tracers measured as reddening the A_V "
                    f"itself changes with the law and R_V: model.with_law(law, rv) gives that model")
            t.meta["band_law"] = note
            warnings.warn(f"query: {note}.", AssumptionWarning, stacklevel=3)
        temp = None
        if temperature is not None:
            if isinstance(temperature, u.Quantity):
                temperature = temperature.to_value(u.K, equivalencies=u.temperature())
            temp = np.broadcast_to(np.asarray(temperature, float), shape).ravel()
            t.meta["temperature"] = temp[0] if np.all(temp == temp[0]) else "per position"
        for band in bands:
            ab, abe = av_to_band(a, e, band, law=law, rv=rv, temperature=None if temp is None else temp * u.K)
            t[f"a_{band}"] = np.asarray(ab) * u.mag
            t[f"a_{band}_err"] = np.asarray(abe) * u.mag
    t.meta["caution"] = CAUTION
    return t


def profile_table(model, l, b, radius=None, distances=None):
    """Cumulative A_V against distance along one sight line (or averaged over a cone).

    Parameters
    ----------
    l, b : Quantity['angle']
        Centre of the sight line.
    radius : Quantity['angle'], optional
        Cone radius: the profile is averaged over the model's pixels inside the cone and
        the tracers inside it are listed in ``meta['tracers']``.
    distances : Quantity['length'], optional
        Where to evaluate (default: 0 to the last edge in 200 steps).

    Returns
    -------
    QTable
        ``distance``, ``av``, ``av_err``, ``av_layer``; cumulative A_V is non-decreasing.
    """
    model.check_fitted()
    lv, bv = (to_value(k, v, u.deg) for k, v in (("l", l), ("b", b)))
    for k, v in (("l", lv), ("b", bv)):
        if np.ndim(v) and np.size(v) != 1:
            raise param_error(k, "one sky position (a profile is one sight line; use query for many)",
                              Described(f"{np.size(v)} values"))
    lv = check_real("l", float(np.ravel(lv)[0])) % 360.0
    bv = check_real("b", float(np.ravel(bv)[0]), -90, 90)
    e = model.grid_.distance_edges
    if distances is None:
        dv = np.linspace(0.0, e[-1], 201)
    else:
        dv = np.atleast_1d(to_value("distances", _unmasked("distances", distances), u.pc)).astype(float).ravel()
        bad = ~(dv >= 0) | ~np.isfinite(dv)
        if bad.any():  # a negative distance was answered (binned: A_V > 0 before the Sun), a NaN crashed
            raise _position_error("distances", "finite and non-negative", dv, bad, hint="")
        dv = np.sort(dv)
    if radius is None:
        pts_l, pts_b = np.array([lv]), np.array([bv])
        rad = 0.0
    else:
        rad = to_scalar("radius", radius, u.deg)
        check_real("radius", rad, 0, 90)
        fine = max(model.grid_.nside * 4, 64)
        pp = healpix.query_disc(fine, lv, bv, rad)
        if pp.size == 0:
            pp = np.atleast_1d(healpix.ang2pix(fine, lv, bv))
        pts_l, pts_b = healpix.pix2ang(fine, pp)
    L = np.repeat(pts_l, dv.size)
    B = np.repeat(pts_b, dv.size)
    D = np.tile(dv, pts_l.size)
    a, err = model.av_pc(L, B, D)
    a = a.reshape(pts_l.size, dv.size)
    err = err.reshape(pts_l.size, dv.size)
    lay = model.layer_av_pc(L, B, D).reshape(pts_l.size, dv.size)
    av_mean = np.maximum.accumulate(a.mean(axis=0))
    # spread across the cone adds to the uncertainty of a single target inside it
    av_err = np.sqrt(np.mean(err**2, axis=0) + a.var(axis=0))
    t = QTable()
    t["distance"] = dv * u.pc
    t["av"] = av_mean * u.mag
    t["av_err"] = av_err * u.mag
    t["av_layer"] = lay.mean(axis=0) * u.mag
    t.meta.update({"l": lv, "b": bv, "radius": rad, "caution": CAUTION})
    tr = getattr(model, "tracers_", None)
    if tr is not None:
        sep = separation_deg(tr.l, tr.b, lv, bv)
        inside = sep <= max(rad, model.grid_pixel_radius())
        t.meta["tracers"] = tr.subset(inside).to_table() if inside.any() else None
    return t


def estimate_columns(model, bands=(), samples=0):
    """The columns :func:`estimate_targets` adds for this model and these bands, in order.

    Models that say how far each answer is supported (the 3-D density model's ``support``)
    add ``av_err_layer`` (the fitted layer's part of ``av_err``, shared by all rows),
    ``support``, ``n_tracers`` and ``prior_only``; ``samples`` adds ``av_samples``.
    """
    shared = ["av_err_layer"] if hasattr(model, "layer_err_pc") else []
    support = ["support", "n_tracers", "prior_only"] if hasattr(model, "support") else []
    drawn = ["av_samples"] if samples else []
    return (["av", "av_err"] + shared + support + drawn
            + [c for band in dict.fromkeys(bands) for c in (f"a_{band}", f"a_{band}_err")])


#: Columns :func:`estimate_targets` adds that are not magnitudes (every other one is in mag).
UNITLESS_COLUMNS = ("support", "n_tracers", "prior_only")


def estimate_targets(model, targets, bands=(), law=None, rv=None, samples=0, temperature=None, **read_options):
    """Extinction for a list of targets, keeping every input row and column.

    Parameters
    ----------
    model : fitted model
        An :class:`~dustkit.model.ExtinctionModel` (or any model with the interface in the
        module docstring).
    targets : TargetList, str, path-like, Table or pandas.DataFrame
        A :class:`~dustkit.tracers.TargetList`, or anything :func:`dustkit.read_targets`
        reads (``read_options`` are passed to it, e.g. ``columns=``, ``distance_unit=``).
    bands : sequence of str
        Bands whose extinction ``a_<band>`` (and ``a_<band>_err``) is added.
    law, rv : optional
        Law and R_V for the band extinctions (default: the model's).
    temperature : Quantity['temperature'], str or None
        The targets' stars for the band extinctions (a broad band's A/A_V depends on the star):
        one temperature, one per row, or a column name; None reads a temperature column such as
        ``teff`` when there is one, else takes a 5800 K blackbody (see
        :func:`dustkit.tracers.reader.target_temperatures`, which reads the column as ``read_tracers``
        reads one: bad cells leave that row's band extinctions empty and are announced with the row,
        empty cells and values set to the tables' edge are counted; ``meta["band_temperature"]`` says
        which, ``meta["band_temperature_rejected"]`` counts the bad cells by reason).
    samples : int
        Posterior draws of A_V per target to add as ``av_samples`` (n, samples), with each
        target's distance error drawn in: for users who propagate them. Only models that keep
        posterior draws (the 3-D density model) give them.

    Returns
    -------
    astropy.table.Table
        Every input row in input order with every input column, plus ``av``, ``av_err``
        (mag), for the 3-D density model ``av_err_layer`` (the part of ``av_err`` that is the
        fitted layer's, the same error under every row: it does not average down when rows
        are combined), ``support`` (0 = the prior alone, 1 = set by tracers), ``n_tracers``
        (kernel-weighted tracers in front) and ``prior_only`` (support below 0.1), then
        ``av_samples`` and the band columns. Rows that cannot be placed (no usable position or
        distance) keep NaN in the new columns (``prior_only`` masked); input columns with the
        same names as the new ones are renamed ``input_<name>`` (``input_<name>_2``, ... when the input has
        such a column already, as an earlier estimate's output does). ``meta["caution"]`` carries
        the caution, ``meta["n_estimated"]`` the number of rows estimated,
        ``meta["n_beyond_grid"]`` those beyond the model's last distance edge (their answers
        carry the smooth layer on from there, with growing errors; no tracer informs them) and
        ``meta["rejected_by_reason"]`` the rows left empty by reason (the rows themselves:
        ``TargetList.rejected``).
    """
    from .tracers import TargetList, read_targets
    from .bands import DEFAULT_TEMPERATURE
    from .tracers.context import emit
    from .tracers.reader import target_temperatures
    from .tracers.sets import input_column_name

    model.check_fitted()
    bands = list(dict.fromkeys(bands))
    samples = check_int("samples", samples, 0, 100_000)
    if samples and not hasattr(model, "draw"):
        raise param_error("samples", "0 for this model: it keeps no posterior draws (the 3-D density model does: "
                          "dustkit.build_model, or 'dustkit build' without grid options, up to 10^5 tracers)", samples)
    if not isinstance(targets, TargetList):
        targets = read_targets(targets, **read_options)  # announces rows kept empty (RowsRejectedWarning)
    elif read_options:
        raise param_error(", ".join(read_options), "given only when targets is read here (not a TargetList)",
                          "reading options with a TargetList")
    ok = np.asarray(targets.valid)
    if bands:
        temps = target_temperatures(targets, temperature)
        emit(temps.notes)
        no_star = np.isnan(temps.values)  # a bad temperature cell: the row's band extinctions stay empty
    table = Table(targets.table, copy=True)
    names = estimate_columns(model, bands, samples)
    # the draws are one column here and av_samples_1 .. av_samples_N in CSV (io.write_table): an input holding
    # either (an earlier estimate's CSV) keeps its columns under names of their own
    spread = [f"av_samples_{j}" for j in range(1, samples + 1)] if samples else []
    for c in names + spread:
        if c in table.colnames:
            table.rename_column(c, input_column_name(table.colnames, c))
    n = len(table)
    values = {c: np.full((n, samples) if c == "av_samples" else n, np.nan) for c in names}
    if ok.any():
        lv, bv, dv = (np.asarray(getattr(targets, k), float)[ok] for k in ("l", "b", "distance"))
        own = [c for c in names if c not in ("av", "av_err") and not c.startswith("a_")]  # the model's own columns
        ask = model.query if own else (lambda *a, **k: query_table(model, *a, **k))
        extra = {"samples": samples} if samples else {}
        if bands:
            extra["temperature"] = np.where(no_star, float(DEFAULT_TEMPERATURE.to_value(u.K)), temps.values)[ok] * u.K
        q = ask(lv * u.deg, bv * u.deg, dv * u.pc, distance_err=np.asarray(targets.distance_err)[ok] * u.pc,
                bands=tuple(bands), law=law, rv=rv, **extra)
        for c in names:
            values[c][ok] = u.Quantity(q[c]).to_value(u.mag) if c not in UNITLESS_COLUMNS else np.asarray(q[c], float)
            if c.startswith("a_"):
                values[c][no_star] = np.nan
    for c in names:
        if c == "prior_only":
            table[c] = MaskedColumn(values[c] > 0.5, mask=np.isnan(values[c]))
        elif c in UNITLESS_COLUMNS:
            table[c] = values[c]
        else:
            table[c] = values[c] * u.mag
    table.meta["caution"] = CAUTION
    if bands:
        table.meta["band_temperature"] = temps.source
        reasons, counts = np.unique(np.asarray(temps.rejected["reason"], dtype=str), return_counts=True)
        table.meta["band_temperature_rejected"] = {str(r): int(c) for r, c in zip(reasons, counts)}
    table.meta["n_estimated"] = int(ok.sum())
    last = float(model.grid_.distance_edges[-1])
    table.meta["n_beyond_grid"] = int(np.sum(np.asarray(targets.distance, float)[ok] > last))
    reasons, counts = np.unique(np.asarray(targets.rejected["reason"], dtype=str), return_counts=True)
    table.meta["rejected_by_reason"] = {str(r): int(c) for r, c in zip(reasons, counts)}
    return table


def grid_table(model, pixels=None):
    """A gridded model as a table: one row per pixel and distance bin.

    Columns: ``pixel``, ``l``, ``b`` (pixel centre, deg), ``distance_min``, ``distance_max``
    (pc), ``av``, ``av_err`` (cumulative at the bin's far edge, mag), ``av_near`` (cumulative
    at the near edge), ``differential`` (mag/kpc), ``n_tracers`` (tracers in the pixel and
    bin). Only ``model.informed_pixels()`` are listed unless ``pixels`` is given. Needs the
    model's node arrays ``av_``, ``av_err_`` (npix, n_edges), ``differential_`` and
    ``counts_`` (npix, n_bins).
    """
    model.check_fitted()
    g = model.grid_
    pixels = model.informed_pixels() if pixels is None else np.asarray(pixels, int)
    lc, bc = g.pixel_centres(pixels)
    nb, e = g.n_bins, g.distance_edges
    t = QTable()
    t["pixel"] = np.repeat(pixels, nb)
    t["l"] = np.repeat(lc, nb) * u.deg
    t["b"] = np.repeat(bc, nb) * u.deg
    t["distance_min"] = np.tile(e[:-1], pixels.size) * u.pc
    t["distance_max"] = np.tile(e[1:], pixels.size) * u.pc
    t["av_near"] = model.av_[pixels, :-1].ravel() * u.mag
    t["av"] = model.av_[pixels, 1:].ravel() * u.mag
    t["av_err"] = model.av_err_[pixels, 1:].ravel() * u.mag
    t["differential"] = model.differential_[pixels].ravel() * (u.mag / u.kpc)
    t["n_tracers"] = model.counts_[pixels].ravel()
    t.meta.update({"nside": g.nside, "ordering": g.ordering.upper(), "coordsys": "G", "law": model.law,
                   "rv": model.rv, **{f"layer_{k}": v for k, v in model.layer_.as_dict().items()},
                   "caution": CAUTION})
    return t
