"""The extinction model: smooth dust layer + HEALPix x distance binned cumulative A_V.

How a model is built (``ExtinctionModel.fit``):

1. Fit the smooth exponential dust layer to the tracers (:func:`dustkit.layer.fit_layer`;
   a random 50 000 of them in larger catalogues).
2. Take each tracer's residual from the layer (the extinction the layer does not explain)
   and spread it over Monte Carlo draws of its distance (log-normal) and A_V (normal), so
   a tracer informs the cumulative extinction at its own uncertain distance. Large
   catalogues skip the draws and use the scatter within bins instead
   (``uncertainty_scheme_`` records which).
3. Accumulate weighted sums of the residuals per (pixel, distance edge): the sufficient
   statistics of the model. Monte Carlo draws are split between the two edges around
   them with linear (cloud-in-cell) weights and spread bilinearly over the 4 nearest
   pixels; in the bin-scatter scheme each tracer goes whole to its own pixel and nearest
   edge, in one fast pass (:mod:`dustkit.binned.statistics`). Tracers (and draws) beyond
   the last distance edge are left out: their A_V only bounds the extinction at the last
   edge from above (``build_report_["beyond_grid"]`` counts them).
4. Smooth the statistics on the sky with a neighbour kernel (HEALPix 8-neighbours,
   repeated passes) and combine along each sight line with a random-walk state-space model
   of the cumulative residual (Kalman filter + Rauch-Tung-Striebel smoother; Rauch, Tung &
   Striebel 1965, AIAA J. 3, 1445). Where a pixel has no tracers the residual relaxes to 0,
   i.e. the model falls back to the layer, with an uncertainty that grows with distance;
   beyond the last tracer the residual is carried forward with growing uncertainty.
5. Choose the sky kernel width, the distance kernel width and the random-walk strength by
   cross-validation on held-out tracers (spatially blocked K-fold up to 50 000 tracers;
   above, one random held-out set of 50 000, the others training), and calibrate the
   predictive uncertainty (the scatter of extinction around the model on scales it cannot
   resolve) by maximum likelihood on held-out tracers, integrating over their distance
   errors, so that 1-sigma intervals cover about 68% of the truth. The held-out tracers
   are predicted only where they are: the nodes of their interpolation pixels, computed
   from the training tracers' sums (``cv_.meta["validation"]`` records the scheme), after
   the monotone step of 6, as the final model. From 10 000 held-out tracers on, one half
   chooses the smoothing and the other calibrates. The fitted factor scales only the part
   of the variance the tracers contribute, never the prior where none does
   (:mod:`dustkit.binned.calibration`).
6. Enforce non-decreasing cumulative A_V along every pixel's sight line by weighted
   isotonic regression (Barlow et al. 1972); the square of its move is added to each
   node's variance.

Answers at any (l, b, d) evaluate the layer at the exact position and add the binned
residual interpolated bilinearly on the sky (the HEALPix interpolation of
``healpy.get_interp_weights``, computed in numpy blocks by :mod:`dustkit._lib.healpix`) and
linearly in distance, so the answer is not constant across a pixel.

This module is the estimator facade: parameters (read from the constructor signature,
:meth:`ExtinctionModel.get_params`), :meth:`~ExtinctionModel.fit`, the public seam
:meth:`~ExtinctionModel.fit_statistics` that both ``fit`` and the chunked builds of
:mod:`dustkit.scale` finish through, and the answers, which live in :mod:`dustkit.answers`.
The build steps live in :mod:`dustkit.binned`.
"""

import inspect
from dataclasses import dataclass

import numpy as np
from astropy import units as u

from ._lib.progress import progress
from ._lib.validation import check_choice, check_int, check_quiet, check_seed, param_error, to_value
from .answers import CAUTION, av_quantities, binned_av, grid_table, profile_table, query_table, sky_positions
from .binned.finish import finish
from .binned.folds import HELDOUT_MAX, HeldOut, fold_of_positions, heldout_rows
from .binned.statistics import Statistics, count_beyond, monte_carlo_statistics, nominal_statistics, tracer_counts
from .exceptions import CatalogError, ModelNotFittedError
from .grid import Grid
from .layer import DustLayer, fit_layer, given_layer
from .tracers.stored import tracer_columns, tracer_set
from .tracers.rules import floor_errors

