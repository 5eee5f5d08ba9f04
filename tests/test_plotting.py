"""Tests of dustkit.plotting: figures show what the model says, with units and readable labels.

Models are built from small simulated catalogues of an invented region (dustkit.simulate).
"""

import os

import matplotlib

matplotlib.use("Agg")

import numpy as np
import pytest
from astropy import units as u
from astropy.table import QTable
from matplotlib.figure import Figure

from dustkit import plotting
from dustkit._errors import LawRangeError, ParameterError
from dustkit.bands import a_band_over_av
from dustkit.laws import get_law
from dustkit.model import ExtinctionModel
from dustkit.simulate import Cloud, DustField, simulate_tracers
from dustkit.tracers import read_tracers

# an invented region: a smooth layer plus one cloud at 700 pc toward l = 32, b = 1
FIELD = DustField(a0=1.0, h=120.0, z_sun=20.0, clouds=(Cloud(32.0, 1.0, 700.0, 3.0, 30.0, 1.2),))


@pytest.fixture(scope="module")
def model():
    table = simulate_tracers(FIELD, 600, l_range=(20, 50), b_range=(-8, 8), distance_max=3000, rng=7)
    tracers = read_tracers(table)
    # few folds and smoothing candidates keep the build quick; the figures do not depend on them
    return ExtinctionModel(nside=16, distance_max=3000 * u.pc, distance_step=200 * u.pc, n_folds=3,
                           sky_passes=(0, 1), n_draws=16, quiet=True).fit(tracers)


def _by_gid(ax, gid):
    found = [a for a in ax.get_children() if a.get_gid() == gid]
    found += [a for a in ax.lines if a.get_gid() == gid and a not in found]
    return found


def _line(ax, gid):
    lines = [ln for ln in ax.lines if ln.get_gid() == gid]
    assert len(lines) == 1, f"expected one line with gid {gid!r}, got {len(lines)}"
    return lines[0]


def _fresh_axes(**kw):
    return Figure(layout="constrained").add_subplot(**kw)


def _texts_inside_figure(fig):
    """Labels, titles and tick labels that lie outside the figure (clipped), as written by save_figure."""
    plotting.settle_layout(fig)
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    fb = fig.bbox
    texts = []
    for ax in fig.axes:
        texts += [ax.xaxis.label, ax.yaxis.label, ax.title]
        x0, x1 = sorted(ax.xaxis.get_view_interval())
        y0, y1 = sorted(ax.yaxis.get_view_interval())
        texts += [t for t in ax.get_xticklabels() if t.get_text() and x0 <= t.get_position()[0] <= x1]
        texts += [t for t in ax.get_yticklabels() if t.get_text() and y0 <= t.get_position()[1] <= y1]
    bad = []
    for t in texts:
        if not t.get_visible() or not t.get_text():
            continue
        bb = t.get_window_extent(renderer)
        if bb.x0 < fb.x0 - 1 or bb.y0 < fb.y0 - 1 or bb.x1 > fb.x1 + 1 or bb.y1 > fb.y1 + 1:
            bad.append(t.get_text())
    return bad


# ----------------------------------------------------------------------------- profile

def test_profile_line_and_band_equal_model_profile(model):
    ax = plotting.plot_profile(model, 32 * u.deg, 1 * u.deg, radius=2 * u.deg)
    prof = model.profile(32 * u.deg, 1 * u.deg, radius=2 * u.deg)
    line = _line(ax, "dustkit-profile")
    # the model reaches 3 kpc, so the axis is in kpc
    np.testing.assert_allclose(line.get_xdata(), prof["distance"].to_value(u.kpc))
    np.testing.assert_allclose(line.get_ydata(), prof["av"].to_value(u.mag))
    band = _by_gid(ax, "dustkit-profile-band")[0]
    ys = band.get_paths()[0].vertices[:, 1]
    top = (prof["av"] + prof["av_err"]).to_value(u.mag)
    bottom = (prof["av"] - prof["av_err"]).to_value(u.mag)
    assert np.isclose(ys.max(), top.max()) and np.isclose(ys.min(), bottom.min())
    assert ax.get_xlabel() == "Distance [kpc]"
    assert "A_V" in ax.get_ylabel() and "[mag]" in ax.get_ylabel()
    title = ax.get_title()
    assert "32.00" in title and "+1.00" in title and "cone radius 2" in title
    assert isinstance(ax.figure.get_layout_engine(), matplotlib.layout_engine.ConstrainedLayoutEngine)
    assert _texts_inside_figure(ax.figure) == []


