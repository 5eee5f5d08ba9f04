"""The finishing step: from sufficient statistics to the fitted arrays of the binned model.

Choose the smoothing by cross-validation (:mod:`.crossval`) on one half of the held-out
tracers, calibrate the predictive uncertainty on the other half (:mod:`.calibration`;
small held-out sets use all their tracers for both, :func:`.folds.calibration_half`),
smooth the statistics of all tracers with the chosen setting (:mod:`.smoothing`), and
enforce non-decreasing cumulative A_V along every sight line by weighted isotonic
regression (Barlow et al. 1972, Statistical Inference under Order Restrictions). The
calibration sees the held-out predictions after that monotone step, and the variance of
every node includes the square of the shift the step made there, so the errors describe
the final, monotone model. Held-out tracers beyond the last distance edge are not used
(their sums were left out too: :mod:`.statistics`). The result is a :class:`FitResult`.

Pixels no tracer reaches (through the widest sky kernel) take :func:`empty_pixel_fill`:
residual 0 (the layer alone), the random walk's prior variance. Model files leave such
pixels out and rebuild them with the same function on loading.
"""

from dataclasses import dataclass

import numpy as np
from astropy import units as u
from astropy.table import Table

from .._lib.isotonic import isotonic_rows
from ..exceptions import CatalogError
from .calibration import calibrate_on_heldout, predictive_variance, prior_walk
from .crossval import HeldOutRows, choose_smoothing
from .folds import calibration_half
from .smoothing import (distance_sigmas, kalman_smooth, neighbour_matrix, node_observations, prior_variance,
                        sky_kernels, smooth_distance, smooth_sky)

__all__ = ["FitResult", "finish", "empty_pixel_fill", "WALK_FACTORS"]

#: candidate random-walk strengths, in units of the held-out tracers' residual variance per median kpc
WALK_FACTORS = (0.1, 0.3, 1.0, 3.0, 10.0)


@dataclass
class FitResult:
    """What the finishing step learned (arrays (npix, n_edges) unless said otherwise).

    ``resid``: cumulative residual from the layer (mag); ``post_var``: its smoother variance
    (mag^2); ``av``, ``av_err``: cumulative A_V and its predictive 1-sigma error (mag);
    ``n_tracers``: effective tracers per node; ``differential`` (npix, n_bins): mag/kpc;
    ``scatter``: the calibrated predictive variance; ``cv``: the cross-validation table;
    ``report``: counts and notes of the build (tracers beyond the grid, the held-out split).
    """

    grid: object
    layer: object
    sky_passes: int
    distance_smoothing: float
    walk_variance: float
    scatter: dict
    resid: np.ndarray
    post_var: np.ndarray
    av: np.ndarray
    av_err: np.ndarray
    n_tracers: np.ndarray
    differential: np.ndarray
    cv: Table
    report: dict


def empty_pixel_fill(grid, layer, walk_variance, scatter):
    """The model's arrays where no tracer reaches, for every pixel: a dict attribute -> (npix, ...) array.

    Residual 0 (the layer alone, at least 0), the random walk's prior variance, no tracers;
    the error is at least the prior's spread (the calibration does not shrink the prior).
    Keys are the fitted attribute names of :class:`dustkit.model.ExtinctionModel`.
    """
    edges = grid.distance_edges
    _, bc = grid.pixel_centres()
    layer_c = layer.av_pc(bc[:, None], edges[None, :])
    shape = (grid.npix, edges.size)
    prior = np.broadcast_to(prior_variance(walk_variance, edges), shape)
    post_var = prior.copy()
    av = np.maximum(layer_c, 0.0)
    return {
        "_resid_": av - layer_c,
        "_post_var_": post_var,
        "av_": av,
        "av_err_": np.sqrt(predictive_variance(scatter, post_var, av, prior)),
        "n_tracers_": np.zeros(shape),
        "counts_": np.zeros((grid.npix, grid.n_bins), dtype=np.int64),
        "differential_": np.diff(av, axis=1) / (np.diff(edges) / 1000.0)[None, :],
    }


def _active_pixels(grid, total, passes):
    """Pixels within reach of the tracers through the widest sky kernel, and the one-pass matrix."""
    reach = (total[0].sum(axis=1) > 0).astype(float)
    one = neighbour_matrix(grid)
    for _ in range(max(passes)):
        reach = one @ reach
    return np.nonzero(reach > 0)[0], one


def _cv_table(tried, folds, n_heldout, n_beyond):
    cv = Table(rows=tried, names=("sky_passes", "distance_smoothing", "walk_variance", "cv_mse"))
    cv.meta["validation"] = (f"{folds}-fold cross-validation over all {n_heldout} tracers" if folds > 1 else
                             f"one held-out set of {n_heldout} tracers")
    if n_beyond:
        cv.meta["validation"] += f" ({n_beyond} beyond the distance grid not used)"
    cv["distance_smoothing"].unit = u.pc
    cv["walk_variance"].unit = u.mag**2 / u.kpc
    cv["cv_mse"].unit = u.mag**2
    return cv


