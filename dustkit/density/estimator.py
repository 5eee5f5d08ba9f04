"""DensityModel: the 3-D log-normal dust density model behind the answers interface."""

import time

import numpy as np
from astropy import units as u
from astropy.table import Table

import inspect
import warnings

from .._lib import healpix
from .._lib.progress import extend_total, progress
from .._lib.validation import (check_choice, check_int, check_nside, check_quiet, check_real, check_seed,
                                param_error, to_scalar, to_value)
from ..answers import av_quantities, distance_errors, grid_table, profile_table, query_table, sky_positions
from ..exceptions import CatalogError, DustkitWarning, ModelNotFittedError, ParameterError
from ..grid import Grid
from ..layer import given_layer
from . import lattice as _lattice
from .lattice import Lattice, active_pixels, informing_counts, prior_cumulative_var
from .heldout import (ERROR_SIGNIFICANCE, cell_boost, compare_background, excess_noise, fit_unresolved_fractions,
                      held_out_excess, layer_increments, local_bias_variance, placement_variance, unresolved_variance)
from .inputs import catalogue_lift, duplicate_weights, fit_catalogue_layer  # noqa: F401  (kept importable here)
from .inputs import left_of_pull, lift_report, tracer_inputs
from .layer_share import layer_error_variance, layer_variance
from .solver import cumulative_at_nodes, draw_samples, fit_posterior, log_evidence, tracer_terms

__all__ = ["DensityModel", "default_distance_edges", "choose_nside", "duplicate_weights", "fit_catalogue_layer",
           "catalogue_lift"]

from ..tracers.rules import AV_ERR_FLOOR  # noqa: E402  (0.02 mag, the floor every fit uses)

#: Largest number of tracers the hyperparameter search (cross-validation, held-out misses)
#: works on; a larger catalogue lends it a random subset of this size and the final fit uses
#: every tracer (10^5 field stars: the search would take most of the build).
CV_TRACERS = 20_000
#: Relative CG tolerances (fold fits, held-out draws, kept draws) for catalogues of
#: SEARCH_LOOSE[0] to SEARCH_LOOSE[1] tracers (elsewhere 1e-2 each): a held-out variance is itself
#: a six-draw estimate (scatter ~60%), 32 kept draws estimate one to ~25%, and the choices and
#: answers for 3 000 clusters came out the same at a quarter less cost. Not beyond: where the
#: data pin the posterior, its variance is a small difference that CG's residual would swamp
#: (20 000 field stars chose another prior; benchmarks/README.md).
SEARCH_TOL, SEARCH_LOOSE = (3e-2, 5e-2, 2e-2), (1000, 5000)


def default_distance_edges(distance_max=6000.0, near_step=50.0, growth=0.1):
    """Distance edges (pc): ``near_step`` steps while they are finer than ``growth`` x distance, then geometric.

    The bins grow like typical distance errors of clusters (8%), which set the depth
    resolution a catalogue can support.
    """
    edges = [0.0]
    while edges[-1] < distance_max - 1e-6:
        step = max(near_step, growth * edges[-1])
        edges.append(min(edges[-1] + step, distance_max))
    if distance_max - edges[-2] < 0.3 * max(near_step, growth * edges[-2]):
        edges.pop(-2)
    return np.asarray(edges)


def choose_nside(l_deg, b_deg, candidates=(128, 64), per_pixel=8):
    """NSIDE for a catalogue: the finest candidate whose occupied pixels hold ``per_pixel`` tracers (median), else 32.

    Cluster catalogues (a few thousand over the Galactic plane) get 32 (1.8 deg pixels);
    dense field-star samples finer pixels, where the data resolve smaller structure.
    """
    for nside in candidates:
        pix = healpix.ang2pix(nside, l_deg, b_deg)
        counts = np.bincount(pix)
        if np.median(counts[counts > 0]) >= per_pixel:
            return nside
    return 32


def _blocks(l, b, d, n_folds, random_state):
    """Spatially blocked folds: HEALPix NSIDE 16 sky cells x 25%-deep shells, hashed to folds."""
    pix = healpix.ang2pix(16, l, b)
    shell = np.floor(np.log(np.maximum(d, 1.0)) / 0.25).astype(np.int64)
    key = pix * 1000 + shell
    uniq, inv = np.unique(key, return_inverse=True)
    rng = np.random.default_rng(random_state)
    return rng.integers(0, n_folds, uniq.size)[inv]