def test_profile_tracers_have_error_bars_in_both_axes(model):
    ax = plotting.plot_profile(model, 32, 1, radius=2)
    prof = model.profile(32 * u.deg, 1 * u.deg, radius=2 * u.deg)
    tr = prof.meta["tracers"]
    assert tr is not None and len(tr) >= 5
    pts = _line(ax, "dustkit-tracers")
    np.testing.assert_allclose(pts.get_xdata(), tr["distance"].to_value(u.kpc))
    np.testing.assert_allclose(pts.get_ydata(), tr["av"].to_value(u.mag))
    container = [c for c in ax.containers if c.lines[0] is pts][0]
    assert container.has_xerr and container.has_yerr
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert f"tracers ({len(tr)})" in labels


def test_profile_layer_is_dashed_and_equals_model_layer(model):
    ax = plotting.plot_profile(model, 40, -3)
    prof = model.profile(40 * u.deg, -3 * u.deg)
    layer = _line(ax, "dustkit-layer")
    assert layer.get_linestyle() == "--"
    np.testing.assert_allclose(layer.get_ydata(), prof["av_layer"].to_value(u.mag))
    assert "single sight line" in ax.get_title()
    ax2 = plotting.plot_profile(model, 40, -3, show_layer=False, show_tracers=False)
    assert not [ln for ln in ax2.lines if ln.get_gid() in ("dustkit-layer", "dustkit-tracers")]


def test_profile_ebv_is_av_over_rv(model):
    # E(B-V) = A_V / R_V (definition of R_V; Savage & Mathis 1979, common practice)
    ax = plotting.plot_profile(model, 32, 1, quantity="ebv")
    av = model.profile(32 * u.deg, 1 * u.deg)["av"].to_value(u.mag)
    np.testing.assert_allclose(_line(ax, "dustkit-profile").get_ydata(), av / 3.1)
    assert "E(B-V)" in ax.get_ylabel() and "[mag]" in ax.get_ylabel()


def test_profile_band_uses_the_models_law(model):
    ax = plotting.plot_profile(model, 32, 1, band="J")
    av = model.profile(32 * u.deg, 1 * u.deg)["av"].to_value(u.mag)
    y = _line(ax, "dustkit-profile").get_ydata()
    ratio = y[1:] / av[1:]
    # CCM89 Table 3 (Cardelli, Clayton & Mathis 1989, ApJ 345, 245): A(J)/A_V = 0.282 at R_V = 3.1
    np.testing.assert_allclose(ratio, 0.282, atol=0.01)
    np.testing.assert_allclose(ratio, a_band_over_av("J", "ccm89", 3.1, av=av[1:]), rtol=1e-9)
    assert "J" in ax.get_ylabel() and "[mag]" in ax.get_ylabel()


@pytest.mark.parametrize("band", ["g_PS1", "BP_DR2"])
def test_profile_axis_label_shows_a_band_name_with_an_underscore_as_written(model, band):
    from matplotlib.mathtext import MathTextParser

    ax = plotting.plot_profile(model, 32, 1, band=band)
    label = ax.get_ylabel()
    assert label.endswith(" [mag]")
    # what a reader sees: 'A' and, one subscript level down, the band's name letter by letter
    # (an unescaped '_' made the rest of the name a subscript of a subscript: 'g' then 'P' smaller)
    glyphs = MathTextParser("path").parse(label[: -len(" [mag]")]).glyphs
    chars = "".join(chr(g[2]) for g in glyphs)
    sizes = {round(g[1], 3) for g in glyphs[1:]}
    assert chars == "A" + band
    assert len(sizes) == 1 and sizes.pop() < glyphs[0][1]


