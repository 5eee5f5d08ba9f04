"""Tests of the explorer panel without a browser: set controls in Python, check the model and figures.

The figures the explorer draws must equal those of the plotting functions with the same
parameters (the explorer holds no science of its own). Models are built from a small
simulated catalogue of an invented region (dustkit.simulate).
"""

import importlib.util
import warnings

import matplotlib

matplotlib.use("Agg")

import numpy as np
import pytest
from astropy import units as u
from astropy.table import Table
from matplotlib.backend_bases import MouseEvent
from matplotlib.figure import Figure

pytest.importorskip("ipywidgets", reason="the explorer needs ipywidgets")

from dustkit import plotting  # noqa: E402
from dustkit.bands import a_band_over_av  # noqa: E402
from dustkit.simulate import Cloud, DustField, simulate_tracers  # noqa: E402
from dustkit.tracers import read_tracers  # noqa: E402
from dustkit.ui import Explorer  # noqa: E402

FIELD = DustField(a0=1.0, h=120.0, z_sun=20.0, clouds=(Cloud(300.0, -1.0, 600.0, 2.5, 30.0, 1.0),))
# quick models: few folds and smoothing candidates, so a rebuild takes about a second
FAST = dict(nside=8, distance_max=3000 * u.pc, distance_step=250 * u.pc, n_folds=3, sky_passes=(0, 1), n_draws=16)
HAS_IO = importlib.util.find_spec("dustkit.io") is not None


@pytest.fixture(scope="module")
def catalogue():
    # an invented region around l = 300 deg
    return simulate_tracers(FIELD, 400, l_range=(285, 315), b_range=(-6, 6), distance_max=3000, rng=11)


@pytest.fixture(scope="module")
def tracers(catalogue):
    return read_tracers(catalogue)


@pytest.fixture(scope="module")
def explorer(tracers):
    pytest.importorskip("ipympl", reason="interactive figures need ipympl")
    return Explorer(tracers, figures="interactive", **FAST)


def _line(ax, gid):
    lines = [ln for ln in ax.lines if ln.get_gid() == gid]
    assert len(lines) == 1, gid
    return lines[0]


def _assert_same_drawing(ax, ref):
    """Same lines (data and style), same filled areas and meshes, same labels."""
    assert [ln.get_gid() for ln in ax.lines] == [ln.get_gid() for ln in ref.lines]
    for a, b in zip(ax.lines, ref.lines):
        np.testing.assert_allclose(np.asarray(a.get_xdata(), float), np.asarray(b.get_xdata(), float))
        np.testing.assert_allclose(np.asarray(a.get_ydata(), float), np.asarray(b.get_ydata(), float))
        assert a.get_linestyle() == b.get_linestyle() and a.get_color() == b.get_color()
    assert len(ax.collections) == len(ref.collections)
    for a, b in zip(ax.collections, ref.collections):
        if a.get_array() is not None:
            np.testing.assert_allclose(np.asarray(a.get_array()), np.asarray(b.get_array()))
            assert a.get_clim() == b.get_clim()
        for pa, pb in zip(a.get_paths(), b.get_paths()):
            np.testing.assert_allclose(pa.vertices, pb.vertices)
    assert (ax.get_xlabel(), ax.get_ylabel(), ax.get_title()) == (ref.get_xlabel(), ref.get_ylabel(), ref.get_title())
    assert ax.get_xlim() == ref.get_xlim()


def _reference_profile(explorer):
    ref = Figure(layout="constrained").add_subplot()
    return plotting.plot_profile(explorer.model, ax=ref, **explorer.profile_parameters())


def _reference_sky(explorer):
    ref = Figure(layout="constrained").add_subplot()
    return plotting.plot_sky(explorer.model, ax=ref, **explorer.sky_parameters())


def _ok(explorer):
    assert "dustkit-error" not in explorer.status._dom_classes, explorer.status.value


# ----------------------------------------------------------------------------- build and figures

