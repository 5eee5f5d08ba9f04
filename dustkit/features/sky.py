"""Features across the sky: steps along the sight lines of a model or tracer set, merged between neighbours.

See :mod:`dustkit.features` for the method and its references.
"""

import numpy as np
from astropy import units as u
from astropy.table import QTable
from scipy import sparse
from scipy.sparse.csgraph import connected_components

from .._lib import healpix
from ..exceptions import ModelNotFittedError
from .._lib.progress import progress
from .._lib.sky import separation_deg
from .._lib.validation import check_int, check_real, check_seed, param_error, to_value
from ..answers import CAUTION
from .steps import Line, STEP_METHOD, check_common, find_steps_arrays, find_steps_plain, reject_rows, steps_table

__all__ = ["sight_line_features", "detect_features", "adaptive_radii"]


def _is_model(obj):
    return hasattr(obj, "grid_") or (hasattr(obj, "fit") and hasattr(obj, "nside"))


def _model_tracers(model):
    """Tracer arrays, their A_V with the model's smooth layer removed, and the layer's slope (mag/pc)."""
    if not hasattr(model, "av_"):
        raise ModelNotFittedError("This ExtinctionModel is not fitted yet. Hint: call model.fit(tracers) first.")
    tr = model.tracers_
    l, b, d, de, a, ae = (np.asarray(getattr(tr, k), float) for k in ("l", "b", "distance", "distance_err", "av", "av_err"))
    dd = np.maximum(d, 1.0)
    resid = a - model.layer_.av_pc(b, dd)
    h = 0.01 * dd
    slope = (model.layer_.av_pc(b, dd + h) - model.layer_.av_pc(b, dd - h)) / (2.0 * h)
    return l, b, d, de, resid, ae, slope


def sight_line_features(model_or_tracers, l, b, radius=None, **kwargs):
    """Steps in A_V against distance for the tracers in a cone around (l, b).

    Parameters
    ----------
    model_or_tracers : ExtinctionModel or TracerSet
        A fitted model (its tracers are used, with its smooth dust layer subtracted so that
        the step-free model is nearly flat) or a tracer set (used as it is).
    l, b : Quantity['angle']
        Centre of the cone, Galactic.
    radius : Quantity['angle'], optional
        Cone radius; default the model's pixel radius (required for a tracer set).
    **kwargs
        Passed to :func:`find_steps` (``min_tracers``, ``min_significance``,
        ``min_delta_av``, ``min_boot_fraction``, ``max_steps``, ``n_boot``,
        ``random_state``).

    Returns
    -------
    QTable
        As :func:`find_steps`, plus ``l``, ``b`` (deg) of the cone; ``meta`` also has
        ``radius`` (deg) and ``layer_subtracted``.
    """
    lv = float(np.asarray(to_value("l", l, u.deg))) % 360.0
    bv = float(np.asarray(to_value("b", b, u.deg)))
    check_real("b", bv, -90.0, 90.0)
    if _is_model(model_or_tracers):
        tl, tb, d, de, a, ae, slope = _model_tracers(model_or_tracers)
        default_radius = model_or_tracers.grid_pixel_radius()
        layer = True
    elif hasattr(model_or_tracers, "distance_err") and hasattr(model_or_tracers, "av_err"):
        tr = model_or_tracers
        tl, tb, d, de, a, ae = (np.asarray(getattr(tr, k), float) for k in ("l", "b", "distance", "distance_err", "av", "av_err"))
        slope = None
        default_radius = None
        layer = False
    else:
        raise param_error("model_or_tracers", "a fitted ExtinctionModel or a TracerSet", type(model_or_tracers).__name__)
    if radius is None:
        if default_radius is None:
            raise param_error("radius", "given (e.g. 1 * u.deg) when searching a TracerSet", None)
        rad = default_radius
    else:
        rad = float(np.asarray(to_value("radius", radius, u.deg)))
    check_real("radius", rad, 0.0, 90.0, low_inclusive=False)
    opts = check_common(kwargs.pop("min_tracers", 3), kwargs.pop("min_significance", 10.0),
                         kwargs.pop("min_delta_av", 0.2 * u.mag), kwargs.pop("min_boot_fraction", 0.5),
                         kwargs.pop("max_steps", 5), kwargs.pop("n_boot", 100))
    random_state = check_seed(kwargs.pop("random_state", 0))
    if kwargs:
        raise param_error(next(iter(kwargs)), "one of find_steps' settings", kwargs[next(iter(kwargs))])
    inside = separation_deg(tl, tb, lv, bv) <= rad
    t = find_steps_plain(d[inside], de[inside], a[inside], ae[inside], opts, random_state,
                          meta_extra={"l": lv, "b": bv, "radius": rad, "layer_subtracted": layer},
                          slope=None if slope is None else slope[inside])
    t.add_column(np.full(len(t), lv) * u.deg, name="l", index=0)
    t.add_column(np.full(len(t), bv) * u.deg, name="b", index=1)
    return t