__all__ = ["ExtinctionModel", "CAUTION", "FitPlan", "model_state", "model_from_state", "heldout_rows",
           "DENSITY_LIMIT", "choose_model", "build_model"]

#: Up to this many tracers the default model is the 3-D density model; above, the binned one
#: (the path for 10^6-10^8 field stars, built in seconds). On 50 000 invented field stars with
#: 10-25% distance errors the density model answered with RMS error 0.089 mag and 0.67 of the
#: truths inside 1 sigma (0.61 in front of clouds) in 253 s; the binned model 0.208 mag and
#: 0.88 (0.22 in front of clouds) in 1.3 s; 10^5 stars took the density model 281 s
#: (benchmarks/README.md, stop 37).
DENSITY_LIMIT = 100_000

MC_LIMIT = 300_000  # above this many tracers "auto" switches to the bin-scatter scheme
_HELDOUT_MAX = HELDOUT_MAX  # old name


def _tracer_arrays(tracers):
    """The tracers' arrays, errors floored for the fit (dustkit.tracers.rules.floor_errors, with a warning)."""
    l, b, d, de, av, ae = (np.asarray(getattr(tracers, k), float)
                           for k in ("l", "b", "distance", "distance_err", "av", "av_err"))
    de, ae = floor_errors(d, de, ae)
    return l, b, d, de, av, ae


@dataclass(frozen=True)
class _Floored:
    """Tracer arrays with floored errors, for fit_layer (which then has nothing left to floor)."""

    b: np.ndarray
    distance: np.ndarray
    distance_err: np.ndarray
    av: np.ndarray
    av_err: np.ndarray


@dataclass(frozen=True)
class FitPlan:
    """The checked parameters of one build: the grid, the uncertainty scheme and the cross-validation."""

    grid: Grid
    scheme: str
    n_draws: int
    n_folds: int
    sky_passes: list