def test_profile_distance_axis_in_pc_on_request(model):
    ax = plotting.plot_profile(model, 32, 1, distance_unit="pc")
    assert ax.get_xlabel() == "Distance [pc]"
    assert np.isclose(_line(ax, "dustkit-profile").get_xdata()[-1], 3000.0)


def test_profile_marks_features_near_the_sight_line(model):
    feats = QTable({
        "l": [32.0, 200.0] * u.deg, "b": [1.0, 0.0] * u.deg,
        "distance": [700.0, 1500.0] * u.pc, "distance_err": [40.0, 60.0] * u.pc,
        "delta_av": [1.2, 0.5] * u.mag,
    })
    ax = plotting.plot_profile(model, 32, 1, radius=2, features=feats)
    marks = [ln for ln in ax.lines if ln.get_gid() == "dustkit-feature"]
    assert len(marks) == 1  # the feature at l = 200 is far from this sight line
    assert np.allclose(marks[0].get_xdata(), 0.7)
    assert any("1.20" in t.get_text() for t in ax.texts)
    # without sky positions every feature is marked; E(B-V) steps scale like the profile
    ax = plotting.plot_profile(model, 32, 1, quantity="ebv",
                               features=QTable({"distance": [700.0, 1500.0] * u.pc, "delta_av": [3.1, 0.62] * u.mag}))
    assert len([ln for ln in ax.lines if ln.get_gid() == "dustkit-feature"]) == 2
    assert any("1.00" in t.get_text() for t in ax.texts)


def test_profile_returns_given_axes_and_rejects_bad_quantity(model):
    ax = _fresh_axes()
    assert plotting.plot_profile(model, 32, 1, ax=ax) is ax
    with pytest.raises(ParameterError, match=r"The 'quantity' parameter must be one of 'av', 'ebv', 'band'\. Got 'ak' instead\."):
        plotting.plot_profile(model, 32, 1, quantity="ak")
    with pytest.raises(ParameterError, match="'band'"):
        plotting.plot_profile(model, 32, 1, quantity="band")


# ----------------------------------------------------------------------------- sky maps

def test_sky_map_values_units_and_orientation(model):
    ax = plotting.plot_sky(model, 1500 * u.pc, extent=(20, 50, -8, 8))
    mesh = _by_gid(ax, "dustkit-sky")[0]
    values = np.asarray(mesh.get_array()).reshape(mesh._coordinates.shape[0] - 1, mesh._coordinates.shape[1] - 1)
    coords = mesh._coordinates
    # one cell: its value is the model's A_V at the cell centre
    i, j = values.shape[0] // 3, values.shape[1] // 2
    lc = coords[i, j:j + 2, 0].mean()
    bc = coords[i:i + 2, j, 1].mean()
    expected = model.av(lc * u.deg, bc * u.deg, 1500 * u.pc)[0].to_value(u.mag)
    assert np.isclose(values[i, j], expected)
    # longitude increases to the left (astronomical convention)
    x0, x1 = ax.get_xlim()
    assert x0 == 50 and x1 == 20
    cbar = mesh.colorbar
    assert "A_V" in cbar.ax.get_ylabel() and "[mag]" in cbar.ax.get_ylabel()
    lo, hi = mesh.get_clim()
    assert lo == 0.0 and np.isclose(hi, np.percentile(values, 99.5))
    # denser than the model's pixels, so the map is not blocky
    pixel = 2 * model.grid_pixel_radius()
    assert np.diff(coords[0, :, 0]).max() < pixel / 4
    assert "longitude" in ax.get_xlabel() and "latitude" in ax.get_ylabel()
    assert "1.5 kpc" in ax.get_title()
    assert _texts_inside_figure(ax.figure) == []