def _cone_members(grid, order, sorted_pix, tl, tb, lc, bc, rad, pix_rad):
    """Indices of tracers within ``rad`` deg of (lc, bc), via the pixels the cone touches."""
    # every pixel overlapping the cone has its centre within rad + (a pixel's largest half-size)
    pix = healpix.query_disc(grid.nside, lc, bc, rad + 1.5 * pix_rad, nest=grid.nest)
    lo = np.searchsorted(sorted_pix, pix, side="left")
    hi = np.searchsorted(sorted_pix, pix, side="right")
    cnt = hi - lo
    if cnt.sum() == 0:
        return np.zeros(0, int)
    starts = np.repeat(lo - np.concatenate([[0], np.cumsum(cnt)[:-1]]), cnt)
    idx = order[starts + np.arange(cnt.sum())]
    return idx[separation_deg(tl[idx], tb[idx], lc, bc) <= rad]


def _unit_vectors(l_deg, b_deg):
    l, b = np.deg2rad(l_deg), np.deg2rad(b_deg)
    return np.stack([np.cos(b) * np.cos(l), np.cos(b) * np.sin(l), np.sin(b)], axis=-1)


def adaptive_radii(tl, tb, lc, bc, min_radius, n_tracers=30, max_radius=6.0):
    """Cone radius (deg) around each pixel centre: the smallest holding ``n_tracers`` tracers.

    Never below ``min_radius`` (the pixel's own size) nor above ``max_radius``; so dense
    field-star samples keep one-pixel cones while a cluster catalogue of a few thousand
    (one to three clusters per 1.8-deg pixel) gets cones wide enough to have tracers on
    both sides of a step.
    """
    from scipy.spatial import cKDTree

    if tl.size == 0:
        return np.full(lc.size, float(min_radius))
    k = int(min(n_tracers, tl.size))
    dist, _ = cKDTree(_unit_vectors(tl, tb)).query(_unit_vectors(lc, bc), k=k)
    chord = dist if k == 1 else dist[:, -1]
    ang = np.rad2deg(2.0 * np.arcsin(np.clip(chord / 2.0, 0.0, 1.0)))
    return np.clip(ang, min_radius, max(max_radius, min_radius))


