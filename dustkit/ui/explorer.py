"""The explorer: a notebook panel to build, look at and export an extinction model.

``Explorer(tracers)`` shows a panel with

* an extinction-law chooser and an R_V slider (limits from the law registry; fixed-R_V
  laws disable the slider). Changing either re-derives A_V from the tracers' reddening
  (:meth:`dustkit.tracers.TracerSet.with_law`), rebuilds the model and redraws;
* grid controls (NSIDE, distance step and maximum) with a *Rebuild* button, a progress
  bar and a status line;
* a sight-line chooser: l and b boxes and a cone-radius slider; clicking on the sky map
  picks the sight line (interactive figures, i.e. the ipympl canvas);
* a distance slider and a choice between cumulative and differential extinction for the
  sky map;
* a chooser for the profile's vertical axis: A_V, E(B-V) or A in any known band, each
  band listed with its coefficient A_band/A_V (:func:`dustkit.bands.a_band_over_av` for
  the reference star of ``dustkit bands``) under the law and R_V shown; the list is
  rebuilt when the law or R_V changes (``explorer.band_coefficients``);
* a dust-features layer (*Show dust features*): the features of the whole model are found
  once per fitted model (:func:`dustkit.features.density_features` for a 3-D density model,
  :func:`dustkit.features.detect_features` for a binned one), kept, and found again for a
  model of another law, R_V or grid; they are drawn on the sky map and the profile and
  listed in a small table (distance with its error or "nearer than D", the added A_V, the
  probability). For a density model the least probability is the look-elsewhere cut of
  the model's search (*Look-elsewhere cut*, as ``dustkit features``), or, unticked, the
  slider's (:func:`dustkit.features.significant_features`: no new search);
* an export button with a format chooser and a file name (:func:`dustkit.io.export_table`).

No science lives here: the panel calls :mod:`dustkit.model` and draws with
:mod:`dustkit.plotting`, so each figure equals the one the plotting function draws with
the same parameters (``explorer.profile_parameters()``, ``explorer.sky_parameters()``).
Every callback runs inside an ``Output`` area; an error is shown in the status line
(CSS class ``dustkit-status`` plus ``dustkit-error``) and the panel keeps working.

Extinction estimates are statistical: check them against local data before using them
for science or for planning instrument time.
"""

import html
import os
import pathlib
import time
import traceback
import warnings
from collections import OrderedDict

import ipywidgets as widgets
import numpy as np
from astropy import units as u

from .. import plotting
from ..exceptions import ModelNotFittedError
from .._lib.formats import TABLE_FORMATS
from .._lib.validation import check_choice, check_int, param_error, to_scalar
from ..laws import get_law
from ..layer import given_layer
from ..model import CAUTION, DENSITY_LIMIT, ExtinctionModel
from .feature_layer import FeatureLayer

__all__ = ["Explorer"]

_NSIDES = (4, 8, 16, 32, 64, 128, 256)
#: Parameters the explorer's first model can take whichever model it is (anything else, a grid
#: above all, asks for the binned model its controls rebuild).
_SHARED_PARAMS = frozenset({"random_state", "layer", "quiet"})
_FORMATS = {}  # table format -> its first suffix in the format registry ("ecsv" -> ".ecsv")
for _suffix, _format in TABLE_FORMATS.items():
    _FORMATS.setdefault(_format, _suffix)
_CONTROL_WIDTH = "390px"
_DESC = {"description_width": "125px"}


def _lbl(text):
    return widgets.HTML(f"<b>{html.escape(text)}</b>", layout=widgets.Layout(margin="8px 0 0 0"))