def finish(grid, layer, statistics, passes, heldout, rng):
    """Choose the smoothing, calibrate the errors and compute the fitted arrays.

    Parameters
    ----------
    grid : Grid
    layer : DustLayer
    statistics : dustkit.binned.statistics.Statistics
        ``total`` and ``fold_stats`` are used (``counts`` are the caller's).
    passes : list of int
        Candidate numbers of sky-smoothing passes, sorted.
    heldout : dustkit.binned.folds.HeldOut
        The held-out tracers, one fold each (fold ``f`` is predicted from
        ``total - fold_stats[:, f]``).
    rng : numpy.random.Generator
        Draws the calibration subset of a large held-out set.

    Returns
    -------
    FitResult
    """
    total, fold_stats = statistics.total, statistics.fold_stats
    folds = fold_stats.shape[1]
    _, bc = grid.pixel_centres()
    edges = grid.distance_edges
    layer_c = layer.av_pc(bc[:, None], edges[None, :])
    active, one = _active_pixels(grid, total, passes)
    kernels = sky_kernels(grid, passes, active, one)
    total = total[:, active, :]
    inside = np.asarray(heldout.distance) <= edges[-1]  # beyond the grid: only a bound, not a check
    h = heldout.subset(inside)
    if h.l.size < 10:
        raise CatalogError(f"Only {h.l.size} held-out tracers lie within the distance grid (out to "
                           f"{edges[-1]:g} pc); at least 10 are needed. Hint: raise distance_max.")
    calib = calibration_half(h)
    choose = ~calib if not calib.all() else calib
    layer_held = layer.av_pc(h.b, h.distance)  # the layer at the held-out tracers
    resid_var = max(float(np.var(h.av - layer_held)), 1e-6)
    span_kpc = max(float(np.median(h.distance)) / 1000.0, 0.1)
    walk = resid_var / span_kpc * np.array(WALK_FACTORS)
    sigmas = sorted(distance_sigmas(edges))
    rows = HeldOutRows(grid, h, active, total, fold_stats[:, :, active, :], kernels, sigmas)
    (p_best, sd_best, q_best), tried = choose_smoothing(rows, layer_held, passes, sigmas, walk, use=choose)
    # the errors' prior where no tracer informs, from the held-out residuals less the tracers' own
    # errors (A_V, and distance through the layer's slope)
    slope_err = 0.5 * (layer.av_pc(h.b, h.distance + h.distance_err) -
                       layer.av_pc(h.b, np.maximum(h.distance - h.distance_err, 0.0)))
    q_err = prior_walk(h.distance, h.av - layer_held, h.av_err**2 + slope_err**2)
    scatter = calibrate_on_heldout(rows, layer, (p_best, sd_best, q_best), rng, use=calib, walk_prior=q_err)
    sm_total = smooth_distance(smooth_sky(total, kernels[p_best]), rows.dkern[sd_best])
    rows.release()
    del rows

    # final model from all tracers
    m, ov, neff = node_observations(sm_total)
    r, pv = kalman_smooth(m, ov, edges, q_best)
    prior = prior_variance(q_best, edges)
    r, pv, neff = (_on_all_pixels(grid, active, v, fill) for v, fill in ((r, 0.0), (pv, prior), (neff, 0.0)))
    raw = layer_c + r
    a_iso = np.maximum(isotonic_rows(raw, 1.0 / (pv + 1e-6)), 0.0)
    shift = a_iso - raw
    pv = pv + shift**2  # the monotone step's move counts as error, as in the calibration
    report = {
        "beyond_grid": int(getattr(statistics, "n_beyond", 0)),
        "heldout_beyond_grid": int(np.count_nonzero(~inside)),
        "heldout_split": bool(not calib.all()),
        "heldout_choose": int(np.count_nonzero(choose)), "heldout_calibrate": int(np.count_nonzero(calib)),
        "max_isotonic_shift": float(np.max(np.abs(shift))) if shift.size else 0.0,
    }
    report["notes"] = _notes(report, edges[-1])
    return FitResult(
        grid=grid, layer=layer, sky_passes=int(p_best), distance_smoothing=float(sd_best),
        walk_variance=float(q_best), scatter=scatter, resid=a_iso - layer_c, post_var=pv, av=a_iso,
        av_err=np.sqrt(predictive_variance(scatter, pv, a_iso, prior[None, :])), n_tracers=neff,
        differential=np.diff(a_iso, axis=1) / (np.diff(edges) / 1000.0)[None, :],
        cv=_cv_table(tried, folds, inside.size, report["heldout_beyond_grid"]), report=report,
    )


def _notes(report, last_edge):
    notes = []
    if report["beyond_grid"]:
        notes.append(f"{report['beyond_grid']} tracers beyond the last distance edge ({last_edge:g} pc) were left "
                     "out of the estimates: their A_V only bounds the extinction at the last edge from above.")
    if report["heldout_split"]:
        notes.append(f"The smoothing was chosen on {report['heldout_choose']} held-out tracers and the errors "
                     f"calibrated on {report['heldout_calibrate']} others.")
    else:
        notes.append(f"The smoothing was chosen and the errors calibrated on the same {report['heldout_calibrate']} "
                     "held-out tracers (too few to split).")
    return notes


def _on_all_pixels(grid, active, values, fill):
    out = np.broadcast_to(fill, (grid.npix, grid.distance_edges.size)).copy()
    out[active] = values
    return out