def detect_features(model, *, radius=None, min_delta_av=0.2 * u.mag, min_significance=10.0, min_tracers=3,
                    min_boot_fraction=0.5, max_steps=3, n_boot=50, merge_sigma=3.0, random_state=0, quiet=None,
                    return_detections=False, cone_tracers=30, max_radius=6 * u.deg):
    """Dust features across the sky: steps found per pixel, merged across neighbouring pixels.

    For every pixel the model is informed in, the tracers in a cone around the pixel centre
    are searched for steps (:func:`find_steps`, on A_V minus the model's smooth layer).
    Detections in neighbouring pixels (HEALPix 8-neighbours) whose distances agree within
    ``merge_sigma`` times their combined errors are joined into one feature.

    Parameters
    ----------
    model : ExtinctionModel
        A fitted model.
    radius : Quantity['angle'], optional
        Cone radius around each pixel centre. Default: adaptive, per pixel the smallest
        cone holding ``cone_tracers`` tracers, at least the model's pixel radius (so dense
        samples get cones that tile the sky with little overlap) and at most
        ``max_radius`` (:func:`adaptive_radii`).
    cone_tracers : int
        Tracers an adaptive cone reaches for (default 30: enough for steps with tracers on
        both sides and a bootstrap).
    max_radius : Quantity['angle']
        Widest adaptive cone (default 6 deg).
    min_delta_av : Quantity['mag']
        Smallest step kept per pixel (default 0.2 mag).
    min_significance, min_tracers, min_boot_fraction, max_steps, n_boot, random_state
        As for :func:`find_steps` (``max_steps`` per pixel; default 3; ``n_boot`` default
        50 to keep sky-wide runs quick).
    merge_sigma : float
        Detections in neighbouring pixels are the same feature when their distances differ
        by less than ``merge_sigma * sqrt(err1**2 + err2**2)`` (default 3: on simulations
        the bootstrap distance errors of single pixels are 20-30% smaller than their actual
        scatter, so 2 would split clouds).
    quiet : bool, optional
        Hide the progress bar (default: shown only on a terminal).
    return_detections : bool
        Also return the per-pixel detections.

    Returns
    -------
    features : QTable
        One row per feature, nearest first: ``feature`` (id), ``l``, ``b`` (centre,
        weighted by the step sizes, deg), ``extent`` (deg; the step-weighted RMS angular
        offset of the member pixels per axis, including each pixel's own size, i.e. a
        Gaussian-sigma-like radius), ``distance``, ``distance_err`` (pc; error-weighted mean
        of the members, its error inflated by the members' excess scatter),
        ``delta_av``, ``delta_av_err`` (mag; mean step over the member pixels),
        ``delta_av_max`` (mag; the largest member step), ``n_tracers`` (distinct tracers
        in the member cones), ``n_pixels``, ``significance`` (largest member BIC
        improvement). ``meta`` holds the settings, ``nside``, ``ordering``, ``method`` and
        ``caution``.
    detections : QTable
        Only with ``return_detections``: one row per pixel step, with ``pixel``, ``l``,
        ``b``, the columns of :func:`find_steps`, ``n_tracers`` and ``feature``.
    """
    opts = check_common(min_tracers, min_significance, min_delta_av, min_boot_fraction, max_steps, n_boot)
    merge_sigma = check_real("merge_sigma", merge_sigma, 0.0, np.inf, low_inclusive=False)
    random_state = check_seed(random_state)
    if not _is_model(model):
        raise param_error("model", "a fitted ExtinctionModel", type(model).__name__)
    tl, tb, d, de, a, ae, slope = _model_tracers(model)
    grid = model.grid_
    rad = model.grid_pixel_radius() if radius is None else float(np.asarray(to_value("radius", radius, u.deg)))
    check_real("radius", rad, 0.0, 90.0, low_inclusive=False)
    cone_tracers = check_int("cone_tracers", cone_tracers, 1, 100_000)
    rmax = float(np.asarray(to_value("max_radius", max_radius, u.deg, default_unit=u.deg)))
    check_real("max_radius", rmax, 0.0, 90.0, low_inclusive=False)
    keep = reject_rows(d, de, a, ae)
    tl, tb, d, de, a, ae, slope = (v[keep] for v in (tl, tb, d, de, a, ae, slope))
    tpix = grid.pixel(tl, tb)
    order = np.argsort(tpix, kind="stable")
    sorted_pix = tpix[order]
    pixels = model.informed_pixels()
    lc, bc = grid.pixel_centres(pixels)
    pix_rad = model.grid_pixel_radius()
    radii = (adaptive_radii(tl, tb, lc, bc, pix_rad, cone_tracers, rmax) if radius is None
             else np.full(pixels.size, rad))
    rows = []
    members = []
    seed = np.random.SeedSequence(random_state).entropy  # each pixel gets its own stream from it
    for k in progress(range(pixels.size), desc="features", quiet=model.quiet if quiet is None else quiet):
        idx = _cone_members(grid, order, sorted_pix, tl, tb, lc[k], bc[k], radii[k], pix_rad)
        if idx.size < 2 * opts["min_tracers"]:
            continue
        line = Line(d[idx], de[idx], a[idx], ae[idx], slope=slope[idx])
        rng = np.random.default_rng([seed, int(pixels[k])])
        steps = find_steps_arrays(line, min_tracers=opts["min_tracers"], min_significance=opts["min_significance"],
                                   min_delta_av=opts["min_delta_av"], min_boot_fraction=opts["min_boot_fraction"],
                                   max_steps=opts["max_steps"], n_boot=opts["n_boot"], rng=rng)
        for s in steps:
            rows.append((int(pixels[k]), lc[k], bc[k], s, idx.size, radii[k]))
            members.append(idx)
    det = _detections_table(rows)
    feats, labels = _merge(det, members, grid, det["radius"].to_value(u.deg) if len(det) else rad, merge_sigma)
    det["feature"] = labels
    meta = {"nside": grid.nside, "ordering": grid.ordering.upper(), "coordsys": "G",
            "radius": rad if radius is not None else "adaptive",
            "radius_range": [float(radii.min()), float(radii.max())] if radii.size else [rad, rad],
            "cone_tracers": cone_tracers if radius is None else 0,
            "merge_sigma": merge_sigma, **opts, "n_pixels_searched": int(pixels.size),
            "layer_subtracted": True, "method": STEP_METHOD, "caution": CAUTION}
    feats.meta.update(meta)
    det.meta.update(meta)
    return (feats, det) if return_detections else feats