class DensityModel:
    """3-D model of the dust density: log-normal, spatially correlated, with posterior uncertainties.

    The density in each cell (HEALPix pixel x distance bin) is the fitted smooth layer times
    ``exp(f)``, with ``f`` a Gaussian field correlated along and across sight lines
    (amplitude ``s``, correlation length ``L``; :mod:`dustkit.density.lattice`), so the
    density is positive and cumulative A_V non-decreasing by construction, with no
    post-hoc step. Each tracer constrains the line integral of the density out to its own
    uncertain distance (:mod:`dustkit.density.solver`). The amplitude and correlation
    length are chosen by cross-validation in spatially blocked folds; what the cells cannot
    resolve is measured on the same held-out tracers: a fraction ``tau`` of A_V everywhere
    and, near tracers that the model missed, a local unresolved variance. Answers are the
    posterior mode with the Laplace posterior's spread, which widens to the prior where
    there are no tracers.

    Parameters
    ----------
    nside : int or 'auto'
        HEALPix NSIDE of the cells. ``'auto'`` (default): 32 (1.8 deg pixels) for catalogues of
        clusters, finer where tracers are dense (:func:`choose_nside`).
    distance_max : Quantity['length']
        Far edge of the grid (default 6 kpc); the bins grow from 50 pc with distance
        (:func:`default_distance_edges`) unless ``distance_edges`` is given.
    distance_edges : Quantity['length'], optional
    amplitudes : sequence of float
        Candidate prior standard deviations ``s`` of the log-density contrast.
    lengths : Quantity['length'] sequence
        Candidate correlation lengths ``L``.
    n_folds : int
        Spatially blocked cross-validation folds.
    n_samples : int
        Posterior samples kept for the answers (``draw``).
    active_radius : Quantity['angle']
        Pixels within this angle of a tracer carry free parameters; the rest keep the prior.
    random_state : int
    quiet : bool, optional
        Hide the progress bar (default: shown only on a terminal).
    layer : DustLayer or dict, optional
        A smooth layer to use instead of fitting one (e.g. fitted once to a wide catalogue
        with ``dustkit layer --json``, or from the literature; a dict with ``a0`` in mag/kpc,
        ``h`` and ``z_sun`` in pc and optional errors): in a small region where clouds hold
        much of the dust, they lift a layer fitted there (README, "How the model works").

    Attributes
    ----------
    grid_ : Grid
    layer_ : DustLayer
    tracers_ : TracerSet
    amplitude_, length_, tau_ : float
        Chosen prior amplitude, correlation length (pc) and unresolved fraction.
    error_amplitude_ : float
        Background amplitude of the prior the answers' errors are drawn under: ``amplitude_``, or
        where the evidence alone kept it over a third of it, the two averaged by their evidence
        (:func:`~.heldout.compare_background`).
    structure_tau_ : float
        Unresolved fraction of the extinction above the layer (clouds' own unresolved parts).
    isotropic_ : float
        1.0 where the held-out score chose the isotropic prior (:class:`~.lattice.Lattice`), else 0.0.
    pull_left_ : float
        Share (0-1) of the clouds' pull on the layer still in the answers, as the fitted
        model's tracers show it; that share of the pull's profile is in ``layer_err_``
        (:func:`~.layer_share.remaining_pull`).
    av_, av_err_ : ndarray (npix, n_edges)
        Cumulative A_V at pixel centres (posterior mode) and its predictive 1-sigma error
        (posterior, unresolved and ``tau`` parts together; the prior's where no tracer informs).
    posterior_err_ : ndarray (npix, n_edges)
        The posterior standard deviation alone.
    unresolved_ : ndarray (npix, n_edges)
        Local variance (mag^2) the cells miss: held-out tracers' excess, local bias, where a rise sits.
    prior_err_, support_ : ndarray (npix, n_edges)
        Prior standard deviation, and ``1 - posterior variance / prior variance`` (0: the
        answer is the prior).
    n_tracers_ : ndarray (npix, n_edges)
        Kernel-weighted number of tracers in front of each node.
    counts_ : ndarray (npix, n_bins) of int
    differential_ : ndarray (npix, n_bins)
        Mean extinction per unit distance in each bin (mag/kpc), never negative.
    samples_ : ndarray (n_active, n_edges, n_samples), float32
        Posterior deviations of cumulative A_V from ``av_`` at the active pixels.
    active_pixels_ : ndarray of int
    cv_ : astropy.table.Table
        Cross-validation score of each candidate (``meta["validation"]`` says how).
    build_report_ : dict

    Notes
    -----
    Regularised Bayesian inversion of line-of-sight extinctions into a 3-D density with a
    correlated prior follows Lallement et al. (2019, A&A 625, A135) and Vergely et al.
    (2022); the log-normal prior, Leike & Ensslin (2019, A&A 631, A32) and Edenhofer et al.
    (2024, A&A 685, A82); per-tracer likelihoods marginalised over distance, Green et al.
    (2019, ApJ 887, 93).
    """

    def __init__(
        self,
        nside="auto",
        distance_max=6000 * u.pc,
        distance_edges=None,
        amplitudes=(0.03, 0.1, 0.25, 0.6),
        lengths=(150, 500) * u.pc,
        n_folds=3,
        n_samples=32,
        active_radius=4 * u.deg,
        random_state=0,
        quiet=None,
        layer=None,
    ):
        self.nside = nside
        self.distance_max = distance_max
        self.distance_edges = distance_edges
        self.amplitudes = amplitudes
        self.lengths = lengths
        self.n_folds = n_folds
        self.n_samples = n_samples
        self.active_radius = active_radius
        self.random_state = random_state
        self.quiet = quiet
        self.layer = layer

    # -- parameters (one list: the constructor's signature)
    @classmethod
    def param_names(cls):
        """The names of the constructor parameters, in signature order."""
        return tuple(p for p in inspect.signature(cls.__init__).parameters if p != "self")

    def get_params(self):
        """The parameters as given to the constructor (or set since), name -> value."""
        return {k: getattr(self, k) for k in self.param_names()}

    def set_params(self, **params):
        """Set parameters by name; returns ``self``."""
        for k, v in params.items():
            check_choice("parameter name", k, self.param_names())
            setattr(self, k, v)
        return self

    def make_grid(self, tracers=None):
        """The HEALPix x distance grid these parameters describe (checked); ``nside='auto'`` needs the tracers."""
        nside = self.nside
        if isinstance(nside, str) and nside == "auto":
            if tracers is None:
                nside = 32
            else:
                nside = choose_nside(np.asarray(tracers.l, float), np.asarray(tracers.b, float))
        check_nside(nside)
        if self.distance_edges is not None:
            edges = to_value("distance_edges", self.distance_edges, u.pc, default_unit=u.pc)
            first = np.ravel(np.asarray(edges, float))[:1]
            if first.size and first[0] != 0.0:  # cumulative A_V is counted from the Sun: dust before it was dropped
                shown = ", ".join(f"{x:g}" for x in np.ravel(edges)[:3])
                raise ParameterError(f"The 'distance_edges' parameter of the density model must start at 0 pc (its "
                                     f"A_V is cumulative from the Sun). Got a first edge of {first[0]:g} pc instead. "
                                     f"Hint: add 0 in front, e.g. [0, {shown}, ...] pc.")
        else:
            dmax = to_scalar("distance_max", self.distance_max, u.pc, default_unit=u.pc)
            check_real("distance_max", dmax, 100.0, 1e5)
            edges = default_distance_edges(dmax)
        return Grid(nside, edges, "ring")

    def _checked_options(self):
        """``n_folds``, ``n_samples`` and ``active_radius`` (deg) checked; ``random_state`` and ``quiet`` too."""
        folds_n, n_samples = check_int("n_folds", self.n_folds, 2, 20), check_int("n_samples", self.n_samples, 4, 4096)
        check_seed(self.random_state)
        check_quiet(self.quiet)
        radius = to_scalar("active_radius", self.active_radius, u.deg, default_unit=u.deg)
        return folds_n, n_samples, check_real("active_radius", radius, 0.0, 180.0, low_inclusive=False)

    def _candidates(self):
        try:
            amps = np.atleast_1d(np.asarray(self.amplitudes, dtype=float))
        except (TypeError, ValueError):
            raise param_error("amplitudes", "a sequence of numbers in (0, 5], e.g. (0.03, 0.1, 0.25, 0.6)",
                              self.amplitudes) from None
        lens = np.atleast_1d(to_value("lengths", self.lengths, u.pc, default_unit=u.pc)).astype(float)
        for name, values, example in (("amplitudes", amps, "(0.03, 0.1, 0.25, 0.6)"),
                                      ("lengths", lens, "(150, 500) * u.pc")):
            if values.ndim != 1 or values.size == 0:
                raise param_error(name, f"a non-empty sequence of candidates, e.g. {example}", getattr(self, name))
        amps = [check_real("amplitudes", float(a), 0.0, 5.0, low_inclusive=False) for a in amps]
        for x in lens:
            check_real("lengths", float(x), 1.0, 1e5)
        return sorted(amps), sorted(float(L) for L in lens)

    # -- fitting
    def fit(self, tracers):
        """Fit the density model to a :class:`~dustkit.tracers.TracerSet`; returns ``self``."""
        t_start = time.perf_counter()
        grid = self.make_grid(tracers)
        folds_n, n_samples, radius = self._checked_options()
        cands = self._candidates()
        n, inside = len(tracers), int(np.sum(np.asarray(tracers.distance, float) <= grid.distance_edges[-1]))
        if inside < 5:  # tracers beyond the grid only bound its far end
            raise CatalogError(f"The density model needs at least 5 tracers inside its grid; got {n}, {inside} of them "
                               f"nearer than its last edge ({grid.distance_edges[-1]:g} pc). "
                               "Hint: widen the region, add tracers, or raise distance_max.")
        inp = tracer_inputs(tracers, self.random_state, given_layer(self.layer))
        pixels = active_pixels(grid, inp.l, inp.b, radius)
        col_all = np.searchsorted(pixels, grid.pixel(inp.l, inp.b))  # each tracer's active-pixel column
        # the hyperparameters and the held-out misses are learned on at most CV_TRACERS tracers
        # (a random subset of a larger catalogue); the final fit uses them all
        keep = _cv_subset(n, self.random_state)
        l, b, d, de, av, ae, _, weight, n_groups, corr, shift, layer = inp if keep is None else inp._replace(
            **{k: getattr(inp, k)[keep] for k in ("l", "b", "d", "de", "av", "ae", "weight", "corr", "shift")})
        n_cv = l.size
        col = col_all if keep is None else col_all[keep]
        fold = _blocks(l, b, d, folds_n, self.random_state)
        layer_at = layer.av_pc(b, d * np.exp(shift))  # the layer at the tracers (structure = model - layer)
        rng = np.random.default_rng(self.random_state)
        rows, best = [], None
        amps, lens = cands
        planned = len(amps) + len(lens) + 2  # evaluations; the background's lowering may add some
        bar = progress(total=planned * (folds_n + 1) + 1, desc="density model", quiet=self.quiet)
        iso = False  # the prior's depth correlation capped at its sky width (chosen below)
        fit_tol, draw_tol, final_tol = _tolerances(n_cv)

        def evaluate(amp, length, warm, boost=None, cell_length=None, draws=rng):
            if len(rows) >= planned:  # one more than planned
                extend_total(bar, folds_n + 1)
            lat = Lattice(grid, pixels, amp, length, boost, cell_length, iso)
            terms = tracer_terms(lat, layer.av_pc, col, b, d, de, av, ae, weight, corr, log_shift=shift)
            warm = warm if warm is not None and warm.shape == lat.shape else None
            full = fit_posterior(lat, terms, tau=0.1, xi0=warm)  # the folds' fits start from it
            resid, pvar, base = np.zeros(n_cv), np.zeros(n_cv), np.zeros(n_cv)
            for k in range(folds_n):
                test = fold == k
                if test.any() and not test.all():
                    post = fit_posterior(lat, terms.subset(~test), tau=0.1, xi0=full.xi, max_iter=4, cg_tol=fit_tol)
                    xs = draw_samples(lat, post, 6, draws, cg_tol=draw_tol)
                    base[test], var, var_d = _predict_terms(lat, terms.subset(test), xs, post.f)
                    resid[test] = av[test] - base[test]
                    pvar[test] = var + var_d
                bar.update(1)
            ok = ~terms.censored
            struct = np.maximum(base - layer_at, 0.0)
            tau, tau_s, score = fit_unresolved_fractions(resid[ok], pvar[ok], ae[ok], base[ok], struct[ok])
            spread = np.sqrt(pvar[ok] + ae[ok] ** 2 + (tau * base[ok]) ** 2 + (tau_s * struct[ok]) ** 2)
            rows.append((amp, length, tau, tau_s, score, float(np.sqrt(np.mean(resid[ok] ** 2))),
                         float(np.mean(np.abs(resid[ok]) <= spread)), boost is not None, iso))
            bar.update(1)
            return rows[-1], full.xi, resid, pvar, base, full.predicted, lambda: log_evidence(lat, terms, 0.1, full)

        with bar:
            # coordinate search: the amplitudes at the longest length, then the other lengths at
            # the best amplitude (each start from the previous mode, rescaled to the same f)
            warm0 = getattr(self, "_warm_start", None)
            prev = None
            for amp in amps:
                warm = warm0 if prev is None else prev[1] * (prev[0][0] / amp)
                prev = evaluate(amp, lens[-1], warm)
                if best is None or prev[0][4] < best[0][4]:
                    best = prev
            for length in lens[:-1][::-1]:
                cand = evaluate(best[0][0], length, None)
                if cand[0][4] < best[0][4]:
                    best = cand
            # the prior's shape, as deep as wide or up to L deep (own draws: the rest is unchanged unless it wins)
            iso = True
            cand = evaluate(best[0][0], best[0][1], best[1], draws=np.random.default_rng(self.random_state + 1))
            iso = cand[0][4] < best[0][4]
            best = cand if iso else best
            (amp, length, tau, tau_s, *_), xi0, resid, pvar, base, fitted, _ = best  # fractions of this search (README)
            excess = held_out_excess(av, ae, fitted, resid, pvar, base, tau, d > grid.distance_edges[-1])

            def raise_cells(a):  # where they miss, more freedom in the cells in front of them
                return cell_boost(grid, layer, pixels, l, b, d, excess, weight, a, length)

            amp, boost, cell_length, xi0, err_amp = compare_background(evaluate, raise_cells, amp, length, xi0)
            lat = Lattice(grid, pixels, amp, length, boost, cell_length, iso)
            lat_err, unresolved = _error_prior(lat, layer, (l, b, d, weight, excess), (av, ae, fitted, pvar, base, tau),
                                               err_amp)
            terms = _all_terms(lat, layer, col_all, inp)
            post = fit_posterior(lat, terms, tau=tau, xi0=xi0, max_iter=20)
            xs = draw_samples(lat_err, post, n_samples, rng, cg_tol=final_tol)
            bar.update(1)
        self._store(grid, layer, lat, post, xs, tau, tracers, lat_err)
        self.mode_, self.isotropic_ = post.xi, float(iso)  # the mode in white-noise coordinates (warm starts)
        # what the cells miss: held-out tracers' excess spread, the fitted model's own local bias, where a rise sits
        bias2 = _fitted_variances(grid, pixels, inp, post, terms, self.av_[pixels] - self._layer_nodes()[pixels], rng)
        self.pull_left_ = left_of_pull(layer, inp, post, terms)
        self._errors(layer, unresolved + bias2, tau_s)
        self.cv_ = _cv_table(rows, folds_n)
        self.build_report_ = {
            "model": "3-D log-normal density", "n_tracers": n, "n_active_pixels": int(pixels.size),
            "amplitude": amp, "length_pc": length, "tau": tau, "errors_floored": inp.floored,
            "tracers_for_hyperparameters": n_cv, "duplicate_groups": n_groups, "censored": int(terms.censored.sum()),
            "boosted_pixels": int(np.sum(lat.boost.max(axis=0) > 1.1)), "max_boost": round(float(lat.boost.max()), 2),
            "error_boosted_pixels": int(np.sum(lat_err.boost.max(axis=0) > 1.1)),
            "error_amplitude": float(lat_err.amplitude), "layer_given": self.layer is not None,
            "converged": bool(post.converged), "seconds": round(time.perf_counter() - t_start, 2),
            "threads": _lattice.THREADS, "isotropic": bool(iso), "pull_left": round(self.pull_left_, 3),
            "layer_lift": lift_report(layer, inp, self.layer), **_beyond_grid(terms.censored, grid.distance_edges[-1], inp.d)}
        return self

    def _errors(self, layer, unresolved, tau_s):
        """The answers' predictive errors at the nodes, from the stored posterior and the unresolved parts."""
        self.unresolved_ = unresolved
        # the layer's own uncertainty (its parameters' block covariance) where the answer
        # leans on the prior (where tracers inform it, the field's posterior absorbs the
        # layer's misfit) or past the data; and the clouds' pull on the layer: what the field
        # left of it (pull_left_, as the tracers show it), all of it past the data
        layer_var, past, profile, past_profile = layer_variance(layer, self.grid_, self.n_tracers_)
        self.layer_err_ = np.sqrt(layer_error_variance(self.support_, layer_var, past, profile, past_profile,
                                                       self.pull_left_))
        self.prior_err_ = np.sqrt(self.prior_err_**2 + layer_var)
        self.structure_tau_ = float(tau_s)
        self.av_err_ = np.sqrt(self.posterior_err_**2 + self.layer_err_**2 + self.unresolved_
                               + self._fraction_variance(self.av_, self._layer_nodes()))

    def _fraction_variance(self, av, layer_av):
        """Variance (mag^2) of the unresolved fractions: ``tau`` of all A_V, ``tau_s`` of A_V above the layer."""
        return (self.tau_ * av) ** 2 + (getattr(self, "structure_tau_", 0.0) * np.maximum(av - layer_av, 0.0)) ** 2

    def _refit(self, tracers):
        """Refit to tracers at the same positions with everything learned kept (another law: ``with_law``).

        The prior (amplitude, correlation length, raised cells and their lengths) and the
        unresolved fractions are reused, the layer is refitted, and the posterior mode is
        found again from this model's mode; no cross-validation runs. The local unresolved
        variance is scaled by the square of the tracers' median A_V ratio, and a layer given
        instead of fitted (``layer``) is scaled by that ratio.
        """
        t_start = time.perf_counter()
        grid = self.grid_
        ratio = tracers.av_ratio(self.tracers_)
        given = self.layer_.with_scaled_a0(ratio) if given_layer(self.layer) is not None else None
        inp = tracer_inputs(tracers, self.random_state, given)
        layer = inp.layer
        lat, lat_err = (Lattice(grid, self.active_pixels_, amp, self.length_, boost, cell_length,
                                bool(getattr(self, "isotropic_", 0.0)))
                        for amp, boost, cell_length in (
                            (self.amplitude_, self.boost_, self.pixel_length_),
                            (getattr(self, "error_amplitude_", self.amplitude_), getattr(self, "error_boost_", self.boost_),
                             getattr(self, "error_pixel_length_", self.pixel_length_))))
        col = np.searchsorted(lat.pixels, grid.pixel(inp.l, inp.b))
        terms = _all_terms(lat, layer, col, inp)
        post = fit_posterior(lat, terms, tau=self.tau_, xi0=self.mode_, max_iter=20)
        xs = draw_samples(lat_err, post, self.samples_.shape[2], np.random.default_rng(self.random_state),
                          cg_tol=_tolerances(min(inp.l.size, CV_TRACERS))[2])
        unresolved = self.unresolved_ * ratio**2
        self._store(grid, layer, lat, post, xs, self.tau_, tracers, lat_err)
        self.mode_ = post.xi
        self.pull_left_ = left_of_pull(layer, inp, post, terms)
        self._errors(layer, unresolved, self.structure_tau_)
        self.build_report_ = {**getattr(self, "build_report_", {}), "converged": bool(post.converged),
                              "seconds": round(time.perf_counter() - t_start, 2),
                              "refit": "learned prior, raised cells and unresolved fractions reused"}
        return self

    def _store(self, grid, layer, lat, post, xs, tau, tracers, lat_err):
        """Keep the posterior: the mode under ``lat``, its draws ``xs`` under the errors' prior ``lat_err``."""
        e = grid.distance_edges
        npix = grid.npix
        _, bc_all = grid.pixel_centres()
        inc = layer_increments(layer, bc_all, e)                                   # (npix, K)
        prior_var = prior_cumulative_var(inc, lat_err.bin_correlation(), lat_err.amplitude)  # (npix, E)
        # active pixels: their own amplitudes and lengths, cell by cell
        prior_var[lat.pixels] = lat_err.cumulative_prior_variance(inc[lat.pixels])
        av = np.concatenate([np.zeros((npix, 1)), np.cumsum(inc, axis=1)], axis=1)   # the prior (layer)
        var = prior_var.copy()
        # point estimate: the posterior mode (monotone: the density is positive); spread: the
        # Laplace posterior propagated linearly to cumulative A_V (the delta method)
        g = np.exp(post.f)
        inc_act = inc[lat.pixels].T * g                                             # (K, P)
        dev = inc_act[:, :, None] * lat_err.forward(xs - post.xi[:, :, None])        # (K, P, S)
        cum = np.concatenate([np.zeros((1, *dev.shape[1:])), np.cumsum(dev, axis=0)], axis=0)  # (E, P, S)
        av[lat.pixels] = np.concatenate([np.zeros((1, lat.n_pix)), np.cumsum(inc_act, axis=0)], axis=0).T
        var[lat.pixels] = np.mean(cum**2, axis=2).T
        self.grid_, self.layer_, self.tracers_ = grid, layer, tracers
        self.amplitude_, self.length_, self.tau_ = float(lat.amplitude), float(lat.length), float(tau)
        self.av_ = av
        self.posterior_err_ = np.sqrt(var)
        self.prior_err_ = np.sqrt(prior_var)
        with np.errstate(invalid="ignore", divide="ignore"):
            self.support_ = np.clip(1.0 - var / np.where(prior_var > 0, prior_var, np.inf), 0.0, 1.0)
        self.active_pixels_ = lat.pixels
        self.boost_ = np.array(lat.boost)
        self.pixel_length_ = np.array(lat.pixel_length)
        self.error_boost_, self.error_pixel_length_ = np.array(lat_err.boost), np.array(lat_err.pixel_length)
        self.error_amplitude_ = float(lat_err.amplitude)
        self.samples_ = np.ascontiguousarray(np.transpose(cum, (1, 0, 2))).astype(np.float32)
        self.differential_ = np.diff(av, axis=1) / (np.diff(e) / 1000.0)
        counts = np.zeros((npix, e.size - 1), np.int64)
        k, _ = grid.edge_position(np.asarray(tracers.distance, float))
        np.add.at(counts, (grid.pixel(np.asarray(tracers.l, float), np.asarray(tracers.b, float)),
                           np.minimum(k, e.size - 2)), 1)
        self.counts_ = counts
        self.n_tracers_ = informing_counts(lat, counts, npix)

    # -- answers (the interface of dustkit.answers)
    def check_fitted(self):
        """Raise :class:`~dustkit.exceptions.ModelNotFittedError` unless the model is fitted."""
        if not hasattr(self, "av_"):
            raise ModelNotFittedError("This DensityModel is not fitted yet. Call fit(tracers) first, or load a "
                                      "saved model with dustkit.load_model(path).")

    def _nodes(self, values, pix, wgt, k, f):
        """Bilinear on the sky, linear in distance: ``values`` (npix, n_edges) at the positions."""
        flat = values.reshape(-1)
        lo = pix * values.shape[1] + k
        return np.sum(wgt * ((1 - f) * flat[lo] + f * flat[lo + 1]), axis=0)

    def _layer_nodes(self):
        """The layer's cumulative A_V at every pixel centre and edge (derived, cached)."""
        cached = getattr(self, "_layer_nodes_cache", None)
        if cached is None or cached[0] is not self.layer_:
            g = self.grid_
            _, bc = g.pixel_centres()
            e = g.distance_edges
            table = self.layer_.av_pc(np.repeat(bc, e.size), np.tile(e, bc.size)).reshape(bc.size, e.size)
            cached = (self.layer_, table)
            self._layer_nodes_cache = cached
        return cached[1]

    def _locate(self, l, b, d):
        grid = self.grid_
        e = grid.distance_edges
        pix, wgt = grid.interp_weights(l, b)
        k, f = grid.edge_position(np.minimum(d, e[-1]))
        k = np.minimum(k, e.size - 2)
        f = np.clip(f, 0.0, 1.0)
        # the layer's latitude dependence inside a pixel: scale by layer(target) / layer(pixel centres)
        dd = np.minimum(d, e[-1])
        lay_c = self._nodes(self._layer_nodes(), pix, wgt, k, f)
        lay_t = self.layer_.av_pc(b, dd)
        ratio = np.where(lay_c > 0, lay_t / np.maximum(lay_c, 1e-300), 1.0)
        return pix, wgt, k, f, ratio, lay_t

    def av_pc(self, l, b, d, distance_err=None):
        """A_V and its 1-sigma uncertainty (mag) on plain arrays: l, b in deg, d (and distance_err) in pc."""
        self.check_fitted()
        l, b, d = (np.asarray(x, float) for x in (l, b, d))
        e = self.grid_.distance_edges
        pix, wgt, k, f, ratio, lay_t = self._locate(l, b, d)
        a = self._nodes(self.av_, pix, wgt, k, f) * ratio
        var = (self._nodes(self.posterior_err_**2 + self.layer_err_**2, pix, wgt, k, f) * ratio**2
               + self._nodes(self.unresolved_, pix, wgt, k, f))
        beyond = d > e[-1]
        if np.any(beyond):  # past the grid: the layer's prior, carried on
            extra = np.maximum(self.layer_.av_pc(b[beyond], d[beyond]) - lay_t[beyond], 0.0)
            a[beyond] += extra
            var[beyond] += (extra * getattr(self, "error_amplitude_", self.amplitude_)) ** 2
            var[beyond] += self._layer_beyond_variance(b[beyond], d[beyond], e[-1])
        var = var + self._fraction_variance(a, lay_t)
        if distance_err is not None:
            var = var + (self._slope(pix, wgt, k) * np.asarray(distance_err, float)) ** 2
        return a, np.sqrt(var)

    def _layer_beyond_variance(self, b, d, edge):
        """Variance (mag^2) of the layer's A_V added past the grid's last ``edge``: its parameters' full errors.

        The delta method on the increment from ``edge`` to ``d`` with the layer's covariance plus
        its pull (no tracer corrects the layer there, as past the last tracers inside the grid).
        """
        lay = self.layer_
        jac = lay.gradient_pc(b, d) - lay.gradient_pc(b, np.full(np.shape(d), edge))   # (3, n)
        return np.maximum(np.einsum("in,ij,jn->n", jac, lay.error_covariance(), jac), 0.0)

    def _slope(self, pix, wgt, k):
        e = self.grid_.distance_edges
        rise = np.sum(wgt * (self.av_[pix, k + 1] - self.av_[pix, k]), axis=0)
        return np.maximum(rise, 0.0) / (e[k + 1] - e[k])

    def layer_av_pc(self, l, b, d):
        """A_V (mag) of the smooth layer alone on plain arrays (deg, pc)."""
        return self.layer_.av_pc(b, d)

    def av(self, l, b=None, distance=None, distance_err=None):
        """A_V and its 1-sigma uncertainty (Quantity, mag) at arbitrary positions (see ExtinctionModel.av)."""
        return av_quantities(self, l, b, distance, distance_err)

    def layer_av(self, l, b=None, distance=None):
        """A_V (mag) of the fitted smooth layer alone at the given positions."""
        self.check_fitted()
        lv, bv, dv, shape = sky_positions(l, b, distance)
        return self.layer_.av_pc(bv, dv).reshape(shape) * u.mag

    def query(self, l, b=None, distance=None, distance_err=None, bands=(), law=None, rv=None, temperature=None,
              samples=0):
        """A table of answers with how well each is supported; ``samples=N`` adds N posterior draws.

        Columns as :meth:`dustkit.ExtinctionModel.query`, plus ``support`` (0 = the prior only,
        1 = fully set by tracers), ``n_tracers`` (kernel-weighted tracers in front), ``prior_only``
        (support below 0.1), ``av_err_layer`` (the fitted layer's part of ``av_err``, shared by all
        answers: it does not average down over targets) and, with ``samples``, ``av_samples`` (n, N).
        """
        t = query_table(self, l, b, distance, distance_err, bands, law, rv, temperature)
        lv, bv, dv = (np.asarray(t[k].value, float) for k in ("l", "b", "distance"))
        s, nt, prior_only = self._support_arrays(lv, bv, dv)
        t["support"], t["n_tracers"], t["prior_only"] = s, nt, prior_only
        t["av_err_layer"] = self.layer_err_pc(lv, bv, dv) * u.mag
        if samples:
            de = distance_errors(distance_err, np.shape(lv))
            t["av_samples"] = self.draw(lv, bv, dv, samples, distance_err=de) * u.mag
        return t

    def _support_arrays(self, l, b, d):
        pix, wgt, k, f, _, _ = self._locate(l, b, d)
        s = self._nodes(self.support_, pix, wgt, k, f)
        nt = self._nodes(self.n_tracers_, pix, wgt, k, f)
        return s, nt, s < 0.1

    def support(self, l, b=None, distance=None):
        """How far answers are informed by tracers: ``(support, n_tracers, prior_only)`` arrays."""
        self.check_fitted()
        lv, bv, dv, shape = sky_positions(l, b, distance)
        return tuple(x.reshape(shape) for x in self._support_arrays(lv, bv, dv))

    def draw(self, l, b, d, n_samples, random_state=0, distance_err=None):
        """Posterior draws of A_V (mag, plain arrays (n, n_samples)) at positions in deg and pc.

        The first ``min(n_samples, stored)`` draws come from the stored posterior samples at the active
        pixels (the prior's spread elsewhere); the layer's error is drawn once per draw for all positions
        (:meth:`DustLayer.error_directions`), the rest position by position. With ``distance_err`` (pc)
        each position's distance error adds its own normal term, as in ``av_pc``. Same call, same draws.
        """
        self.check_fitted()
        l, b, d = (np.atleast_1d(np.asarray(x, float)) for x in (l, b, d))
        n_samples = check_int("samples", n_samples, 1, 100_000)
        a, err = self.av_pc(l, b, d)
        rng = np.random.default_rng(random_state)
        pix, wgt, k, f, ratio, _ = self._locate(l, b, d)
        stored = self.samples_.shape[2]
        slot = np.searchsorted(self.active_pixels_, pix)
        slot = np.minimum(slot, self.active_pixels_.size - 1)
        active = self.active_pixels_[slot] == pix
        dev = np.zeros((l.size, n_samples))
        use = min(n_samples, stored)
        for j in range(4):  # the four interpolation pixels
            sj = self.samples_[slot[j]]
            lo = np.take_along_axis(sj, k[:, None, None].repeat(stored, 2), 1)[:, 0, :use]
            hi = np.take_along_axis(sj, (k + 1)[:, None, None].repeat(stored, 2), 1)[:, 0, :use]
            dev[:, :use] += (wgt[j] * active[j])[:, None] * ((1 - f)[:, None] * lo + f[:, None] * hi)
        dev[:, :use] *= ratio[:, None]
        explained = np.sqrt(np.mean(dev[:, :use] ** 2, axis=1)) if use else np.zeros(l.size)
        lay = self.layer_err_pc(l, b, d)
        along = self.layer_.error_directions(b, np.minimum(d, self.grid_.distance_edges[-1]))
        dev += lay[:, None] * (along @ rng.standard_normal((3, n_samples)))
        rest = np.sqrt(np.maximum(err**2 - explained**2 - lay**2, 0.0))
        dev[:, :use] += rest[:, None] * rng.standard_normal((l.size, use))
        if n_samples > use:
            own = np.sqrt(np.maximum(err**2 - lay**2, 0.0))
            dev[:, use:] += own[:, None] * rng.standard_normal((l.size, n_samples - use))
        if distance_err is not None:  # the target's own distance error, as av_pc adds it
            blur = self._slope(pix, wgt, k) * np.asarray(distance_err, float)
            dev += blur[:, None] * rng.standard_normal((l.size, n_samples))
        return np.maximum(a[:, None] + dev, 0.0)

    def layer_err_pc(self, l, b, d):
        """The fitted layer's part of the 1-sigma error of A_V (mag; deg, pc), one error under all answers."""
        self.check_fitted()
        pix, wgt, k, f, ratio, _ = self._locate(*(np.asarray(x, float) for x in (l, b, d)))
        return np.sqrt(self._nodes(self.layer_err_**2, pix, wgt, k, f)) * ratio

    @property
    def law(self):
        """Extinction law of the tracers the model was built from."""
        return getattr(getattr(self, "tracers_", None), "law", "ccm89")

    @property
    def rv(self):
        """R_V of the tracers the model was built from."""
        return float(getattr(getattr(self, "tracers_", None), "rv", 3.1))

    def profile(self, l, b, radius=None, distances=None):
        """Cumulative A_V against distance along a sight line (see :func:`dustkit.answers.profile_table`)."""
        return profile_table(self, l, b, radius, distances)

    def grid_pixel_radius(self):
        """Approximate angular radius of one sky pixel (deg)."""
        return float(np.sqrt(self.grid_.pixel_area.to_value(u.deg**2) / np.pi))

    def informed_pixels(self):
        """Pixels where tracers inform the answer (support at least 0.1 somewhere along the line).

        The first edge (distance 0) is left out: there prior and posterior variance are both 0,
        and its support of 1 says nothing about tracers (every pixel of the sky has it).
        """
        self.check_fitted()
        return np.nonzero(self.support_[:, 1:].max(axis=1) >= 0.1)[0]

    def to_table(self, pixels=None):
        """The model on its grid, one row per pixel and distance bin (:func:`dustkit.answers.grid_table`), plus ``support``."""
        t = grid_table(self, pixels)
        t["support"] = self.support_[np.asarray(t["pixel"]).reshape(-1, self.grid_.n_bins)[:, 0], 1:].ravel()
        t.meta["model"] = "density"
        return t

    def with_law(self, law, rv):
        """The model under another extinction law and R_V: rescaled exactly where that holds, else refitted.

        Tracers given as E(B-V) have A_V = R_V E(B-V) under every law (the one E(B-V)
        convention), so a change of R_V multiplies every tracer's A_V and error by the same
        factor; the density model is then exactly the same with the layer, the answers and
        their errors scaled by it (the likelihood, the prior and the cross-validation are
        scale-free; exact as long as no tracer error sits on the 0.02 mag floor). Otherwise
        (other colour excesses, apparent moduli) the model is refitted to the new tracers with
        everything it learned kept (amplitude, correlation length, raised cells, unresolved
        fractions; no cross-validation), from this model's posterior mode: a few seconds for
        a few thousand clusters.
        ``how_`` on the result says which.
        """
        import copy

        self.check_fitted()
        new_tracers = self.tracers_.with_law(law, rv)
        old_av, new_av = np.asarray(self.tracers_.av, float), np.asarray(new_tracers.av, float)
        old_err, new_err = np.asarray(self.tracers_.av_err, float), np.asarray(new_tracers.av_err, float)
        ratio = float(new_tracers.rv) / float(self.tracers_.rv)
        same_distances = np.array_equal(np.asarray(self.tracers_.distance), np.asarray(new_tracers.distance))
        exact = (same_distances and np.allclose(new_av, ratio * old_av, rtol=1e-12, atol=0)
                 and np.allclose(new_err, ratio * old_err, rtol=1e-12, atol=0)
                 and np.all(np.minimum(old_err, new_err) >= AV_ERR_FLOOR))
        if exact:
            m = copy.copy(self)
            for k in ("av_", "av_err_", "posterior_err_", "prior_err_", "differential_", "layer_err_"):
                setattr(m, k, getattr(self, k) * ratio)
            m.unresolved_ = self.unresolved_ * ratio**2
            m.samples_ = (self.samples_ * np.float32(ratio)).astype(np.float32)
            m.layer_ = self.layer_.with_scaled_a0(ratio)
            m.tracers_ = new_tracers
            m.how_ = f"rescaled exactly by R_V'/R_V = {ratio:.4f}"
            return m
        m = copy.copy(self)._refit(new_tracers)
        m.how_ = ("refitted with the learned prior (amplitude, correlation length, raised cells) and unresolved "
                  "fractions, from this model's posterior mode")
        return m

    def __repr__(self):
        if not hasattr(self, "av_"):
            return f"DensityModel(nside={self.nside}, not fitted)"
        return (f"DensityModel({self.grid_!r}, {len(self.tracers_)} tracers, {self.layer_}, "
                f"s={self.amplitude_:.2f}, L={self.length_:.0f} pc, tau={self.tau_:.3f})")


