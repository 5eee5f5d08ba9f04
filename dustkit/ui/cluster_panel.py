"""A notebook panel for one cluster's main-sequence fit: look, adjust, accept.

The panel shows the colour-magnitude diagram (and the colour-colour diagram when the
members have U-B) drawn by :mod:`dustkit.plotting.clusters`, sliders for E(B-V) and mu0
that start at the fitted values (the sequence and the residuals follow them), and a button
that adds the result as a row of a tracer table (:func:`dustkit.clusters.tracer_row`).
It holds no science: every number comes from :mod:`dustkit.clusters`.

>>> from dustkit.ui.cluster_panel import ClusterPanel       # doctest: +SKIP
>>> panel = ClusterPanel(members, name="Veyra Cl 3")          # doctest: +SKIP
>>> panel.panel                                               # doctest: +SKIP
>>> panel.tracer_table                                        # doctest: +SKIP
"""

import html
import traceback
import warnings

import ipywidgets as W
import numpy as np
from astropy.table import Table

from ..plotting import clusters as cluster_plots
from ..clusters import CAUTION, colour_residuals, fit_cluster, read_photometry, tracer_row, tracer_table

__all__ = ["ClusterPanel"]

_CMD_CHOICES = ((("B", "V"), "V"), (("BP", "RP"), "G"), (("J", "Ks"), "J"), (("V", "I"), "V"), (("G", "RP"), "G"))