def test_initial_panel(explorer, tracers):
    _ok(explorer)
    assert explorer.model.law == "ccm89" and explorer.rv == pytest.approx(3.1)
    assert explorer.model.grid_.nside == 8
    assert explorer.tracers is explorer.model.tracers_
    # R_V limits come from the law registry: CCM89 is defined for R_V 2-6 (Cardelli et al. 1989)
    assert (explorer.rv_widget.min, explorer.rv_widget.max) == (2.0, 6.0)
    assert not explorer.rv_widget.disabled
    assert explorer.distance_widget.max == 3000.0 and explorer.distance_widget.step == 250.0
    classes = {c for w in (explorer.law_widget, explorer.rv_widget, explorer.status, explorer._profile_view,
                           explorer._sky_view, explorer.export_button) for c in w._dom_classes}
    assert {"dustkit-law", "dustkit-rv", "dustkit-status", "dustkit-profile", "dustkit-sky", "dustkit-export"} <= classes
    assert "Model built" in explorer.status.value and "400 tracers" in explorer.status.value
    # interactive figures: the canvases are widgets in the panel
    assert explorer._sky_view is explorer.sky_fig.canvas
    # the sky view zooms on the tracers (around l = 300), longitude increasing to the left
    x0, x1 = explorer.sky_ax.get_xlim()
    assert x0 > x1 and x1 <= 285 and x0 >= 315


def test_figures_equal_plotting_functions(explorer):
    _assert_same_drawing(explorer.profile_ax, _reference_profile(explorer))
    _assert_same_drawing(explorer.sky_ax, _reference_sky(explorer))


def test_rv_rederives_av_and_redraws(explorer, tracers):
    before = _line(explorer.profile_ax, "dustkit-profile").get_ydata().copy()
    explorer.rv_widget.value = 4.0
    _ok(explorer)
    assert explorer.rv == pytest.approx(4.0) and explorer.model.rv == pytest.approx(4.0)
    # A_V = R_V E(B-V) for E(B-V) input (definition of R_V; common practice)
    np.testing.assert_allclose(explorer.tracers.av, 4.0 * tracers.excess)
    np.testing.assert_allclose(explorer.tracers.av / tracers.av, 4.0 / 3.1)
    after = _line(explorer.profile_ax, "dustkit-profile").get_ydata()
    assert after.max() > 1.15 * before.max()  # more A_V for the same reddening
    _assert_same_drawing(explorer.profile_ax, _reference_profile(explorer))
    explorer.rv_widget.value = 3.1
    _ok(explorer)
    assert "from the cache" in explorer.status.value


def test_law_chooser_sets_rv_limits(explorer):
    explorer.law_widget.value = "gordon23"
    _ok(explorer)
    assert explorer.model.law == "gordon23"
    assert (explorer.rv_widget.min, explorer.rv_widget.max) == (2.3, 5.6)  # Gordon et al. 2023 range
    explorer.law_widget.value = "rieke85"
    _ok(explorer)
    # Rieke & Lebofsky 1985 have a fixed R_V = 3.09
    assert explorer.rv_widget.disabled and explorer.rv == pytest.approx(3.09)
    assert explorer.model.law == "rieke85"
    explorer.law_widget.value = "ccm89"
    _ok(explorer)
    assert not explorer.rv_widget.disabled and explorer.rv == pytest.approx(3.1)  # the last free R_V comes back
    _assert_same_drawing(explorer.profile_ax, _reference_profile(explorer))


def test_sight_line_controls(explorer):
    explorer.l_widget.value = 302.0
    explorer.b_widget.value = -1.5
    explorer.radius_widget.value = 2.0
    _ok(explorer)
    prof = explorer.model.profile(302 * u.deg, -1.5 * u.deg, radius=2 * u.deg)
    np.testing.assert_allclose(_line(explorer.profile_ax, "dustkit-profile").get_ydata(), prof["av"].to_value(u.mag))
    assert "302.00" in explorer.profile_ax.get_title() and "cone radius 2" in explorer.profile_ax.get_title()
    cross = _line(explorer.sky_ax, "dustkit-mark")
    assert (cross.get_xdata()[0], cross.get_ydata()[0]) == (302.0, -1.5)
    explorer.radius_widget.value = 0.0
    assert "single sight line" in explorer.profile_ax.get_title()
    _assert_same_drawing(explorer.profile_ax, _reference_profile(explorer))
    _assert_same_drawing(explorer.sky_ax, _reference_sky(explorer))