class Explorer(FeatureLayer):
    """Interactive panel to explore an extinction model built from tracers.

    Parameters
    ----------
    tracers : TracerSet, Table, DataFrame or path
        The tracers; anything that is not a TracerSet goes through
        :func:`dustkit.tracers.read_tracers` (default law and R_V).
    model : ExtinctionModel or DensityModel, optional
        An already fitted model of these tracers, shown first (saves one build). Without one,
        a catalogue of at most ``dustkit.model.DENSITY_LIMIT`` tracers given no grid or other
        binned-model parameter gets the 3-D density model (as ``dustkit.build_model`` picks it),
        built before the panel opens; otherwise the binned model on the grid of the controls.
    features : Table, optional
        Dust features to mark on the profile (columns ``distance``, optional
        ``distance_err``, ``delta_av``, and ``l``, ``b`` to keep only those near the sight line).
    figures : {'auto', 'interactive', 'static'}
        ``'interactive'`` uses ipympl canvases (clicking on the sky map picks a sight line);
        ``'static'`` shows PNG images; ``'auto'`` uses ipympl when it is installed.
    cache_size : int
        How many built models to keep, so that going back to a law, R_V or grid is instant.
    **model_params
        Passed to :class:`dustkit.model.ExtinctionModel` (e.g. ``nside=16``,
        ``distance_step=100 * u.pc``, ``distance_max=4 * u.kpc``, ``random_state=1``); a grid
        parameter asks for the binned model from the start. ``random_state`` and ``layer`` go
        to a first density model too.

    Attributes
    ----------
    model : ExtinctionModel
        The model the figures show.
    tracers : TracerSet
        The tracers of that model (A_V under the current law and R_V).
    profile_fig, profile_ax, sky_fig, sky_ax : matplotlib Figure / Axes
        The current figures.
    panel : ipywidgets.Widget
        The whole panel.
    status : ipywidgets.HTML
        The status line (CSS class ``dustkit-status``).
    last_error : Exception or None
        The last error a callback met (also shown in the status line).
    layer_features : QTable or None
        The dust features drawn on the map and the profile while *Show dust features* is
        ticked (:meth:`model_features` after the probability cut), None otherwise.
    """

    _widget_style = _DESC  # the labels' width of every control (the features layer's too)

    def __init__(self, tracers, model=None, *, features=None, figures="auto", cache_size=8, **model_params):
        from ..tracers import TracerSet, read_tracers

        if not isinstance(tracers, TracerSet):
            tracers = read_tracers(tracers)
        self._base_tracers = tracers
        self.tracers = tracers
        self.features = features
        self._shown_features = features
        self.layer_features = None  # the features layer shown (None when off)
        self._layer_cache = OrderedDict()  # id(model) -> (model, all features of that model)
        self.last_error = None
        self.last_export = None
        self._figure_mode = self._check_figures(figures)
        self._cache = OrderedDict()
        self._cache_size = check_int("cache_size", cache_size, 1, 100)
        self._syncing = False

        params = dict(model_params)
        if model is None and len(tracers) <= DENSITY_LIMIT and set(params) <= _SHARED_PARAMS:
            # the more accurate model first, as build_model picks it; the grid controls rebuild binned ones
            from ..density import DensityModel

            print(f"Building the 3-D density model of {len(tracers)} tracers (for the binned model on a grid "
                  "of your own, pass nside=, distance_step= or distance_max=) ...")
            model = DensityModel(**{"quiet": True, **params}).fit(tracers)
        if model is not None:
            if not hasattr(model, "av_"):
                raise ModelNotFittedError("The model given to Explorer is not fitted. Hint: pass model.fit(tracers), or no model.")
            edges = model.grid_.distance_edges
            nside = model.grid_.nside
            step = round(float(np.median(np.diff(edges))), 2)
            dmax = round(float(edges[-1]), 2)
        else:
            defaults = ExtinctionModel.param_defaults()  # the one list of model parameters
            nside = params.get("nside", defaults["nside"])
            step = to_scalar("distance_step", params.get("distance_step", defaults["distance_step"]), u.pc, u.pc)
            dmax = to_scalar("distance_max", params.get("distance_max", defaults["distance_max"]), u.pc, u.pc)
        for k in ("nside", "distance_step", "distance_max", "distance_edges"):
            params.pop(k, None)
        params.setdefault("quiet", True)
        ExtinctionModel(**params)  # unknown keywords fail here, before any widget exists
        self._model_params = params

        self._build_widgets(nside, step, dmax)
        self.model = None
        # a 3-D density model given here follows law and R_V changes itself (exact rescaling
        # for E(B-V) tracers, else a refit with its learned prior): DensityModel.with_law
        self._density_base = model if (model is not None and hasattr(model, "with_law")) else None
        if model is not None:
            self.model = model
            self.tracers = model.tracers_
            self._cache[self._key_of_model(model)] = model
            self._free_rv = float(model.rv)
            self._set_law_controls(model.law, model.rv)
            self._after_model(time_s=None)
        else:
            self._run(self._rebuild)
            if self.model is None:  # the first build failed: nothing sensible to show
                raise self.last_error

    # ------------------------------------------------------------------ construction
    @classmethod
    def from_file(cls, path, *, model=None, features=None, figures="auto", model_params=None, **read_kwargs):
        """Read a tracer catalogue (any format :func:`dustkit.tracers.read_tracers` reads) and explore it.

        ``read_kwargs`` go to ``read_tracers`` (e.g. ``columns=``, ``law=``, ``rv=``);
        ``model_params`` (a dict) to :class:`~dustkit.model.ExtinctionModel`.
        """
        from ..tracers import read_tracers

        tracers = read_tracers(path, **read_kwargs)
        return cls(tracers, model=model, features=features, figures=figures, **(model_params or {}))

    @staticmethod
    def _check_figures(figures):
        mode = check_choice("figures", figures, ("auto", "interactive", "static"))
        if mode == "auto":
            try:
                import ipympl.backend_nbagg  # noqa: F401
            except Exception:
                return "static"
            return "interactive"
        if mode == "interactive":
            import ipympl.backend_nbagg  # noqa: F401  (a clear ImportError if missing)
        return mode

    def _new_figure(self, figsize, css):
        from matplotlib.figure import Figure

        fig = Figure(figsize=figsize, layout="constrained")
        if self._figure_mode == "interactive":
            from ipympl.backend_nbagg import Canvas, FigureManager

            canvas = Canvas(fig)
            FigureManager(canvas, 0)
            canvas.header_visible = False
            canvas.toolbar_position = "left"
            # the toolbar floats over the figure: show it only while the pointer is on the figure,
            # and not at all on the sky map, where a click picks the sight line
            canvas.toolbar_visible = False if css == "dustkit-sky" else "fade-in-fade-out"
            canvas.add_class(css)
            view = canvas
        else:
            from matplotlib.backends.backend_agg import FigureCanvasAgg

            FigureCanvasAgg(fig)
            view = widgets.Image(format="png")
            view.add_class(css)
        return fig, view

    def _build_widgets(self, nside, step, dmax):
        from ..bands import band_table
        from ..laws import LAWS

        base = self._base_tracers
        W = widgets
        full = W.Layout(width="375px")

        self.law_widget = W.Dropdown(
            options=[(f"{name} ({getattr(law, 'title', '') or name})", name) for name, law in LAWS.items()],
            value=base.law if base.law in LAWS else next(iter(LAWS)), description="Law", style=_DESC, layout=full)
        self.rv_widget = W.FloatSlider(value=float(base.rv), min=1.0, max=7.0, step=0.05, description="R_V",
                                       continuous_update=False, readout_format=".2f", style=_DESC, layout=full)
        self.nside_widget = W.Dropdown(options=[n for n in _NSIDES], value=int(nside) if int(nside) in _NSIDES else 32,
                                       description="NSIDE", style=_DESC, layout=full)
        if int(nside) not in _NSIDES:
            self.nside_widget.options = sorted(set(_NSIDES) | {int(nside)})
            self.nside_widget.value = int(nside)
        self.step_widget = W.BoundedFloatText(value=step, min=1.0, max=10000.0, step=10.0,
                                              description="Distance step [pc]", style=_DESC, layout=full)
        self.dmax_widget = W.BoundedFloatText(value=dmax, min=10.0, max=100000.0, step=100.0,
                                              description="Max distance [pc]", style=_DESC, layout=full)
        self.rebuild_button = W.Button(description="Rebuild", button_style="primary", icon="refresh",
                                       tooltip="Build the model again with these grid settings")
        self.progress = W.IntProgress(value=0, min=0, max=3, description="Progress", style=_DESC, layout=full)

        lc, bc = self._tracer_centre()
        self.l_widget = W.FloatText(value=round(lc, 2), step=0.5, description="l [deg]", style=_DESC, layout=full)
        self.b_widget = W.BoundedFloatText(value=round(bc, 2), min=-90.0, max=90.0, step=0.5,
                                           description="b [deg]", style=_DESC, layout=full)
        self.radius_widget = W.FloatSlider(value=1.0, min=0.0, max=10.0, step=0.25, continuous_update=False,
                                           description="Cone radius [deg]", readout_format=".2f", style=_DESC,
                                           layout=full)
        # the band registry (the same table as 'dustkit bands'); coefficients under the law shown
        bt = band_table(base.law if base.law in LAWS else None)
        self._band_rows = [(str(n), str(system), float(w)) for n, system, w in
                           zip(bt["name"], bt["system"], bt["reference_wavelength"].to_value(u.micron))]
        quantities = self._quantity_options(base.law if base.law in LAWS else self.law_widget.value, float(base.rv))
        self.quantity_widget = W.Dropdown(options=quantities, value="av", description="Profile shows",
                                          style=_DESC, layout=full)
        self._bands_for = (base.law, round(float(base.rv), 4))

        d0 = float(np.clip(np.percentile(base.distance, 75), step, dmax))
        d0 = round(d0 / step) * step
        self.distance_widget = W.FloatSlider(value=d0, min=0.0, max=dmax, step=step, continuous_update=False,
                                             description="Map distance [pc]", readout_format=".0f", style=_DESC,
                                             layout=full)
        self.kind_widget = W.Dropdown(options=[("A_V out to the distance", "cumulative"),
                                               ("A_V per kpc at the distance", "differential")],
                                      value="cumulative", description="Map shows", style=_DESC, layout=full)
        self.features_widget = W.Checkbox(value=False, indent=False,
                                          description="Mark dust features on the profile")
        self._build_feature_widgets(full)

        self.format_widget = W.Dropdown(options=list(_FORMATS), value="ecsv", description="File format",
                                        style=_DESC, layout=full)
        self.filename_widget = W.Text(value="extinction_table.ecsv", description="File name", style=_DESC,
                                      layout=full)
        self.overwrite_widget = W.Checkbox(value=False, description="Replace an existing file", indent=False)
        self.export_button = W.Button(description="Export table", icon="download",
                                      tooltip="Write the binned model as a table")

        self.status = W.HTML(value="", layout=W.Layout(width="375px", min_height="40px"))
        self.log = W.Output(layout=W.Layout(width="375px", max_height="160px", overflow="auto"))
        caution = W.HTML(f'<div style="font-size:85%;line-height:1.3;font-style:italic">{html.escape(CAUTION)}</div>',
                         layout=W.Layout(width="375px"))

        for w, css in [
            (self.law_widget, "dustkit-law"), (self.rv_widget, "dustkit-rv"), (self.nside_widget, "dustkit-nside"),
            (self.step_widget, "dustkit-step"), (self.dmax_widget, "dustkit-distance-max"),
            (self.rebuild_button, "dustkit-rebuild"), (self.progress, "dustkit-progress"),
            (self.l_widget, "dustkit-l"), (self.b_widget, "dustkit-b"), (self.radius_widget, "dustkit-radius"),
            (self.quantity_widget, "dustkit-quantity"), (self.distance_widget, "dustkit-distance"),
            (self.kind_widget, "dustkit-map-kind"), (self.features_widget, "dustkit-features"),
            (self.feature_layer_widget, "dustkit-feature-layer"),
            (self.look_elsewhere_widget, "dustkit-look-elsewhere"),
            (self.min_probability_widget, "dustkit-min-probability"), (self.feature_table, "dustkit-feature-table"),
            (self.format_widget, "dustkit-format"),
            (self.filename_widget, "dustkit-filename"), (self.overwrite_widget, "dustkit-overwrite"),
            (self.export_button, "dustkit-export"), (self.status, "dustkit-status"), (self.log, "dustkit-log"),
        ]:
            w.add_class(css)

        self._build_figures(base)

        controls = W.VBox(
            [
                _lbl("Extinction law"), self.law_widget, self.rv_widget,
                _lbl("Grid"), self.nside_widget, self.step_widget, self.dmax_widget,
                W.HBox([self.rebuild_button]), self.progress,
                _lbl("Sight line (or click the map)"), self.l_widget, self.b_widget, self.radius_widget,
                self.quantity_widget, self.features_widget,
                _lbl("Sky map"), self.distance_widget, self.kind_widget,
                _lbl("Dust features"), self.feature_layer_widget, self.look_elsewhere_widget,
                self.min_probability_widget, self.feature_table,
                _lbl("Export"), self.format_widget, self.filename_widget, self.overwrite_widget,
                W.HBox([self.export_button]),
                _lbl("Status"), self.status, self.log, caution,
            ],
            layout=W.Layout(width=_CONTROL_WIDTH, min_width=_CONTROL_WIDTH),
        )
        figures = W.VBox([self._sky_view, self._profile_view])
        # the figures keep their own heights (a stretched column would share the controls'
        # extra height out between them as blank space)
        self.panel = W.HBox([controls, figures], layout=W.Layout(align_items="flex-start"))
        self.panel.add_class("dustkit-explorer")

        self._connect(base)

    def _build_figures(self, base):
        """The sky map and profile figures (the sky extent is fixed by the tracers, so the view is stable)."""
        self.sky_extent = plotting.tracer_extent(base)
        if self.sky_extent == "all-sky":
            sky_size = (6.6, 4.0)
        else:
            sky_size = plotting.sky_figsize(self.sky_extent, width=6.6)
        self.sky_fig, self._sky_view = self._new_figure(sky_size, "dustkit-sky")
        self.profile_fig, self._profile_view = self._new_figure((6.6, 4.2), "dustkit-profile")
        self.sky_ax = None
        self.profile_ax = None
        self._click_id = self.sky_fig.canvas.mpl_connect("button_press_event", self._on_sky_click)

    def _connect(self, base):
        """Wire the widgets to their callbacks (each runs inside the log Output area)."""
        self.law_widget.observe(self._on_law, "value")
        self.rv_widget.observe(self._on_rv, "value")
        self.rebuild_button.on_click(lambda _b: self._run(self._rebuild))
        for w in (self.l_widget, self.b_widget, self.radius_widget, self.quantity_widget, self.features_widget):
            w.observe(self._on_sight_line, "value")
        for w in (self.distance_widget, self.kind_widget):
            w.observe(self._on_sky, "value")
        for w in (self.feature_layer_widget, self.look_elsewhere_widget, self.min_probability_widget):
            w.observe(self._on_feature_layer, "value")
        self.format_widget.observe(self._on_format, "value")
        self.export_button.on_click(lambda _b: self._run(self._export))
        self._free_rv = float(base.rv)
        self._set_law_controls(self.law_widget.value, float(base.rv))

    def _tracer_centre(self):
        t = self._base_tracers
        lon = np.radians(np.asarray(t.l, float))
        lc = float(np.degrees(np.arctan2(np.sin(lon).mean(), np.cos(lon).mean())) % 360.0)
        return lc, float(np.median(t.b))

    # ------------------------------------------------------------------ state
    @property
    def law(self):
        """The extinction law of the model shown."""
        return self.model.law

    @property
    def rv(self):
        """R_V of the model shown."""
        return self.model.rv

    @property
    def l(self):
        """Longitude of the chosen sight line (deg)."""
        return float(self.l_widget.value) % 360.0

    @property
    def b(self):
        """Latitude of the chosen sight line (deg)."""
        return float(self.b_widget.value)

    @property
    def radius(self):
        """Cone radius (deg); 0 means a single sight line."""
        return float(self.radius_widget.value)

    @property
    def distance(self):
        """Distance of the sky map (pc)."""
        return float(self.distance_widget.value)

    @property
    def quantity(self):
        """What the profile shows: 'av', 'ebv' or a band name."""
        return self.quantity_widget.value

    def profile_parameters(self):
        """Keyword arguments of :func:`dustkit.plotting.plot_profile` for the profile shown."""
        q = self.quantity
        return dict(
            l=self.l * u.deg, b=self.b * u.deg, radius=(self.radius * u.deg) if self.radius > 0 else None,
            quantity=q if q in ("av", "ebv") else "band", band=None if q in ("av", "ebv") else q,
            features=self._shown_features,
        )

    def sky_parameters(self):
        """Keyword arguments of :func:`dustkit.plotting.plot_sky` for the map shown."""
        mark = (self.l, self.b, self.radius) if self.radius > 0 else (self.l, self.b)
        return dict(distance=self.distance * u.pc, kind=self.kind_widget.value, extent=self.sky_extent, mark=mark,
                    features=self.layer_features)

    # ------------------------------------------------------------------ running callbacks
    def _run(self, action, *args):
        """Run a callback inside the log area; show any error in the status line."""
        with self.log:
            try:
                with warnings.catch_warnings(record=True) as caught:
                    warnings.simplefilter("always")
                    result = action(*args)
                for w in caught:
                    print(f"{w.category.__name__}: {w.message}")
                return result
            except Exception as exc:  # the panel must survive any error
                self.last_error = exc
                self.progress.bar_style = "danger"
                self._set_status(f"{type(exc).__name__}: {exc}", error=True)
                traceback.print_exc()
                return None

    def _set_status(self, text, error=False):
        icon = "&#9888; " if error else ""
        colour = "#D55E00" if error else "#000000"
        self.status.value = f'<div style="color:{colour};line-height:1.35">{icon}{html.escape(str(text))}</div>'
        if error:
            self.status.add_class("dustkit-error")
        else:
            self.status.remove_class("dustkit-error")

    # ------------------------------------------------------------------ law and model
    def _set_law_controls(self, law_name, rv):
        law = get_law(law_name)
        lo, hi = (float(v) for v in law.rv_range)
        self._syncing = True
        try:
            if self.law_widget.value != law.name:
                self.law_widget.value = law.name
            s = self.rv_widget
            if lo > s.max:
                s.max = hi
                s.min = lo
            else:
                s.min = lo
                s.max = hi
            s.value = float(np.clip(rv, lo, hi)) if not law.rv_fixed else lo
            s.disabled = bool(law.rv_fixed)
            s.description = "R_V (fixed)" if law.rv_fixed else "R_V"
        finally:
            self._syncing = False

    def _quantity_options(self, law, rv):
        """Options of the profile chooser: A_V, E(B-V), then A in each band, with its coefficient.

        The coefficient A_band/A_V is :func:`dustkit.bands.a_band_over_av` under ``law`` and
        ``rv`` for the reference star of ``dustkit bands`` (5800 K blackbody, A_V = 0.1 mag);
        bands outside the law's wavelength range are left out. Sets ``band_coefficients``.
        """
        from ..bands import a_band_over_av
        from ..exceptions import LawRangeError

        options, coefficients = [("A_V", "av"), ("E(B-V)", "ebv")], {}
        for name, system, wavelength in self._band_rows:
            try:
                k = float(a_band_over_av(name, law, rv))
            except LawRangeError:  # bands outside the law's range cannot be shown
                continue
            if np.isfinite(k):
                coefficients[name] = k
                options.append((f"A in {name} ({system}, {wavelength:.2f} µm; A/A_V = {k:.3f})", name))
        self.band_coefficients = coefficients
        return options

    def _update_band_choices(self, law, rv):
        """Rebuild the band list for a new law or R_V, keeping the choice where the band remains."""
        key = (law, round(float(rv), 4))
        if key == getattr(self, "_bands_for", None):
            return
        options = self._quantity_options(law, rv)
        current = self.quantity_widget.value
        values = [v for _, v in options]
        syncing, self._syncing = self._syncing, True
        try:
            self.quantity_widget.options = options
            self.quantity_widget.value = current if current in values else "av"
        finally:
            self._syncing = syncing
        self._bands_for = key
        if current not in values:
            print(f"Band {current} is outside the wavelength range of law {law}; the profile shows A_V.")

    def _on_law(self, change):
        if self._syncing:
            return
        self._run(self._apply_law)
        self._controls_back_to_model()

    def _apply_law(self):
        # a fixed-R_V law pins the slider; going back to a free law restores the last free R_V
        self._set_law_controls(self.law_widget.value, self._free_rv)
        self._rebuild()

    def _on_rv(self, change):
        if self._syncing:
            return
        self._free_rv = float(change["new"])
        self._run(self._rebuild)
        self._controls_back_to_model()

    def _controls_back_to_model(self):
        """After a law or R_V the model could not take, show the law and R_V the figures still show."""
        model = self.model
        if model is None or (self.law_widget.value == model.law and abs(self._current_rv() - float(model.rv)) < 1e-3):
            return
        if not get_law(model.law).rv_fixed:
            self._free_rv = float(model.rv)
        self._set_law_controls(model.law, float(model.rv))
        exc = self.last_error
        kept = f"The figures still show law {model.law}, R_V = {float(model.rv):g}; the controls are set back to them."
        self._set_status(f"{type(exc).__name__}: {exc} {kept}" if exc is not None else kept, error=True)

    def _grid_values(self):
        nside = check_int("nside", int(self.nside_widget.value), 1, 1024)
        step = float(self.step_widget.value)
        dmax = float(self.dmax_widget.value)
        if not (0 < step < dmax):
            raise param_error("distance step", f"positive and smaller than the maximum distance ({dmax:g} pc)", step)
        return nside, step, dmax

    def _current_rv(self):
        law = get_law(self.law_widget.value)
        return float(law.rv_range[0]) if law.rv_fixed else round(float(self.rv_widget.value), 4)

    @staticmethod
    def _key_of_model(model):
        e = model.grid_.distance_edges
        # the grid as its controls show it (to 0.01 pc: a density model's edges need not be evenly spaced)
        return (model.law, round(float(model.rv), 4), int(model.grid_.nside), round(float(np.median(np.diff(e))), 2),
                round(float(e[-1]), 2))

    def _rebuild(self):
        """Re-derive A_V under the chosen law and R_V and build (or fetch) the model; redraw."""
        law = self.law_widget.value
        rv = self._current_rv()
        nside, step, dmax = self._grid_values()
        key = (law, rv, nside, step, dmax)
        t0 = time.perf_counter()
        self.progress.bar_style = "info"
        self.progress.value = 0
        if key in self._cache:
            model = self._cache[key]
            self._cache.move_to_end(key)
            how = "from the cache"
        else:
            self._set_status(f"Re-deriving A_V with {law}, R_V = {rv:g} ...")
            base = self._base_tracers
            tracers = base if (law == base.law and abs(rv - base.rv) < 1e-9) else base.with_law(law, rv)
            self.progress.value = 1
            dens = self._density_base
            # the density model follows a law or R_V on its own grid; another NSIDE, step or
            # maximum distance asks for the binned model on that grid
            if dens is not None and np.allclose((nside, step, dmax), self._key_of_model(dens)[2:], rtol=1e-9, atol=0):
                self._set_status(f"Updating the density model of {len(tracers)} tracers for {law}, R_V = {rv:g} ...")
                model = dens.with_law(law, rv)
            else:
                self._set_status(f"Building the model of {len(tracers)} tracers (NSIDE {nside}) ...")
                model = ExtinctionModel(nside=nside, distance_max=dmax * u.pc, distance_step=step * u.pc,
                                        **self._params_for(tracers)).fit(tracers)
            self._cache[key] = model
            while len(self._cache) > self._cache_size:
                self._cache.popitem(last=False)
            how = getattr(model, "how_", "built")
        self.progress.value = 2
        self.model = model
        self.tracers = model.tracers_
        self._update_band_choices(model.law, model.rv)
        self._after_model(time.perf_counter() - t0, how)

    def _params_for(self, tracers):
        """The model parameters for ``tracers``: a layer given in A_V of the first law scaled with the tracers' A_V."""
        params = dict(self._model_params)
        if params.get("layer") is not None:
            params["layer"] = given_layer(params["layer"]).with_scaled_a0(tracers.av_ratio(self._base_tracers))
        return params

    def _after_model(self, time_s=None, how="given"):
        dmax = float(self.model.grid_.distance_edges[-1])
        step = float(np.median(np.diff(self.model.grid_.distance_edges)))
        self._syncing = True
        try:
            self.distance_widget.max = dmax
            self.distance_widget.step = step
            self.distance_widget.value = float(np.clip(self.distance_widget.value, 0.0, dmax))
        finally:
            self._syncing = False
        self._update_layer()
        self._draw_sky()
        self._draw_profile()
        self.progress.value = 3
        self.progress.bar_style = "success"
        g = self.model.grid_
        took = "" if time_s is None else f" in {time_s:.1f} s"
        widths = np.diff(g.distance_edges)
        bins = (f"in {step:g} pc steps" if np.ptp(widths) <= 1e-6 * widths.max()  # a density model's bins widen
                else f"in {widths.size} bins {widths.min():.0f}-{widths.max():.0f} pc wide")
        self._set_status(
            f"Model {how}{took}: {len(self.tracers)} tracers, law {self.model.law}, R_V = {self.model.rv:g}, "
            f"NSIDE {g.nside}, 0-{g.distance_edges[-1]:g} pc {bins}."
        )

    # ------------------------------------------------------------------ drawing
    def _refresh(self, fig, view):
        if self._figure_mode == "interactive":
            fig.canvas.draw_idle()
        else:
            import io

            buf = io.BytesIO()
            plotting.settle_layout(fig, passes=1)
            fig.savefig(buf, format="png", dpi=100)
            view.value = buf.getvalue()

    def _find_features(self):
        """Features to mark: detected along the sight line when asked, else the layer's, else the table given."""
        if not self.features_widget.value:
            return self.layer_features if self.layer_features is not None else self.features
        from ..features import sight_line_features

        radius = self.radius * u.deg if self.radius > 0 else None
        found = sight_line_features(self.model, self.l * u.deg, self.b * u.deg, radius=radius)
        print(f"{len(found)} dust feature(s) found toward l = {self.l:.2f}, b = {self.b:+.2f}.")
        return found

    def _draw_profile(self):
        self._shown_features = self._find_features()
        fig = self.profile_fig
        fig.clf()
        with plotting.style_context():
            ax = fig.add_subplot()
        plotting.plot_profile(self.model, ax=ax, **self.profile_parameters())
        self.profile_ax = ax
        self._refresh(fig, self._profile_view)

    def _draw_sky(self):
        fig = self.sky_fig
        fig.clf()
        with plotting.style_context():
            ax = fig.add_subplot(projection="mollweide" if self.sky_extent == "all-sky" else None)
        plotting.plot_sky(self.model, ax=ax, **self.sky_parameters())
        self.sky_ax = ax
        self._refresh(fig, self._sky_view)

    def _on_sight_line(self, change):
        if self._syncing:
            return
        self._run(self._redraw_sight_line)

    def _redraw_sight_line(self):
        self._draw_profile()
        self._draw_sky()
        self._set_status(f"Sight line l = {self.l:.2f}°, b = {self.b:+.2f}°, cone radius {self.radius:g}°.")

    def _on_sky(self, change):
        if self._syncing:
            return
        self._run(self._redraw_sky)

    def _redraw_sky(self):
        self._draw_sky()
        what = "A_V to" if self.kind_widget.value == "cumulative" else "A_V per kpc near"
        self._set_status(f"Sky map: {what} {self.distance:g} pc.")

    def _on_sky_click(self, event):
        self._run(self._pick, event)

    def _pick(self, event):
        """Pick the sight line where the sky map was clicked (left button, no zoom/pan active)."""
        if event.inaxes is None or event.inaxes is not self.sky_ax or event.xdata is None:
            return
        if event.button != 1:  # left button only
            return
        toolbar = getattr(self.sky_fig.canvas, "toolbar", None)
        if toolbar is not None and str(getattr(toolbar, "mode", "")):
            return
        lon, lat = plotting.sky_position(self.sky_ax, event.xdata, event.ydata)
        self.select(lon, lat)

    def select(self, l, b, radius=None):
        """Choose the sight line (deg) and redraw; what a click on the sky map does."""
        lon = to_scalar("l", l, u.deg, u.deg) % 360.0
        lat = to_scalar("b", b, u.deg, u.deg)
        if not -90.0 <= lat <= 90.0:
            raise param_error("b", "a latitude in [-90, 90] deg", lat)
        self._syncing = True
        try:
            self.l_widget.value = round(lon, 3)
            self.b_widget.value = round(lat, 3)
            if radius is not None:
                self.radius_widget.value = to_scalar("radius", radius, u.deg, u.deg)
        finally:
            self._syncing = False
        self._redraw_sight_line()

    # ------------------------------------------------------------------ export
    def _on_format(self, change):
        if self._syncing:
            return
        name = self.filename_widget.value.strip()
        if name:
            p = pathlib.Path(name)
            if p.suffix.lower() in _FORMATS.values():
                self.filename_widget.value = str(p.with_suffix(_FORMATS[change["new"]]))

    def _export(self):
        try:
            from ..io import export_table
        except ImportError as exc:
            raise RuntimeError(f"Exporting needs dustkit.io, which could not be imported ({exc}).") from exc
        name = self.filename_widget.value.strip()
        if not name:
            raise param_error("file name", "a non-empty file name, e.g. 'extinction_table.ecsv'", name)
        path = pathlib.Path(name).expanduser()
        if not path.is_absolute():
            path = pathlib.Path(os.getcwd()) / path
        fmt = self.format_widget.value
        self._set_status(f"Writing {path} ...")
        export_table(self.model, path, format=fmt, overwrite=bool(self.overwrite_widget.value))
        self.last_export = path
        self._set_status(f"Wrote {path} ({fmt.upper()}, {path.stat().st_size / 1024:.0f} KiB).")
        return path

    # ------------------------------------------------------------------ display
    def display(self):
        """Show the panel in the notebook."""
        from IPython.display import display

        display(self.panel)

    def _ipython_display_(self):
        self.display()

    def __repr__(self):
        return f"<dustkit Explorer: {self.model!r}>"