def test_sky_map_tracers_split_at_the_distance(model):
    ax = plotting.plot_sky(model, 1000 * u.pc, extent=(20, 50, -8, 8))
    near = _line(ax, "dustkit-tracers-near")
    far = _line(ax, "dustkit-tracers-far")
    d = model.tracers_.distance
    assert len(near.get_xdata()) == int((d <= 1000).sum())
    assert len(near.get_xdata()) + len(far.get_xdata()) == len(d)
    ax = plotting.plot_sky(model, 1000 * u.pc, extent=(20, 50, -8, 8), show_tracers=False)
    assert not [ln for ln in ax.lines if "tracers" in str(ln.get_gid())]


def test_sky_map_across_l_zero_and_marks(model):
    ax = plotting.plot_sky(model, 1000, extent=(350, 20, -5, 5), mark=(5, 1, 2), show_tracers=False)
    assert ax.get_xlim() == (380.0, 350.0)
    labels = [ax.xaxis.get_major_formatter()(v) for v in (360.0, 370.0)]
    assert labels == ["0°", "10°"]
    cross = _line(ax, "dustkit-mark")
    assert np.isclose(cross.get_xdata()[0], 365.0) and np.isclose(cross.get_ydata()[0], 1.0)
    assert plotting.sky_position(ax, 365.0, 1.0) == (5.0, 1.0)
    circle = _line(ax, "dustkit-mark-cone")
    assert np.isclose(np.ptp(circle.get_ydata()), 4.0, atol=0.05)  # a 2 deg radius circle


def test_sky_map_says_what_its_symbols_are_and_keeps_features_apart_from_the_mark(model):
    # a legend names the two kinds of tracer (split at the map's distance), the sight line and the
    # features; the feature rings are not drawn in the sight line's colour, and their labels are
    # dark on a light halo, readable on any colour of the map (common practice)
    feats = QTable({"l": [30.0, 40.0] * u.deg, "b": [1.0, -2.0] * u.deg, "distance": [1500.0, 2600.0] * u.pc,
                    "extent": [1.0, 1.5] * u.deg})
    ax = plotting.plot_sky(model, 2 * u.kpc, extent=(20, 55, -6, 6), mark=(30, 1, 2), features=feats)
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert {"tracers nearer than 2 kpc", "tracers beyond 2 kpc", "sight line", "dust feature"} <= set(labels)
    rings = [ln for ln in ax.lines if ln.get_gid() == "dustkit-features"]
    mark = _line(ax, "dustkit-mark")
    assert len(rings) == 2
    assert all(matplotlib.colors.to_rgb(r.get_color()) != matplotlib.colors.to_rgb(mark.get_color()) for r in rings)
    texts = [t for t in ax.texts if t.get_text() in ("1.50 kpc", "2.60 kpc")]
    assert len(texts) == 2 and all(sum(matplotlib.colors.to_rgb(t.get_color())) < 0.5 for t in texts)
    assert all(t.get_path_effects() for t in texts)


def test_sky_map_full_sky_mollweide(model):
    ax = plotting.plot_sky(model, 2 * u.kpc, extent="all-sky", mark=(30, 10))
    assert ax.name == "mollweide"
    cross = _line(ax, "dustkit-mark")
    # x = -l in radians: longitude increases to the left
    assert np.isclose(cross.get_xdata()[0], np.radians(-30))
    assert np.allclose(plotting.sky_position(ax, cross.get_xdata()[0], cross.get_ydata()[0]), (30.0, 10.0))
    mesh = _by_gid(ax, "dustkit-sky")[0]
    assert "A_V" in mesh.colorbar.ax.get_xlabel() and "[mag]" in mesh.colorbar.ax.get_xlabel()
    assert ax.xaxis.get_major_formatter()(np.radians(-30)) == "30°"


def test_sky_map_differential(model):
    ax = plotting.plot_sky(model, 700 * u.pc, kind="differential", extent=(20, 50, -8, 8))
    mesh = _by_gid(ax, "dustkit-sky")[0]
    coords = mesh._coordinates
    values = np.asarray(mesh.get_array()).reshape(coords.shape[0] - 1, coords.shape[1] - 1)
    i, j = values.shape[0] // 2, values.shape[1] // 2
    lc, bc = coords[i, j:j + 2, 0].mean(), coords[i:i + 2, j, 1].mean()
    near = model.av(lc * u.deg, bc * u.deg, 600 * u.pc)[0].to_value(u.mag)
    far = model.av(lc * u.deg, bc * u.deg, 800 * u.pc)[0].to_value(u.mag)
    assert np.isclose(values[i, j], (far - near) / 0.2)  # mag per kpc over the 600-800 pc bin
    assert "mag/kpc" in mesh.colorbar.ax.get_ylabel()
    assert "600 pc to 800 pc" in ax.get_title()


