"""The explorer's dust-features layer: its widgets, the features of each model, the cut and the table.

A mixin of :class:`dustkit.ui.Explorer` (which owns ``model``, ``_run``, ``_set_status``,
``_draw_sky``, ``_draw_profile``, ``_syncing``, ``_layer_cache``, ``_cache_size`` and the
widgets' ``_widget_style``). The
features of a model are found once (:func:`dustkit.features.density_features` with no
probability cut, or :func:`dustkit.features.detect_features` for a binned model) and kept;
for a density model the least probability is then applied without a new search
(:func:`dustkit.features.significant_features`): by default the look-elsewhere cut, which
grows with the number of candidate regions the search tested (the command line's default),
or, with *Look-elsewhere cut* unticked, the slider's value.
"""

import math
import time

import ipywidgets as widgets

from .feature_table import feature_table_html

__all__ = ["FeatureLayer"]


class FeatureLayer:
    """Dust features on the explorer's map, profile and table (see the module notes)."""

    def _build_feature_widgets(self, full):
        """The dust-features layer: a checkbox, the look-elsewhere tick, the least-probability slider, the table."""
        from ..features import FALSE_RATE, MIN_PROBABILITY

        W = widgets
        self.feature_layer_widget = W.Checkbox(value=False, indent=False, description="Show dust features",
                                               tooltip="Find the dust features of the whole model (once per model) "
                                                       "and draw them on the map and the profile")
        self.look_elsewhere_widget = W.Checkbox(
            value=True, indent=False, description="Look-elsewhere cut",
            tooltip=f"Density model: the least probability grows with the number n of candidate regions tested, "
                    f"1 - {FALSE_RATE:g} / n and at least {MIN_PROBABILITY:g} (as 'dustkit features'); untick to "
                    "set it with the slider")
        self.min_probability_widget = W.FloatSlider(value=MIN_PROBABILITY, min=0.5, max=1.0, step=0.0001,
                                                    continuous_update=False, readout_format=".4f", disabled=True,
                                                    description="Least probability", style=self._widget_style, layout=full,
                                                    tooltip="Least posterior probability (density model) that "
                                                            "a feature adds its extinction")
        self.feature_table = W.HTML(value="", layout=W.Layout(width="375px", max_height="220px", overflow="auto"))

    @staticmethod
    def _is_density(model):
        return hasattr(model, "samples_")

    def model_features(self, model=None):
        """All dust features of a fitted model, found once per model and kept.

        A 3-D density model: :func:`dustkit.features.density_features` with
        ``min_probability=0`` (the cut is applied after, see :meth:`feature_parameters`); a
        binned model: :func:`dustkit.features.detect_features` with its defaults.
        """
        from ..features import density_features, detect_features

        model = self.model if model is None else model
        key = id(model)
        if key in self._layer_cache and self._layer_cache[key][0] is model:
            self._layer_cache.move_to_end(key)
            return self._layer_cache[key][1]
        self._set_status("Finding the dust features of this model ...")
        t0 = time.perf_counter()
        if self._is_density(model):
            found = density_features(model, min_probability=0.0, quiet=True)
        else:
            found = detect_features(model, quiet=True)
        cut = " before the probability cut" if self._is_density(model) else ""
        print(f"{len(found)} dust feature(s){cut} found in the model in {time.perf_counter() - t0:.1f} s.")
        self._layer_cache[key] = (model, found)
        while len(self._layer_cache) > self._cache_size + 1:  # the models kept, and the one shown
            self._layer_cache.popitem(last=False)
        return found

    def feature_parameters(self):
        """Keyword arguments of :func:`dustkit.features.significant_features` for the layer (density models).

        ``min_probability=None`` (the look-elsewhere cut of the model's search) while
        *Look-elsewhere cut* is ticked, else the slider's value.
        """
        if self.look_elsewhere_widget.value:
            return dict(min_probability=None)
        return dict(min_probability=float(self.min_probability_widget.value))

    def _update_layer(self):
        """Find (or fetch) the features layer of the model shown, apply the cut, fill the table."""
        density = self._is_density(self.model)
        self.look_elsewhere_widget.disabled = not density
        self.min_probability_widget.disabled = not density or self.look_elsewhere_widget.value
        if not self.feature_layer_widget.value:
            self.layer_features = None
            self.feature_table.value = ""
            return
        found = self.model_features()
        if density:
            from ..features import significant_features

            found = significant_features(found, **self.feature_parameters())
            if self.look_elsewhere_widget.value:  # show the cut used (rounded down: unticked, it hides no feature shown)
                syncing, self._syncing = self._syncing, True
                try:
                    self.min_probability_widget.value = math.floor(float(found.meta["min_probability"]) * 1e4) / 1e4
                finally:
                    self._syncing = syncing
        self.layer_features = found
        self.feature_table.value = feature_table_html(found, density)

    def _on_feature_layer(self, change):
        if self._syncing:
            return
        self._run(self._redraw_feature_layer)

    def _redraw_feature_layer(self):
        self._update_layer()
        self._draw_sky()
        self._draw_profile()
        if self.layer_features is None:
            self._set_status("Dust features hidden.")
            return
        n, cut = len(self.layer_features), ""
        if self._is_density(self.model):
            meta = self.layer_features.meta
            cut = f" with probability >= {meta['min_probability']:.4f}"
            if meta.get("false_rate"):
                cut += f" (look-elsewhere cut over {meta['n_candidates']} candidate region(s))"
        self._set_status(f"{n} dust feature(s){cut} in the model ({self.model.law}, R_V = {self.model.rv:g}).")