def test_click_on_sky_map_picks_sight_line(explorer):
    ax = explorer.sky_ax
    x, y = ax.transData.transform((296.0, 2.0))
    event = MouseEvent("button_press_event", explorer.sky_fig.canvas, x, y, button=1)
    explorer.sky_fig.canvas.callbacks.process("button_press_event", event)
    _ok(explorer)
    assert explorer.l == pytest.approx(296.0, abs=1e-3) and explorer.b == pytest.approx(2.0, abs=1e-3)
    assert "296.00" in explorer.profile_ax.get_title()
    # a right click does nothing
    x, y = explorer.sky_ax.transData.transform((310.0, 0.0))
    explorer.sky_fig.canvas.callbacks.process(
        "button_press_event", MouseEvent("button_press_event", explorer.sky_fig.canvas, x, y, button=3))
    assert explorer.l == pytest.approx(296.0, abs=1e-3)


def test_distance_slider_and_map_kind(explorer):
    explorer.distance_widget.value = 1000.0
    _ok(explorer)
    assert "1 kpc" in explorer.sky_ax.get_title()
    mesh = [c for c in explorer.sky_ax.collections if c.get_gid() == "dustkit-sky"][0]
    before = np.asarray(mesh.get_array()).copy()
    explorer.distance_widget.value = 2500.0
    mesh = [c for c in explorer.sky_ax.collections if c.get_gid() == "dustkit-sky"][0]
    assert np.mean(np.asarray(mesh.get_array())) > np.mean(before)  # cumulative A_V grows with distance
    explorer.kind_widget.value = "differential"
    assert "mag/kpc" in explorer.sky_ax.collections[0].colorbar.ax.get_ylabel()
    _assert_same_drawing(explorer.sky_ax, _reference_sky(explorer))
    explorer.kind_widget.value = "cumulative"


def test_band_chooser(explorer):
    explorer.quantity_widget.value = "Ks"
    _ok(explorer)
    assert "Ks" in explorer.profile_ax.get_ylabel() and "[mag]" in explorer.profile_ax.get_ylabel()
    prof = explorer.model.profile(explorer.l * u.deg, explorer.b * u.deg)
    y = _line(explorer.profile_ax, "dustkit-profile").get_ydata()
    av = prof["av"].to_value(u.mag)
    np.testing.assert_allclose(y, av * a_band_over_av("Ks", explorer.law, explorer.rv, av=av))
    _assert_same_drawing(explorer.profile_ax, _reference_profile(explorer))
    explorer.quantity_widget.value = "ebv"
    assert "E(B-V)" in explorer.profile_ax.get_ylabel()
    explorer.quantity_widget.value = "av"


# ----------------------------------------------------------------------------- errors and export

def test_errors_are_shown_and_the_panel_keeps_working(explorer):
    model = explorer.model
    explorer.step_widget.value = 5000.0  # larger than the maximum distance
    explorer.rebuild_button.click()
    assert "dustkit-error" in explorer.status._dom_classes
    assert "distance step" in explorer.status.value and "5000" in explorer.status.value
    assert explorer.model is model  # the old model is kept
    explorer.step_widget.value = 250.0
    explorer.radius_widget.value = 1.0
    _ok(explorer)
    assert "cone radius 1" in explorer.profile_ax.get_title()