def _detections_table(rows):
    t = steps_table([r[3] for r in rows], {})
    t.add_column(np.array([r[0] for r in rows], int), name="pixel", index=0)
    t.add_column(np.array([r[1] for r in rows], float) * u.deg, name="l", index=1)
    t.add_column(np.array([r[2] for r in rows], float) * u.deg, name="b", index=2)
    t["n_tracers"] = np.array([r[4] for r in rows], int)
    t["radius"] = np.array([r[5] for r in rows], float) * u.deg
    return t


def _neighbour_pairs(pix, nside, nest):
    """Pairs (i, j) of detections lying in neighbouring pixels (vectorised join)."""
    n = pix.size
    if n == 0:
        return np.zeros(0, int), np.zeros(0, int)
    order = np.argsort(pix, kind="stable")
    sp = pix[order]
    nb = healpix.neighbours(nside, pix, nest=nest)  # (8, n), -1 where none
    src = np.repeat(np.arange(n)[None, :], nb.shape[0], axis=0).ravel()
    nb = nb.ravel()
    ok = nb >= 0
    src, nb = src[ok], nb[ok]
    lo = np.searchsorted(sp, nb, side="left")
    hi = np.searchsorted(sp, nb, side="right")
    cnt = hi - lo
    i = np.repeat(src, cnt)
    starts = np.repeat(lo - np.concatenate([[0], np.cumsum(cnt)[:-1]]), cnt)
    j = order[starts + np.arange(cnt.sum())]
    return i, j