class ExtinctionModel:
    """Binned, monotone, uncertain cumulative A_V model over HEALPix pixels x distance.

    Parameters
    ----------
    nside : int
        HEALPix NSIDE of the sky pixels (power of two, 1-1024). The default, 32 (1.8 deg
        pixels), suits catalogues of a few thousand clusters; the sky kernel chosen by
        cross-validation widens it where tracers are sparse.
    distance_max, distance_step : Quantity['length']
        Linear distance edges 0, step, ..., distance_max (defaults 6 kpc and 200 pc).
    distance_edges : Quantity['length'], optional
        Explicit edges; overrides ``distance_max``/``distance_step``.
    ordering : {'ring', 'nested'}
        HEALPix pixel ordering.
    uncertainty : {'auto', 'monte-carlo', 'bin-scatter'}
        How tracer errors enter: Monte Carlo draws of distance and A_V per tracer
        (``'monte-carlo'``), or the scatter of nominal values within bins
        (``'bin-scatter'``, for very large catalogues). ``'auto'`` uses Monte Carlo up to
        300 000 tracers.
    n_draws : int, optional
        Monte Carlo draws per tracer (default: about 2 million draws in total, 8 to 64 per
        tracer).
    n_folds : int
        Folds of the cross-validation that chooses the smoothing and calibrates the errors
        (up to 50 000 tracers; larger catalogues hold out one set of
        ``min(50 000, n / n_folds)`` tracers instead).
    sky_passes : sequence of int
        Candidate numbers of neighbour-smoothing passes on the sky (0 = none).
    random_state : int
        Seed for the draws and the folds; the same seed gives the same model.
    quiet : bool, optional
        Hide progress bars (default: shown only on a terminal).
    layer : DustLayer or dict, optional
        A smooth layer to use instead of fitting one (e.g. fitted to a wider catalogue with
        ``dustkit layer --json``; a dict as :meth:`dustkit.layer.DustLayer.from_dict` reads).
        Its errors do not enter this model's answers, whose spread away from the tracers is
        the calibrated random walk's (as with a fitted layer); the density model
        (:class:`~dustkit.density.DensityModel`) propagates them.

    Attributes
    ----------
    grid_ : Grid
    layer_ : DustLayer
    av_ : ndarray (npix, n_edges)
        Cumulative A_V (mag) at each pixel centre and distance edge; non-decreasing.
    av_err_ : ndarray (npix, n_edges)
        Predictive 1-sigma uncertainty (mag) at the nodes.
    n_tracers_ : ndarray (npix, n_edges)
        Effective number of tracers informing each node (after sky smoothing).
    counts_ : ndarray (npix, n_bins) of int
        Tracers whose nominal position and distance fall in each pixel and bin.
    differential_ : ndarray (npix, n_bins)
        Extinction added in each bin per unit distance (mag/kpc).
    tracers_ : TracerSet
        The tracers the model was built from.
    uncertainty_scheme_ : str
    sky_passes_, walk_variance_ : chosen smoothing (passes, mag^2/kpc)
    scatter_ : dict
        Calibrated predictive variance: ``scale^2 (V + root^2 * A_V + (frac * A_V)^2)``, where
        ``V`` is the model's own variance with its data part (not the prior) scaled by
        ``kappa >= 0.1`` (:func:`dustkit.binned.calibration.model_variance`).
    cv_ : astropy.table.Table
        Cross-validation score of every candidate setting; ``cv_.meta["validation"]``
        says how the tracers were held out.
    build_report_ : dict
        Counts and notes of the build: ``beyond_grid`` (tracers beyond the last distance
        edge, left out of the estimates: they only bound the extinction there from above),
        the held-out tracers that chose the smoothing and calibrated the errors, the largest
        shift of the monotone step, and ``notes`` (sentences saying so).
    """

    def __init__(
        self,
        nside=32,
        distance_max=6000 * u.pc,
        distance_step=200 * u.pc,
        distance_edges=None,
        ordering="ring",
        uncertainty="auto",
        n_draws=None,
        n_folds=5,
        sky_passes=(0, 1, 2, 4),
        random_state=0,
        quiet=None,
        layer=None,
    ):
        self.nside = nside
        self.distance_max = distance_max
        self.distance_step = distance_step
        self.distance_edges = distance_edges
        self.ordering = ordering
        self.uncertainty = uncertainty
        self.n_draws = n_draws
        self.n_folds = n_folds
        self.sky_passes = sky_passes
        self.random_state = random_state
        self.quiet = quiet
        self.layer = layer

    # -- parameters (one list: the constructor's signature, as scikit-learn's get_params)
    @classmethod
    def param_names(cls):
        """The names of the constructor parameters, in signature order."""
        sig = inspect.signature(cls.__init__)
        return tuple(p for p in sig.parameters if p != "self")

    @classmethod
    def param_defaults(cls):
        """The constructor parameters' defaults, name -> value."""
        sig = inspect.signature(cls.__init__)
        return {k: p.default for k, p in sig.parameters.items() if k != "self"}

    def get_params(self):
        """The parameters as given to the constructor (or set since), name -> value."""
        return {k: getattr(self, k) for k in self.param_names()}

    def set_params(self, **params):
        """Set parameters by name (unknown names raise ``ParameterError``); returns ``self``."""
        names = self.param_names()
        for k, v in params.items():
            check_choice("parameter name", k, names)
            setattr(self, k, v)
        return self

    def make_grid(self):
        """The HEALPix x distance grid these parameters describe (checked)."""
        if self.distance_edges is not None:
            edges = to_value("distance_edges", self.distance_edges, u.pc, default_unit=u.pc)
            return Grid(self.nside, edges, self.ordering)
        return Grid.linear(self.distance_max, self.distance_step, self.nside, self.ordering)

    def fit_plan(self, n_tracers):
        """The checked parameters of a build from ``n_tracers`` tracers (a :class:`FitPlan`)."""
        grid = self.make_grid()
        check_seed(self.random_state)
        check_quiet(self.quiet)
        scheme = check_choice("uncertainty", self.uncertainty, ("auto", "monte-carlo", "bin-scatter"))
        if scheme == "auto":
            scheme = "monte-carlo" if n_tracers <= MC_LIMIT else "bin-scatter"
        if scheme == "monte-carlo":
            if self.n_draws is None:
                draws = int(np.clip(2_000_000 // max(n_tracers, 1), 8, 64))
            else:
                draws = check_int("n_draws", self.n_draws, 1, 10_000)
        else:
            draws = 1
        folds = check_int("n_folds", self.n_folds, 2, 50)
        passes = sorted({check_int("sky_passes", p, 0, 64) for p in np.atleast_1d(self.sky_passes)})
        if not passes:
            raise param_error("sky_passes", "at least one number of smoothing passes (e.g. (0, 1, 2, 4))",
                              self.sky_passes)
        return FitPlan(grid, scheme, draws, folds, passes)

    # -- fitting
    def fit(self, tracers):
        """Build the model from a tracer set; returns ``self``.

        Parameters
        ----------
        tracers : TracerSet
            Validated tracers (see :func:`dustkit.tracers.read_tracers`).
        """
        arrays = _tracer_arrays(tracers)
        l, b, d, de, av, ae = arrays
        n = l.size
        if n < 10:
            raise CatalogError(f"A model needs at least 10 tracers; got {n}. Hint: widen the region or add tracers.")
        plan = self.fit_plan(n)
        grid, folds = plan.grid, plan.n_folds
        rng = np.random.default_rng(self.random_state)
        layer = given_layer(self.layer)
        if layer is None:
            layer = fit_layer(_Floored(b, d, de, av, ae), random_state=self.random_state)
        held = heldout_rows(n, folds, self.random_state)
        k_fold = held is None
        if k_fold:
            # every tracer held out once; spatially blocked folds from a hash of the tracer's
            # block of space, as in the chunked builds (dustkit.scale): the same tracers give
            # the same model whichever way they are read, and duplicates share a fold
            fold = fold_of_positions(tracers.l, tracers.b, tracers.distance, folds, self.random_state)
            held, held_fold = np.arange(n), fold
        else:
            held_fold = np.zeros(held.size, dtype=np.int64)
        with progress(total=n, desc="accumulating tracers", quiet=self.quiet) as bar:
            if plan.scheme == "monte-carlo":
                if k_fold:
                    slot, n_slots = fold, folds
                else:  # the held-out set in slot 0, all other tracers in slot 1
                    slot, n_slots = np.ones(n, dtype=np.int64), 2
                    slot[held] = 0
                stats = monte_carlo_statistics(grid, layer, l, b, d, de, av, ae, slot, n_slots, plan.n_draws, rng, bar)
                statistics = Statistics(stats.sum(axis=1), stats if k_fold else stats[:, :1],
                                        tracer_counts(grid, l, b, d), count_beyond(grid, d))
                del stats
            else:
                statistics = nominal_statistics(grid, layer, l, b, d, av, ae, fold=fold if k_fold else None,
                                                n_folds=folds, held=None if k_fold else held, bar=bar)
        return self.fit_statistics(statistics, layer, HeldOut.of_rows(arrays, held, held_fold), plan, rng=rng,
                                   tracers=tracers)

    def fit_statistics(self, statistics, layer, heldout, plan, rng=None, tracers=None):
        """Finish a build from its sufficient statistics; returns ``self`` (fitted).

        The seam every build goes through: :meth:`fit` computes the statistics in memory,
        :mod:`dustkit.scale` chunk by chunk, and both finish here (cross-validation of the
        smoothing, error calibration, isotonic regression).

        Parameters
        ----------
        statistics : dustkit.binned.statistics.Statistics
            Sums over all tracers (``total``), over each fold's held-out tracers
            (``fold_stats``) and tracer counts, on ``plan.grid``.
        layer : DustLayer
            The smooth layer the residuals were taken from.
        heldout : dustkit.binned.folds.HeldOut
            The held-out tracers (plain arrays) and their folds.
        plan : FitPlan
            From :meth:`fit_plan`.
        rng : numpy.random.Generator, optional
            Default: a new one seeded with ``random_state``.
        tracers : TracerSet, optional
            Kept as ``tracers_`` (law, R_V, and the tracers listed with profiles).
        """
        if rng is None:
            rng = np.random.default_rng(self.random_state)
        res = finish(plan.grid, layer, statistics, plan.sky_passes, heldout, rng)
        self.grid_ = res.grid
        self.layer_ = res.layer
        self.uncertainty_scheme_ = plan.scheme
        self.n_draws_ = plan.n_draws
        self.sky_passes_ = res.sky_passes
        self.walk_variance_ = res.walk_variance
        self.distance_smoothing_ = res.distance_smoothing
        self.scatter_ = res.scatter
        self._resid_ = res.resid
        self._post_var_ = res.post_var
        self.av_ = res.av
        self.av_err_ = res.av_err
        self.n_tracers_ = res.n_tracers
        self.differential_ = res.differential
        self.cv_ = res.cv
        self.build_report_ = dict(res.report)
        self.counts_ = np.asarray(statistics.counts).reshape(res.grid.npix, res.grid.n_bins)
        if tracers is not None:
            self.tracers_ = tracers
        return self

    # -- answers (dustkit.answers holds the code; these are the model's interface to it)
    def check_fitted(self):
        """Raise :class:`~dustkit.exceptions.ModelNotFittedError` unless the model is fitted."""
        if not hasattr(self, "av_"):
            raise ModelNotFittedError(
                "This ExtinctionModel is not fitted yet. Call fit(tracers) first, or load a saved model "
                "with dustkit.load_model(path)."
            )

    _check_fitted = check_fitted  # old private name

    def av_pc(self, l, b, d, distance_err=None):
        """A_V and its predictive 1-sigma error (mag) on plain float arrays: l, b in deg, d in pc.

        ``distance_err`` (pc), the targets' own distance uncertainty, is propagated through
        the local slope. No units or ranges are checked (see :meth:`av`).
        """
        self.check_fitted()
        return binned_av(self.grid_, self.layer_, self._resid_, self._post_var_, self.walk_variance_,
                         self.scatter_, l, b, d, distance_err)

    def layer_av_pc(self, l, b, d):
        """A_V (mag) of the smooth layer alone on plain float arrays (deg, pc)."""
        return self.layer_.av_pc(b, d)

    def av(self, l, b=None, distance=None, distance_err=None):
        """A_V and its predictive 1-sigma uncertainty at arbitrary positions.

        Parameters
        ----------
        l : Quantity['angle'] or SkyCoord
            Galactic longitude, or a SkyCoord (any frame) with distances.
        b : Quantity['angle'], optional
        distance : Quantity['length'], optional
        distance_err : Quantity['length'], optional
            The targets' own distance uncertainty, propagated through the local slope.

        Returns
        -------
        av, av_err : Quantity['mag']
        """
        return av_quantities(self, l, b, distance, distance_err)

    def layer_av(self, l, b=None, distance=None):
        """A_V (mag) of the fitted smooth layer alone at the given positions."""
        self.check_fitted()
        lv, bv, dv, shape = sky_positions(l, b, distance)
        return self.layer_.av_pc(bv, dv).reshape(shape) * u.mag

    def query(self, l, b=None, distance=None, distance_err=None, bands=(), law=None, rv=None, temperature=None):
        """A table of answers: position, A_V, its error, the layer's A_V, and A in each band.

        Band extinctions use the model's law and R_V unless ``law``/``rv`` are given
        (:func:`dustkit.bands.av_to_band`).
        """
        return query_table(self, l, b, distance, distance_err, bands, law, rv, temperature)

    @property
    def law(self):
        """Extinction law of the tracers the model was built from."""
        return getattr(getattr(self, "tracers_", None), "law", "ccm89")

    @property
    def rv(self):
        """R_V of the tracers the model was built from."""
        return float(getattr(getattr(self, "tracers_", None), "rv", 3.1))

    def profile(self, l, b, radius=None, distances=None):
        """Cumulative A_V against distance along one sight line (or averaged over a cone).

        See :func:`dustkit.answers.profile_table`.
        """
        return profile_table(self, l, b, radius, distances)

    def grid_pixel_radius(self):
        """Approximate angular radius of one sky pixel (deg)."""
        return float(np.sqrt(self.grid_.pixel_area.to_value(u.deg**2) / np.pi))

    def to_table(self, pixels=None):
        """The binned model as a table: one row per pixel and distance bin.

        Columns: ``pixel``, ``l``, ``b`` (pixel centre, deg), ``distance_min``,
        ``distance_max`` (pc), ``av``, ``av_err`` (cumulative at the bin's far edge, mag),
        ``av_near`` (cumulative at the near edge), ``differential`` (mag/kpc), ``n_tracers``
        (tracers in the pixel and bin). Only pixels informed by tracers are listed unless
        ``pixels`` is given.
        """
        return grid_table(self, pixels)

    def informed_pixels(self):
        """Pixels whose estimate is informed by at least a tenth of a tracer (after smoothing)."""
        self.check_fitted()
        return np.nonzero(self.n_tracers_.max(axis=1) >= 0.1)[0]

    def __repr__(self):
        if not hasattr(self, "av_"):
            return f"ExtinctionModel(nside={self.nside}, not fitted)"
        return (
            f"ExtinctionModel({self.grid_!r}, {len(self.tracers_) if hasattr(self, 'tracers_') else '?'} tracers, "
            f"{self.layer_}, uncertainty '{self.uncertainty_scheme_}')"
        )


# ----------------------------------------------------------------------------- lossless state

_STATE_ARRAYS = ("av_", "av_err_", "_resid_", "_post_var_", "n_tracers_", "counts_", "differential_")
_STATE_SCALARS = ("uncertainty_scheme_", "n_draws_", "sky_passes_", "walk_variance_", "distance_smoothing_")
# the parameters a model file records (the grid and the sky passes are recorded on their own;
# whether progress bars show is not part of a model)
_STATE_PARAMS = tuple(p for p in ExtinctionModel.param_names()
                      if p not in ("distance_max", "distance_step", "distance_edges", "sky_passes", "quiet", "layer"))


def model_state(model):
    """Everything a fitted model needs to answer, as plain numbers and arrays.

    Returns a dict with ``params`` (constructor parameters), ``grid`` (nside, ordering,
    distance_edges), ``layer`` (parameters, errors, covariance), ``scatter``, ``scalars``,
    ``arrays`` (name -> ndarray) and ``tracers`` (name -> ndarray, plus law, rv and
    excess_kind). :func:`model_from_state` rebuilds a model that answers bit for bit the same.
    """
    model.check_fitted()
    g = model.grid_
    params = {k: getattr(model, k) for k in _STATE_PARAMS}
    params["sky_passes"] = [int(p) for p in np.atleast_1d(model.sky_passes)]
    params["layer_given"] = model.layer is not None  # the given layer is the model's layer_
    tracers, tracer_info = tracer_columns(model.tracers_)
    return {
        "params": params,
        "grid": {"nside": g.nside, "ordering": g.ordering, "distance_edges": g.distance_edges.copy()},
        "layer": model.layer_.state(),
        "scatter": dict(model.scatter_),
        "scalars": {k: getattr(model, k) for k in _STATE_SCALARS},
        "arrays": {k: np.asarray(getattr(model, k)) for k in _STATE_ARRAYS},
        "tracers": tracers,
        "tracer_info": tracer_info,
        "cv": model.cv_.copy() if hasattr(model, "cv_") else None,
    }

def model_from_state(state):
    """Rebuild a fitted :class:`ExtinctionModel` from :func:`model_state` output."""

    p = dict(state["params"])
    m = ExtinctionModel(**{k: p[k] for k in _STATE_PARAMS if k in p}, sky_passes=tuple(p.get("sky_passes", (0,))))
    g = state["grid"]
    m.distance_edges = np.asarray(g["distance_edges"], float) * u.pc
    m.grid_ = Grid(int(g["nside"]), np.asarray(g["distance_edges"], float), g["ordering"])
    lay = state["layer"]
    m.layer_ = DustLayer.from_state(lay)
    if p.get("layer_given"):
        m.layer = m.layer_
    m.scatter_ = {k: float(v) for k, v in state["scatter"].items()}
    for k, v in state["scalars"].items():
        setattr(m, k, v)
    for k, v in state["arrays"].items():
        setattr(m, k, np.asarray(v))
    m.tracers_ = tracer_set(state["tracers"], state["tracer_info"])
    if state.get("cv") is not None:
        m.cv_ = state["cv"]
    return m


# ----------------------------------------------------------------------------- which model

def choose_model(n_tracers, model="auto"):
    """Which model a build of ``n_tracers`` uses: ``'density'`` or ``'binned'``.

    ``'auto'`` picks the 3-D density model (:class:`dustkit.density.DensityModel`) up to
    :data:`DENSITY_LIMIT` tracers, the size of cluster catalogues, and the binned model
    (:class:`ExtinctionModel`, the path for millions of field stars) above.
    """
    choice = check_choice("model", model, ("auto", "density", "binned"))
    if choice == "auto":
        return "density" if n_tracers <= DENSITY_LIMIT else "binned"
    return choice


def build_model(tracers, model="auto", **params):
    """Fit the model :func:`choose_model` picks for ``tracers``; ``params`` go to its constructor.

    Parameters
    ----------
    tracers : TracerSet
        The tracers, as :func:`dustkit.read_tracers` returns them.
    model : {'auto', 'density', 'binned'}
        ``'auto'`` (default): the 3-D density model (:class:`dustkit.density.DensityModel`)
        up to :data:`DENSITY_LIMIT` (100 000) tracers, the binned model
        (:class:`ExtinctionModel`) above.
    **params
        Constructor parameters of the chosen model, e.g. ``nside``, ``distance_max``,
        ``distance_edges``, ``layer`` (a :class:`~dustkit.layer.DustLayer` or a dict to use
        instead of fitting one). Parameters the chosen model does not take (e.g.
        ``distance_step`` for the density model, whose bins grow with distance) raise
        ``ParameterError``.

    Returns
    -------
    DensityModel or ExtinctionModel
        The fitted model; ``model_kind_`` records the choice (``'density'`` or ``'binned'``), and
        ``build_report_`` says it (``model_kind``) and why (``model_choice``: the catalogue's size
        under ``'auto'``, else asked for).

    Notes
    -----
    Extinction estimates are statistical: check them against local data before using them
    for science or for instrument time.
    """
    from .density import DensityModel

    kind = choose_model(len(tracers), model)
    cls = DensityModel if kind == "density" else ExtinctionModel
    for name in params:
        check_choice(f"parameter of the {kind} model", name, cls.param_names())
    fitted = cls(**params).fit(tracers)
    fitted.model_kind_ = kind
    why = (f"chosen for {len(tracers)} tracers: the 3-D density model up to {DENSITY_LIMIT}, the binned model above"
           if check_choice("model", model, ("auto", "density", "binned")) == "auto" else f"asked for (model='{kind}')")
    # the report says which model was built and why (the density model's own 'model' entry describes it)
    fitted.build_report_ = {**getattr(fitted, "build_report_", {}), "model_kind": kind, "model_choice": why}
    return fitted