def _beyond_grid(censored, last_edge, distances):
    """The build report's ``beyond_grid`` count and ``notes``; a warning when a quarter or more of the tracers only bound.

    A tracer beyond the grid's last edge says only that the extinction at that edge is at most
    its own (a censored term): most of a catalogue there leaves the grid learned from the rest.
    """
    n_far, n = int(np.sum(censored)), int(np.size(censored))
    notes = []
    if n_far:
        far = np.asarray(distances, float)[np.asarray(censored, bool)]
        notes.append(f"{n_far} of {n} tracers lie beyond the grid's last distance edge ({last_edge:g} pc; the farthest "
                     f"at {far.max():.0f} pc) and only bound the extinction there from above.")
        if n_far >= 0.25 * n:
            warnings.warn(notes[-1] + f" The model is learned from the other {n - n_far}. Hint: raise distance_max "
                          f"(e.g. to {np.quantile(far, 0.9):.0f} pc) to use them as measurements.",
                          DustkitWarning, stacklevel=3)
    return {"beyond_grid": n_far, "notes": notes}


def _cv_table(rows, folds_n):
    """The held-out score of every candidate the search evaluated, as a Table."""
    t = Table(rows=rows, names=("amplitude", "length", "tau", "structure_tau", "score", "rms", "coverage",
                                "raised_cells", "isotropic"))
    t["length"].unit = u.pc
    t["rms"].unit = u.mag
    t.meta["validation"] = (f"{folds_n} folds of spatial blocks (HEALPix NSIDE 16 cells x 25%-deep "
                            "distance shells): neighbouring and duplicated tracers share a fold")
    return t