def test_sky_map_rejects_bad_extent(model):
    with pytest.raises(ParameterError, match="extent"):
        plotting.plot_sky(model, 1000, extent=(20, 50, 10, -10))
    with pytest.raises(ParameterError, match="kind"):
        plotting.plot_sky(model, 1000, kind="total")


# ----------------------------------------------------------------------------- face-on map

def test_face_on_geometry_and_labels(model):
    ax = plotting.plot_face_on(model, z_max=0 * u.pc, extent=(0.0, 3.0, 0.0, 3.0), resolution=0.05)
    mesh = _by_gid(ax, "dustkit-face-on")[0]
    coords = mesh._coordinates
    values = np.asarray(mesh.get_array()).reshape(coords.shape[0] - 1, coords.shape[1] - 1)
    # the cell whose centre lies toward l = 35 deg at 1 kpc: X toward the Galactic centre, Y toward l = 90
    xc = 0.5 * (coords[0, 1:, 0] + coords[0, :-1, 0])
    yc = 0.5 * (coords[1:, 0, 1] + coords[:-1, 0, 1])
    j = np.argmin(np.abs(xc - np.cos(np.radians(35))))
    i = np.argmin(np.abs(yc - np.sin(np.radians(35))))
    lon = np.degrees(np.arctan2(yc[i], xc[j]))
    rho = np.hypot(xc[j], yc[i]) * 1000.0
    h = 100.0  # half the 200 pc distance step
    hi = model.av(lon * u.deg, 0 * u.deg, (rho + h) * u.pc)[0].to_value(u.mag)
    lo = model.av(lon * u.deg, 0 * u.deg, (rho - h) * u.pc)[0].to_value(u.mag)
    assert np.isclose(values[i, j], (hi - lo) / 0.2)
    sun = _line(ax, "dustkit-sun")
    assert sun.get_xdata()[0] == 0 and sun.get_ydata()[0] == 0
    assert "[kpc]" in ax.get_xlabel() and "Galactic centre" in ax.get_xlabel()
    assert "[kpc]" in ax.get_ylabel() and "90" in ax.get_ylabel()
    assert "mag/kpc" in mesh.colorbar.ax.get_ylabel()


def test_face_on_whole_disc_labels_not_clipped():
    table = simulate_tracers(DustField(), 300, distance_max=2000, rng=3)  # tracers all around the Sun
    model = ExtinctionModel(nside=4, distance_max=2000 * u.pc, distance_step=250 * u.pc, n_folds=3,
                            sky_passes=(0,), n_draws=8, quiet=True).fit(read_tracers(table))
    ax = plotting.plot_face_on(model)
    assert ax.get_xlim() == pytest.approx((-2.0, 2.0)) and ax.get_ylim() == pytest.approx((-2.0, 2.0))
    assert _texts_inside_figure(ax.figure) == []


def test_face_on_default_extent_covers_tracers_and_shades_uninformed(model):
    ax = plotting.plot_face_on(model)
    x0, x1 = ax.get_xlim()
    y0, y1 = ax.get_ylim()
    assert x0 < 0 < x1 and y0 < 0 < y1  # the Sun is in view
    assert x1 >= 2.5 and y1 >= 2.0  # the tracers at l = 20-50 deg out to 3 kpc
    assert _by_gid(ax, "dustkit-face-on-layer-only")
    assert _texts_inside_figure(ax.figure) == []