def test_a_law_the_tracers_cannot_take_leaves_the_controls_on_the_law_shown(catalogue):
    # the invented region's reddening given as E(BP-RP): a law that does not cover the BP
    # passband (Rieke & Lebofsky 1985 starts at 0.365 micron) cannot convert it
    table = catalogue.copy()
    table.rename_columns(["ebv", "ebv_err"], ["E(BP-RP)", "e_E(BP-RP)"])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ex = Explorer(read_tracers(table), figures="static", **FAST)
    _ok(ex)
    ex.law_widget.value = "rieke85"
    assert "dustkit-error" in ex.status._dom_classes and "LawRangeError" in ex.status.value
    assert ex.model.law == "ccm89"  # the figures still show the old model ...
    # ... and so do the controls: not a law and a pinned R_V the figures do not show
    assert ex.law_widget.value == "ccm89"
    assert not ex.rv_widget.disabled and ex.rv_widget.value == pytest.approx(3.1)
    assert "still show law ccm89" in ex.status.value
    assert "ccm89" in ex.profile_ax.get_title()
    ex.law_widget.value = "gordon23"  # the panel keeps working
    _ok(ex)
    assert ex.model.law == "gordon23" and "gordon23" in ex.profile_ax.get_title()


@pytest.mark.skipif(not HAS_IO, reason="dustkit.io (export_table) is not available yet")
def test_export_writes_a_table(explorer, tmp_path):
    explorer.format_widget.value = "csv"
    assert explorer.filename_widget.value.endswith(".csv")
    target = tmp_path / "region_table.csv"
    explorer.filename_widget.value = str(target)
    explorer.export_button.click()
    _ok(explorer)
    assert target.exists() and str(target) in explorer.status.value
    table = Table.read(target, format="ascii.csv")
    assert len(table) == len(explorer.model.to_table())
    assert {"l", "b", "distance_min", "distance_max", "av", "av_err"} <= set(table.colnames)
    # exporting again without "replace" fails in the panel and keeps the file
    content = target.read_bytes()
    explorer.export_button.click()
    assert "dustkit-error" in explorer.status._dom_classes
    assert target.read_bytes() == content
    explorer.filename_widget.value = str(tmp_path / "no_such_folder" / "t.csv")
    explorer.export_button.click()
    assert "dustkit-error" in explorer.status._dom_classes and "no_such_folder" in explorer.status.value
    explorer.distance_widget.value = 1750.0 if explorer.distance != 1750.0 else 2000.0  # still working
    _ok(explorer)
    assert "Sky map" in explorer.status.value


# ----------------------------------------------------------------------------- other ways in

def test_static_figures_and_given_model(explorer, tracers):
    other = Explorer(tracers, model=explorer.model, figures="static")
    assert other.model is explorer.model  # no rebuild
    # static figures are PNG images (PNG signature, ISO/IEC 15948) of the current figures
    assert other._profile_view.value[:8] == b"\x89PNG\r\n\x1a\n"
    assert "dustkit-sky" in other._sky_view._dom_classes
    before = other._profile_view.value
    x, y = other.sky_ax.transData.transform((300.0, -1.0))
    other.sky_fig.canvas.callbacks.process(
        "button_press_event", MouseEvent("button_press_event", other.sky_fig.canvas, x, y, button=1))
    assert other.l == pytest.approx(300.0, abs=1e-3) and other.b == pytest.approx(-1.0, abs=1e-3)
    assert other._profile_view.value != before  # the image was redrawn
    _assert_same_drawing(other.profile_ax, _reference_profile(other))


def test_from_file(catalogue, tmp_path):
    path = tmp_path / "invented_clusters.ecsv"
    catalogue.write(path)
    ex = Explorer.from_file(path, figures="static", model_params=FAST)
    _ok(ex)
    assert len(ex.tracers) == len(catalogue)
    assert ex.model.grid_.nside == 8


def test_bad_parameters_fail_before_building(tracers):
    from dustkit._errors import ParameterError

    with pytest.raises(ParameterError, match="'figures'"):
        Explorer(tracers, figures="3d")
    with pytest.raises(TypeError):
        Explorer(tracers, no_such_option=1)