def _tolerances(n_cv):
    """CG tolerances (fold fits, held-out draws, kept draws) for a search over ``n_cv`` tracers."""
    return SEARCH_TOL if SEARCH_LOOSE[0] <= n_cv < SEARCH_LOOSE[1] else (1e-2, 1e-2, 1e-2)


def _cv_subset(n, random_state):
    """Sorted indices of a random subset of CV_TRACERS tracers for the hyperparameter search (None: all)."""
    return None if n <= CV_TRACERS else np.sort(np.random.default_rng(random_state).choice(n, CV_TRACERS, replace=False))


def _all_terms(lat, layer, col, inp):
    """The likelihood terms of every tracer of ``inp`` (:class:`TracerInputs`); ``col``: their pixel slots."""
    return tracer_terms(lat, layer.av_pc, col, inp.b, inp.d, inp.de, inp.av, inp.ae, inp.weight, inp.corr,
                        log_shift=inp.shift)


def _fitted_variances(grid, pixels, inp, post, terms, excess_nodes, rng):
    """Local variances (npix, n_edges) from the fitted model: its local bias and where a rise sits between tracers."""
    ok = ~terms.censored
    bias2 = local_bias_variance(grid, inp.l, inp.b, inp.d, np.where(ok, inp.av - post.predicted, 0.0),
                                inp.weight * ok, float(np.sqrt(grid.pixel_area.to_value(u.deg**2))), rng)
    bias2[pixels] += placement_variance(grid, pixels, excess_nodes, inp.l, inp.b, inp.d, inp.de,
                                        grid.distance_edges[-1], inp.weight)
    return bias2