def test_face_on_legend_swatch_looks_like_the_shaded_cells(model):
    # the legend's "smooth layer only" swatch must look like the shaded cells on the drawn map (it
    # was a flat grey against a pale wash of the colour map): the rendered colour of shaded cells
    # (median over them) within 0.12 of the swatch in each of R, G, B (common practice: a legend
    # key shows what it names)
    ax = plotting.plot_face_on(model)
    fig = ax.figure
    fig.canvas.draw()
    rgb = np.asarray(fig.canvas.buffer_rgba())[..., :3] / 255.0
    swatch = next(h for h in ax.get_legend().get_patches() if "smooth layer only" in h.get_label())
    shade = _by_gid(ax, "dustkit-face-on-layer-only")[0]
    cells = np.asarray(shade.get_array()).reshape(-1)
    coords = shade.get_coordinates()  # (ny + 1, nx + 1, 2) cell corners in data units
    centres = 0.25 * (coords[:-1, :-1] + coords[1:, :-1] + coords[:-1, 1:] + coords[1:, 1:]).reshape(-1, 2)
    legend_box = ax.get_legend().get_window_extent()
    px = ax.transData.transform(centres[np.isfinite(cells) & ~np.ma.getmaskarray(cells)])
    px = px[~((px[:, 0] >= legend_box.x0) & (px[:, 0] <= legend_box.x1) & (px[:, 1] >= legend_box.y0)
               & (px[:, 1] <= legend_box.y1))]
    h = rgb.shape[0]
    seen = rgb[(h - px[:, 1]).astype(int).clip(0, h - 1), px[:, 0].astype(int).clip(0, rgb.shape[1] - 1)]
    assert len(seen) > 20
    np.testing.assert_allclose(np.median(seen, axis=0), np.asarray(swatch.get_facecolor()[:3]), atol=0.12)


# ----------------------------------------------------------------------------- laws

def test_plot_laws_one_line_per_law_within_its_range():
    names = ("ccm89", "odonnell94", "fitzpatrick99", "gordon23", "rieke85")
    ax = plotting.plot_laws(names)
    lines = [ln for ln in ax.lines if str(ln.get_gid()).startswith("dustkit-law-")]
    assert [ln.get_gid() for ln in lines] == [f"dustkit-law-{n}" for n in names]
    for name, line in zip(names, lines):
        lo, hi = get_law(name).wavelength_range.to_value(u.micron)
        x = line.get_xdata()
        assert x.min() >= max(lo, 0.3) - 1e-12 and x.max() <= min(hi, 3.0) + 1e-12
    # Rieke & Lebofsky 1985 starts at U (0.365 micron) and has a fixed R_V = 3.09
    assert lines[-1].get_xdata().min() == pytest.approx(0.365, abs=0.01)
    assert "3.09" in lines[-1].get_label()
    ccm = lines[0]
    # A_V / A_V = 1 at V (normalisation, CCM89); A(J)/A_V = 0.282 at 1.25 micron (CCM89 Table 3)
    assert np.interp(np.log(0.5495), np.log(ccm.get_xdata()), ccm.get_ydata()) == pytest.approx(1.0, abs=0.01)
    assert np.interp(np.log(1.25), np.log(ccm.get_xdata()), ccm.get_ydata()) == pytest.approx(0.282, abs=0.01)
    assert ax.get_xscale() == "log"
    assert "[$\\mu$m]" in ax.get_xlabel() and "A_\\lambda / A_V" in ax.get_ylabel()
    bands = [ln.get_gid() for ln in ax.lines if str(ln.get_gid()).startswith("dustkit-band-")]
    assert bands == [f"dustkit-band-{b}" for b in ("U", "B", "V", "R", "I", "J", "H", "Ks")]
    assert _texts_inside_figure(ax.figure) == []


def test_plot_laws_rv_out_of_a_laws_range():
    with pytest.raises(LawRangeError):
        plotting.plot_laws(("ccm89", "gordon23"), rv=2.1)  # gordon23 is valid for R_V 2.3-5.6
    ax = _fresh_axes()
    assert plotting.plot_laws("ccm89", rv=5.0, ax=ax) is ax
    assert len([ln for ln in ax.lines if str(ln.get_gid()).startswith("dustkit-law-")]) == 1


# ----------------------------------------------------------------------------- saving