class ClusterPanel:
    """Show a cluster's fit; move E(B-V) and mu0; accept the result into a tracer table.

    Parameters
    ----------
    members : table-like
        The cluster's member photometry.
    fit : ClusterFit, optional
        A fit of these members; made with :func:`dustkit.clusters.fit_cluster` when not given.
    name : str
        The cluster's name in the tracer table.
    tracer_table : `~astropy.table.Table`, optional
        A table (as made by :func:`dustkit.clusters.fit_clusters`) to which accepted results
        are added; a new one otherwise.
    **fit_kwargs
        Passed to :func:`fit_cluster` (``law``, ``rv``, ...).

    Attributes
    ----------
    panel : ipywidgets.Widget
        Display this.
    ebv_widget, mu0_widget : FloatSlider
    accept_button : Button
    cmd_ax, cc_ax : matplotlib Axes
        The diagrams as last drawn (``cc_ax`` is None without U-B).
    tracer_table : `~astropy.table.Table`
    """

    def __init__(self, members, fit=None, *, name="cluster", tracer_table=None, **fit_kwargs):
        from matplotlib.figure import Figure

        self.members = members if isinstance(members, Table) else Table(members)
        self.name = str(name)
        self.last_error = None
        self.fit = fit if fit is not None else fit_cluster(self.members, **fit_kwargs)
        phot, _ = read_photometry(self.members)
        self.colour, self.magnitude = next(
            ((c, m) for c, m in _CMD_CHOICES if m in phot.names and _has(phot, c)), (("B", "V"), "V"))
        self.has_cc = _has(phot, ("U", "B")) and _has(phot, ("B", "V"))
        self._rows = [] if tracer_table is None else [dict(zip(tracer_table.colnames, r)) for r in tracer_table]
        self._meta = {} if tracer_table is None else dict(tracer_table.meta)
        f = self.fit
        e_span = max(5 * f.ebv_err, 0.3)
        m_span = max(5 * f.distance_modulus_err, 1.0) if np.isfinite(f.distance_modulus) else 1.0
        mu = f.distance_modulus if np.isfinite(f.distance_modulus) else 10.0
        self.ebv_widget = W.FloatSlider(value=f.ebv, min=max(f.ebv - e_span, -0.3), max=f.ebv + e_span, step=0.005,
                                        description="E(B-V) [mag]", readout_format=".3f", continuous_update=False,
                                        style={"description_width": "110px"}, layout=W.Layout(width="420px"))
        self.mu0_widget = W.FloatSlider(value=mu, min=mu - m_span, max=mu + m_span, step=0.01,
                                        description="mu0 [mag]", readout_format=".2f", continuous_update=False,
                                        style={"description_width": "110px"}, layout=W.Layout(width="420px"))
        self.reset_button = W.Button(description="Back to the fit", icon="undo")
        self.accept_button = W.Button(description="Accept into tracer table", icon="check", button_style="success")
        self.status = W.HTML()
        self.residuals = W.HTML()
        self.log = W.Output(layout=W.Layout(max_height="120px", overflow="auto"))
        self.figure_area = W.Output()
        self.cmd_fig = Figure(figsize=(5.2, 5.6), layout="constrained")
        self.cc_fig = Figure(figsize=(5.2, 5.6), layout="constrained") if self.has_cc else None
        self.cmd_ax = self.cc_ax = None
        summary = W.HTML("<pre style='font-size:85%'>" + html.escape(f.summary()) + "</pre>")
        caution = W.HTML(f'<div style="font-size:85%;font-style:italic">{html.escape(CAUTION)}</div>')
        self.panel = W.VBox([summary, self.ebv_widget, self.mu0_widget, self.residuals,
                             W.HBox([self.reset_button, self.accept_button]), self.status, self.figure_area,
                             self.log, caution])
        self.panel.add_class("dustkit-cluster-panel")
        self.ebv_widget.observe(lambda _c: self._run(self._redraw), "value")
        self.mu0_widget.observe(lambda _c: self._run(self._redraw), "value")
        self.reset_button.on_click(lambda _b: self._run(self._reset))
        self.accept_button.on_click(lambda _b: self._run(self._accept))
        self._run(self._redraw)

    # ------------------------------------------------------------------ parameters
    def plot_parameters(self):
        """Keyword arguments of :func:`dustkit.cluster_plots.plot_cluster_cmd` for the current sliders."""
        return dict(colour=self.colour, magnitude=self.magnitude, ebv=float(self.ebv_widget.value),
                    distance_modulus=float(self.mu0_widget.value))

    @property
    def tracer_table(self):
        """The accepted results so far (one row per accepted cluster)."""
        meta = {**self._meta, "caution": CAUTION, "law": self.fit.law, "rv": self.fit.rv,
                "sequence_source": self.fit.sequence_source, "sequence_version": self.fit.sequence_version or ""}
        return tracer_table(self._rows, meta)

    # ------------------------------------------------------------------ callbacks
    def _run(self, action):
        with self.log:
            try:
                with warnings.catch_warnings(record=True) as caught:
                    warnings.simplefilter("always")
                    action()
                for w in caught:
                    print(f"{w.category.__name__}: {w.message}")
            except Exception as exc:  # the panel must survive any error
                self.last_error = exc
                self.status.value = f'<span style="color:#D55E00">&#9888; {html.escape(f"{type(exc).__name__}: {exc}")}</span>'
                traceback.print_exc()

    def _redraw(self):
        p = self.plot_parameters()
        self.cmd_fig.clear()
        self.cmd_ax = cluster_plots.plot_cluster_cmd(self.members, self.fit, ax=self.cmd_fig.add_subplot(), **p)
        if self.cc_fig is not None:
            self.cc_fig.clear()
            self.cc_ax = cluster_plots.plot_cluster_colour_colour(self.members, self.fit, ebv=p["ebv"],
                                                                      ax=self.cc_fig.add_subplot())
        res = colour_residuals(self.members, p["ebv"], p["distance_modulus"], self.colour[0], self.colour[1],
                               self.magnitude, law=self.fit.law, rv=self.fit.rv)
        w = np.where(np.isfinite(res) & ~self.fit.evolved, self.fit.weights, 0.0)
        ok = w > 0
        self.residual_rms = float(np.sqrt(np.sum(w[ok] * res[ok] ** 2) / np.sum(w[ok]))) if ok.any() else float("nan")
        self.residual_median = float(np.median(res[ok & (w >= 0.5)])) if np.any(ok & (w >= 0.5)) else float("nan")
        self.residuals.value = (f"Colour residuals of the members ({self.colour[0]}-{self.colour[1]} minus the sequence): "
                                f"median {self.residual_median:+.3f} mag, weighted rms {self.residual_rms:.3f} mag")
        with self.figure_area:
            self.figure_area.clear_output(wait=True)
            try:
                from IPython.display import display

                display(self.cmd_fig)
                if self.cc_fig is not None:
                    display(self.cc_fig)
            except ImportError:  # pragma: no cover - outside IPython nothing is shown
                pass

    def _reset(self):
        self.ebv_widget.value = self.fit.ebv
        if np.isfinite(self.fit.distance_modulus):
            self.mu0_widget.value = self.fit.distance_modulus

    def _accept(self):
        row = tracer_row(self.fit, self.name, self.members, ebv=float(self.ebv_widget.value),
                         distance_modulus=float(self.mu0_widget.value))
        self._rows = [r for r in self._rows if str(r["name"]) != self.name] + [row]
        self.status.value = html.escape(f"{self.name}: E(B-V) = {row['ebv']:.3f}, mu0 = {row['mu0']:.2f} mag accepted "
                                        f"({len(self._rows)} cluster(s) in the tracer table)")


def _has(phot, colour):
    try:
        phot.quantity(colour)
        return True
    except Exception:
        return False