def _merge(det, members, grid, rad, merge_sigma):
    """Join detections in neighbouring pixels at consistent distances into features."""
    n = len(det)
    cols = ("feature", "l", "b", "extent", "distance", "distance_err", "delta_av", "delta_av_err",
            "delta_av_max", "n_tracers", "n_pixels", "significance")
    if n == 0:
        t = QTable()
        units = {"l": u.deg, "b": u.deg, "extent": u.deg, "distance": u.pc, "distance_err": u.pc,
                 "delta_av": u.mag, "delta_av_err": u.mag, "delta_av_max": u.mag}
        for c in cols:
            t[c] = np.zeros(0, int if c in ("feature", "n_tracers", "n_pixels") else float) * units.get(c, 1)
            if c not in units:
                t[c] = np.zeros(0, int if c in ("feature", "n_tracers", "n_pixels") else float)
        return t, np.zeros(0, int)
    pix = np.asarray(det["pixel"])
    dist = det["distance"].to_value(u.pc)
    derr = det["distance_err"].to_value(u.pc)
    derr = np.where(np.isfinite(derr) & (derr > 0), derr, 0.1 * dist)
    i, j = _neighbour_pairs(pix, grid.nside, grid.nest)
    close = np.abs(dist[i] - dist[j]) <= merge_sigma * np.hypot(derr[i], derr[j])
    adj = sparse.coo_matrix((np.ones(close.sum()), (i[close], j[close])), shape=(n, n))
    n_feat, lab = connected_components(adj, directed=False)
    # number features by distance of their members (nearest first)
    wd = 1.0 / derr**2
    fd = np.bincount(lab, wd * dist, n_feat) / np.bincount(lab, wd, n_feat)
    rank = np.empty(n_feat, int)
    rank[np.argsort(fd, kind="stable")] = np.arange(n_feat)
    lab = rank[lab]
    delta = det["delta_av"].to_value(u.mag)
    derr_av = det["delta_av_err"].to_value(u.mag)
    derr_av = np.where(np.isfinite(derr_av), derr_av, 0.0)
    sig = np.asarray(det["significance"], float)
    l = det["l"].to_value(u.deg)
    b = det["b"].to_value(u.deg)
    vec = _unit_vectors(l, b)  # (n, 3)
    w = np.maximum(delta, 1e-6)
    # step-weighted centre on the sphere
    cvec = np.stack([np.bincount(lab, w * vec[:, k], n_feat) for k in range(3)], axis=1)
    cvec = cvec / np.linalg.norm(cvec, axis=1, keepdims=True)
    cl = np.rad2deg(np.arctan2(cvec[:, 1], cvec[:, 0])) % 360.0
    cb = np.rad2deg(np.arcsin(np.clip(cvec[:, 2], -1.0, 1.0)))
    off = separation_deg(l, b, cl[lab], cb[lab])
    wsum = np.bincount(lab, w, n_feat)
    # RMS offset per axis (a 2-D Gaussian of sigma s has <r^2> = 2 s^2) plus the cone's own size
    rad2 = np.bincount(lab, w * np.broadcast_to(np.asarray(rad, float) ** 2, w.shape), n_feat) / wsum
    extent = np.sqrt(np.bincount(lab, w * off**2, n_feat) / (2.0 * wsum) + rad2 / 4.0)
    wdsum = np.bincount(lab, wd, n_feat)
    fdist = np.bincount(lab, wd * dist, n_feat) / wdsum
    npx = np.bincount(lab, minlength=n_feat)
    chi2 = np.bincount(lab, wd * (dist - fdist[lab]) ** 2, n_feat)
    birge = np.sqrt(np.maximum(1.0, chi2 / np.maximum(npx - 1, 1)))
    fdist_err = birge / np.sqrt(wdsum)
    fdelta = np.bincount(lab, delta, n_feat) / npx
    # error of the mean step: members' own errors and their spread, whichever is larger
    spread = np.sqrt(np.bincount(lab, (delta - fdelta[lab]) ** 2, n_feat) / np.maximum(npx - 1, 1))
    own = np.sqrt(np.bincount(lab, derr_av**2, n_feat)) / npx
    fdelta_err = np.where(npx > 1, np.maximum(own, spread / np.sqrt(npx)), own)
    fmax = np.full(n_feat, -np.inf)
    np.maximum.at(fmax, lab, delta)
    fsig = np.full(n_feat, -np.inf)
    np.maximum.at(fsig, lab, sig)
    ntr = np.array([np.unique(np.concatenate([members[k] for k in np.nonzero(lab == f)[0]])).size
                    for f in range(n_feat)], int)  # loop over features, not tracers
    t = QTable()
    t["feature"] = np.arange(1, n_feat + 1)
    t["l"] = np.mod(cl, 360.0) * u.deg
    t["b"] = cb * u.deg
    t["extent"] = extent * u.deg
    t["distance"] = fdist * u.pc
    t["distance_err"] = fdist_err * u.pc
    t["delta_av"] = fdelta * u.mag
    t["delta_av_err"] = fdelta_err * u.mag
    t["delta_av_max"] = fmax * u.mag
    t["n_tracers"] = ntr
    t["n_pixels"] = npx
    t["significance"] = fsig
    return t, lab + 1