def _error_prior(lat, layer, misses, held, amplitude):
    """The prior the answers' errors are drawn under (a :class:`Lattice`), and the local unresolved variance.

    The mode's prior raises cells wherever held-out tracers missed on average (``misses``:
    their ``l, b, d, weight, excess``), chance misses included: that freedom lets the mode
    follow the weak structure around clouds (raising only significant misses for the mode
    too cost 10-20% in RMS error in ``benchmarks/accuracy.py``). The errors' prior, with the
    same background amplitude and lengths, raises only what the misses show beyond their
    noise: each node's kernel mean of the excess less :data:`~.heldout.ERROR_SIGNIFICANCE`
    standard errors of it (each tracer's null variance of its excess from ``held``: ``av, ae,
    fitted, pvar, base, tau`` of the search; :func:`~.heldout.excess_noise`), so that misses
    by chance where the truth is smooth do not widen the errors. The local unresolved variance
    (npix, n_edges) is the kernel mean as it comes (lowered too, it left the answers in front of
    the sparse catalogue's clouds too narrow: 0.69 -> 0.64 inside 1 sigma, stop 35). The
    background ``amplitude`` is :func:`~.heldout.compare_background`'s errors' amplitude (the
    raised cells keep the variance they add at it).
    """
    l, b, d, weight, excess = misses
    grid = lat.grid
    x = unresolved_variance(grid, l, b, d, excess, weight, pixels=lat.pixels, noise=excess_noise(*held, excess),
                            k=ERROR_SIGNIFICANCE)
    boost, cell_length = cell_boost(grid, layer, lat.pixels, l, b, d, excess, weight, amplitude, lat.length, x=x)
    return (Lattice(grid, lat.pixels, amplitude, lat.length, boost, cell_length, lat.isotropic),
            unresolved_variance(grid, l, b, d, excess, weight))


def _predict_terms(lat, terms, xs, f_mode):
    """Mean, posterior variance and distance variance of held-out tracers' A (mode + linearised samples)."""
    g = np.exp(f_mode)
    a_nodes = cumulative_at_nodes(terms, g)     # (n, q)
    mean = a_nodes @ terms.weights
    var_d = np.maximum((a_nodes**2) @ terms.weights - mean**2, 0.0)
    dev = g[:, :, None] * (lat.forward(xs) - f_mode[:, :, None])
    lin = np.einsum("ik,kis->is", terms.mean_coef, dev[:, terms.col])
    return mean, np.mean(lin**2, axis=1), var_d