def test_feature_marks_follow_the_step_search(explorer):
    pytest.importorskip("dustkit.features", reason="dustkit.features is not available yet")
    explorer.select(300.0, -1.0, radius=2.5)  # toward the invented cloud at 600 pc
    explorer.features_widget.value = True
    _ok(explorer)
    found = explorer.profile_parameters()["features"]
    assert found is not None and "distance" in found.colnames
    marks = [ln for ln in explorer.profile_ax.lines if ln.get_gid() == "dustkit-feature"]
    assert len(marks) == len(found)
    np.testing.assert_allclose(sorted(ln.get_xdata()[0] for ln in marks),
                               np.sort(found["distance"].to_value(u.kpc)))
    _assert_same_drawing(explorer.profile_ax, _reference_profile(explorer))
    explorer.features_widget.value = False
    assert not [ln for ln in explorer.profile_ax.lines if ln.get_gid() == "dustkit-feature"]


# ----------------------------------------------------------------------------- cluster panel
def test_cluster_panel_draws_what_the_plotting_function_draws(tmp_path):
    # simulated members of an invented cluster (dustkit.clusters.simulate_members)
    from dustkit.plotting import clusters as cluster_plots
    from dustkit.clusters import colour_residuals, fit_cluster, simulate_members
    from dustkit.ui.cluster_panel import ClusterPanel

    members = simulate_members(60, 0.5, 10.0, bands=("U", "B", "V"), rng=5, l=40.0, b=1.0)
    fit = fit_cluster(members, evolved_cut=None)
    panel = ClusterPanel(members, fit, name="Invented 1")
    assert panel.ebv_widget.value == pytest.approx(fit.ebv, abs=0.005)
    assert panel.mu0_widget.value == pytest.approx(fit.distance_modulus, abs=0.01)
    assert panel.cc_ax is not None  # U-B is there

    def same(ax, ref):
        assert [ln.get_gid() for ln in ax.lines] == [ln.get_gid() for ln in ref.lines]
        for a, b in zip(ax.lines, ref.lines):
            np.testing.assert_allclose(np.asarray(a.get_xdata(), float), np.asarray(b.get_xdata(), float))
            np.testing.assert_allclose(np.asarray(a.get_ydata(), float), np.asarray(b.get_ydata(), float))
        assert (ax.get_xlabel(), ax.get_ylabel()) == (ref.get_xlabel(), ref.get_ylabel())
        for a, b in zip(ax.collections, ref.collections):
            np.testing.assert_allclose(a.get_offsets(), b.get_offsets())

    # drive the sliders from Python: the figure follows, equal to the plotting function's
    panel.ebv_widget.value = fit.ebv + 0.1
    panel.mu0_widget.value = fit.distance_modulus - 0.3
    assert panel.last_error is None
    ref = cluster_plots.plot_cluster_cmd(members, fit, ax=Figure(layout="constrained").add_subplot(),
                                             **panel.plot_parameters())
    same(panel.cmd_ax, ref)
    assert panel.plot_parameters()["ebv"] == pytest.approx(fit.ebv + 0.1, abs=0.005)
    # residuals update: too much reddening makes the members bluer than the sequence
    res = colour_residuals(members, panel.ebv_widget.value, panel.mu0_widget.value)
    assert panel.residual_median < -0.05
    assert np.nanmedian(res[fit.weights > 0.5]) == pytest.approx(panel.residual_median)
    # back to the fit, then accept: one tracer row with the fitted values
    panel.reset_button.click()
    assert panel.ebv_widget.value == pytest.approx(fit.ebv, abs=0.005)
    assert abs(panel.residual_median) < 0.03
    panel.accept_button.click()
    table = panel.tracer_table
    assert list(table["name"]) == ["Invented 1"] and table["mu0"][0] == pytest.approx(panel.mu0_widget.value)
    assert table["l"][0] == pytest.approx(40.0, abs=0.05)
    path = tmp_path / "t.ecsv"
    table.write(path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert len(read_tracers(path).l) == 1


def test_a_density_model_follows_rv_changes_in_the_explorer(tracers):
    from dustkit.density import DensityModel

    model = DensityModel(nside=16, distance_max=3000 * u.pc, amplitudes=(0.5,), lengths=[150] * u.pc,
                         n_samples=16, quiet=True).fit(tracers)
    ex = Explorer(tracers, model=model, figures="static")
    ex.rv_widget.value = 3.5
    assert ex.last_error is None
    assert ex.model.how_.startswith("rescaled exactly")  # E(B-V) tracers: A_V = R_V E(B-V)
    assert "rescaled exactly" in ex.status.value
    np.testing.assert_allclose(ex.model.av_, model.av_ * 3.5 / model.rv, rtol=1e-12)


def test_a_new_distance_step_builds_the_binned_model_on_that_step_from_a_density_model(tracers):
    from dustkit import ExtinctionModel
    from dustkit.density import DensityModel

    model = DensityModel(nside=16, distance_max=3000 * u.pc, amplitudes=(0.5,), lengths=[150] * u.pc,
                         n_samples=16, quiet=True).fit(tracers)
    ex = Explorer(tracers, model=model, figures="static", n_folds=3, sky_passes=(0,), n_draws=8)
    first_step = ex.step_widget.value
    assert first_step != 200.0
    # the status says the bins as they are (they widen with distance), not one step they do not have
    widths = np.diff(model.grid_.distance_edges)
    assert widths.min() < widths.max()
    assert f"{widths.size} bins {widths.min():.0f}-{widths.max():.0f} pc wide" in ex.status.value
    assert f"{first_step:g} pc steps" not in ex.status.value
    ex.step_widget.value = 200.0
    ex.rebuild_button.click()
    _ok(ex)
    # the grid asked for, not the density model's own (50 pc steps near the Sun, wider beyond)
    assert isinstance(ex.model, ExtinctionModel)
    np.testing.assert_allclose(np.diff(ex.model.grid_.distance_edges), 200.0)
    assert "in 200 pc steps" in ex.status.value
    ex.step_widget.value = first_step  # back to the density model's grid: the density model again
    ex.rebuild_button.click()
    _ok(ex)
    assert isinstance(ex.model, DensityModel)


def test_without_a_model_the_explorer_opens_on_the_density_model_unless_given_a_grid(tracers):
    from dustkit import ExtinctionModel, build_model
    from dustkit.density import DensityModel

    # the same choice as build_model (a cluster catalogue: the 3-D density model, the more accurate)
    ex = Explorer(tracers, figures="static", random_state=3)
    assert ex.last_error is None and isinstance(ex.model, DensityModel)
    ref = build_model(tracers, random_state=3, quiet=True)
    np.testing.assert_array_equal(ex.model.av_, ref.av_)
    # an R_V change rescales it exactly (A_V = R_V E(B-V) for E(B-V) tracers: definition of R_V)
    ex.rv_widget.value = 3.5
    assert ex.last_error is None and ex.model.how_.startswith("rescaled exactly")
    # the grid controls build the binned model on their grid
    ex.nside_widget.value = 8
    ex.rebuild_button.click()
    assert ex.last_error is None and isinstance(ex.model, ExtinctionModel) and ex.model.grid_.nside == 8
    # a grid given at the start asks for the binned model from the start
    assert isinstance(Explorer(tracers, figures="static", **FAST).model, ExtinctionModel)


def test_a_layer_given_to_the_explorer_follows_rv_changes(tracers):
    # a layer from elsewhere, in A_V under the first R_V: a rebuild under another R_V scales it
    # with the tracers' A_V (A_V = R_V E(B-V): definition of R_V), it is not refitted
    from dustkit.layer import DustLayer

    ex = Explorer(tracers, figures="static", layer=DustLayer(a0=0.9, h=110.0, z_sun=15.0, a0_err=0.05), **FAST)
    assert ex.last_error is None and ex.model.layer_.a0 == 0.9
    ex.rv_widget.value = 3.5
    assert ex.last_error is None
    assert ex.model.layer_.a0 == pytest.approx(0.9 * 3.5 / 3.1, rel=1e-9) and ex.model.layer_.h == 110.0


def test_band_list_follows_the_law_and_rv(explorer):
    def listed():
        return {v: label for label, v in explorer.quantity_widget.options if v not in ("av", "ebv")}

    # under CCM89, R_V = 3.1 the listed coefficients are a_band_over_av's for the reference star
    assert explorer.law == "ccm89"
    for band in ("V", "G", "Ks"):
        assert explorer.band_coefficients[band] == a_band_over_av(band, "ccm89", 3.1)
        assert f"A/A_V = {a_band_over_av(band, 'ccm89', 3.1):.3f}" in listed()[band]
    explorer.quantity_widget.value = "G"
    explorer.rv_widget.value = 5.0
    _ok(explorer)
    assert explorer.quantity_widget.value == "G"  # the choice stays
    for band in ("B", "G", "Ks"):
        k = a_band_over_av(band, "ccm89", 5.0)
        assert explorer.band_coefficients[band] == k and f"A/A_V = {k:.3f}" in listed()[band]
    # a larger R_V means a greyer law: less extinction in the blue per A_V (Cardelli et al. 1989)
    assert explorer.band_coefficients["B"] < a_band_over_av("B", "ccm89", 3.1)
    explorer.law_widget.value = "fitzpatrick99"
    _ok(explorer)
    rv = explorer.rv
    for band in ("U", "G", "J"):
        k = a_band_over_av(band, "fitzpatrick99", rv)
        assert explorer.band_coefficients[band] == k and f"A/A_V = {k:.3f}" in listed()[band]
    # the profile shows the chosen band under the new law
    _assert_same_drawing(explorer.profile_ax, _reference_profile(explorer))
    explorer.law_widget.value = "ccm89"
    explorer.rv_widget.value = 3.1
    explorer.quantity_widget.value = "av"
    _ok(explorer)
    assert explorer.band_coefficients["G"] == a_band_over_av("G", "ccm89", 3.1)


# ----------------------------------------------------------------------------- dust features layer
def _feature_circles(ax):
    return [ln for ln in ax.lines if ln.get_gid() == "dustkit-features"]


def test_feature_layer_on_a_binned_model(explorer):
    from dustkit.features import detect_features

    explorer.features_widget.value = False
    explorer.feature_layer_widget.value = True
    _ok(explorer)
    # a binned model has no posterior samples: the sight-line step finder, no probability slider
    assert explorer.min_probability_widget.disabled
    want = detect_features(explorer.model, quiet=True)
    assert len(explorer.layer_features) == len(want)
    assert "dust feature(s) in the model" in explorer.status.value
    assert explorer.feature_table.value  # the table (or the line saying there is none) is shown
    _assert_same_drawing(explorer.sky_ax, _reference_sky(explorer))
    _assert_same_drawing(explorer.profile_ax, _reference_profile(explorer))
    explorer.feature_layer_widget.value = False
    assert explorer.layer_features is None and explorer.sky_parameters()["features"] is None
    assert explorer.feature_table.value == ""


@pytest.fixture(scope="module")
def density_explorer(tracers):
    # the 3-D density model of the same invented region (a quick prior: two amplitudes, one length)
    from dustkit.density import DensityModel

    model = DensityModel(distance_max=3000 * u.pc, amplitudes=(0.25, 0.6), lengths=(150,) * u.pc, n_samples=16,
                         quiet=True).fit(tracers)
    return Explorer(tracers, model=model, figures="static")


def test_feature_layer_on_a_density_model(density_explorer, monkeypatch):
    import dustkit.features
    from dustkit.features import KIND_NEARER, MIN_PROBABILITY, density_features

    ex = density_explorer
    calls = []
    real = dustkit.features.density_features
    monkeypatch.setattr(dustkit.features, "density_features", lambda *a, **k: calls.append(1) or real(*a, **k))
    ex.select(300.0, -1.0, radius=2.5)  # toward the invented cloud at 600 pc
    ex.feature_layer_widget.value = True
    _ok(ex)
    # by default the cut is the command line's: corrected for the look-elsewhere effect of the
    # model's search, shown on the (disabled) slider
    assert ex.look_elsewhere_widget.value and ex.min_probability_widget.disabled
    want = density_features(ex.model)
    assert want.meta["min_probability"] >= MIN_PROBABILITY
    assert ex.min_probability_widget.value == pytest.approx(want.meta["min_probability"], abs=1e-4)
    assert f"{want.meta['min_probability']:.4f} (look-elsewhere cut over" in ex.status.value
    assert len(want) >= 1  # the invented cloud (1 mag at 600 pc) is there
    assert len(ex.layer_features) == len(want)
    np.testing.assert_allclose(ex.layer_features["l"].to_value(u.deg), want["l"].to_value(u.deg))
    np.testing.assert_allclose(ex.layer_features["delta_av"].to_value(u.mag), want["delta_av"].to_value(u.mag))
    # drawn on the map (a circle per feature) and on the profile, as the plotting functions draw them
    assert len(_feature_circles(ex.sky_ax)) == len(want)
    _assert_same_drawing(ex.sky_ax, _reference_sky(ex))
    _assert_same_drawing(ex.profile_ax, _reference_profile(ex))
    # listed: one row per feature, distance +- error or "nearer than D", and the probability
    html_table = ex.feature_table.value
    assert html_table.count("<tr>") == len(want) + 1 and "P</th>" in html_table
    for r in want:
        if r["kind"] == KIND_NEARER:
            assert f"nearer than {r['distance_upper'].to_value(u.pc):.0f}" in html_table
        else:
            assert f"{r['distance'].to_value(u.pc):.0f} &plusmn; {r['distance_err'].to_value(u.pc):.0f}" in html_table
    # unticked, the slider applies its own cut to the features found once: no new search
    n_calls = len(calls)
    ex.look_elsewhere_widget.value = False
    assert not ex.min_probability_widget.disabled
    ex.min_probability_widget.value = 0.5
    _ok(ex)
    assert len(calls) == n_calls
    assert len(ex.layer_features) == len(density_features(ex.model, min_probability=0.5)) >= len(want)
    assert ex.layer_features.meta["min_probability"] == 0.5
    _assert_same_drawing(ex.sky_ax, _reference_sky(ex))
    ex.look_elsewhere_widget.value = True
    _ok(ex)
    assert len(ex.layer_features) == len(want) and ex.min_probability_widget.disabled


def test_feature_layer_follows_rv(density_explorer):
    from dustkit.features import density_features

    ex = density_explorer
    ex.feature_layer_widget.value = True
    before = ex.layer_features
    ex.rv_widget.value = 4.0
    _ok(ex)
    assert ex.model.rv == pytest.approx(4.0)
    # a new model, so the features are found again, for that model
    want = density_features(ex.model)
    np.testing.assert_allclose(ex.layer_features["delta_av"].to_value(u.mag), want["delta_av"].to_value(u.mag))
    # E(B-V) tracers: A_V = R_V E(B-V) (definition of R_V; common practice), so the added A_V of the
    # same cloud grows by 4.0 / 3.1 (the density model rescales E(B-V) tracers exactly)
    assert len(want) == len(before) >= 1
    np.testing.assert_allclose(want["delta_av"].to_value(u.mag) / before["delta_av"].to_value(u.mag),
                               4.0 / 3.1, rtol=0.02)
    _assert_same_drawing(ex.sky_ax, _reference_sky(ex))
    ex.rv_widget.value = 3.1
    _ok(ex)
    np.testing.assert_allclose(ex.layer_features["delta_av"].to_value(u.mag), before["delta_av"].to_value(u.mag))