def test_save_figure_png_pdf_atomic(tmp_path):
    ax = Figure(figsize=(3, 2), layout="constrained").add_subplot()
    ax.plot([0.3, 1.0, 3.0], [1.6, 0.4, 0.1])
    png = plotting.save_figure(ax.figure, tmp_path / "laws.png", dpi=72)
    pdf = plotting.save_figure(ax, tmp_path / "laws.pdf")
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948)
    assert pdf.read_bytes()[:5] == b"%PDF-"  # PDF header (ISO 32000)
    before = png.read_bytes()
    with pytest.raises(FileExistsError, match="overwrite=True"):
        plotting.save_figure(ax.figure, png)
    # a failed write leaves the old file intact and no temporary file behind
    with pytest.raises(Exception):
        plotting.save_figure(ax.figure, png, overwrite=True, metadata={"NoSuchKey": object()})
    assert png.read_bytes() == before
    assert sorted(os.listdir(tmp_path)) == ["laws.pdf", "laws.png"]
    plotting.save_figure(ax.figure, png, overwrite=True, dpi=50)  # replaced on request
    assert png.read_bytes() != before
    with pytest.raises(ParameterError, match="path"):
        plotting.save_figure(ax.figure, tmp_path / "laws.jpeg2000")
    with pytest.raises(FileNotFoundError, match="does not exist"):
        plotting.save_figure(ax.figure, tmp_path / "missing" / "laws.png")


def test_plotting_does_not_import_widgets():
    import subprocess
    import sys

    code = "import dustkit.plotting, sys; print('ipywidgets' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def test_saved_figure_has_ordinary_file_permissions(tmp_path):
    # a figure written through a temporary file must end up readable like any file the user
    # writes (umask-based permissions, common practice), not private to the writer
    import os
    import stat

    import matplotlib.pyplot as plt

    from dustkit.plotting import save_figure

    fig, ax = plt.subplots()
    ax.plot([0, 1], [0, 1])
    path = save_figure(fig, tmp_path / "f.png")
    mask = os.umask(0)
    os.umask(mask)
    assert stat.S_IMODE(os.stat(path).st_mode) == 0o666 & ~mask


def test_density_profile_shades_where_the_answer_is_the_prior_alone():
    # a 3-D density model knows where no tracer informs an answer: the profile shades those
    # distances, and only those, as the model's own support says (prior_only: support < 0.1)
    from dustkit.density import DensityModel

    table = simulate_tracers(FIELD, 300, l_range=(20, 50), b_range=(-8, 8), distance_max=3000, rng=3)
    near = np.asarray(table["distance"], float) > 600.0  # no tracer nearer than 600 pc: an empty foreground
    dens = DensityModel(quiet=True, amplitudes=(0.25,), lengths=[300] * u.pc).fit(read_tracers(table[near]))
    ax = plotting.plot_profile(dens, 32, 1)
    spans = _by_gid(ax, "dustkit-prior-only")
    assert spans, "no prior-only shading on a sight line with an empty foreground"
    prof = dens.profile(32 * u.deg, 1 * u.deg)
    d_kpc = prof["distance"].to_value(u.kpc)
    _, _, prior = dens.support(np.full(d_kpc.size, 32.0) * u.deg, np.ones(d_kpc.size) * u.deg, d_kpc * u.kpc)
    near_pc = (prof["distance"] > 50 * u.pc) & (prof["distance"] < 300 * u.pc)
    assert prior[near_pc].all() and not prior[-1]  # the empty foreground is the prior's; far behind, tracers
    x0 = min(float(s.get_x()) if hasattr(s, "get_x") else float(np.min(np.asarray(s.get_xy())[:, 0]))
             for s in spans)
    assert x0 == pytest.approx(0.0)
    labels = ax.get_legend_handles_labels()[1]
    assert labels.count("prior only (support < 0.1)") == 1



def test_binned_profile_has_no_prior_only_shading(model):
    # the binned model keeps no support flag: nothing is shaded
    assert not _by_gid(plotting.plot_profile(model, 32, 1), "dustkit-prior-only")
