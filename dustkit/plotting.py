"""Publication-quality figures of extinction models (matplotlib only).

Every function takes ``ax=None`` and returns the axes it drew on, so figures can be
composed freely; when no axes are given a new figure is made with
``layout="constrained"`` (labels are never clipped). Axis labels carry units. Colours come
from the Okabe & Ito (2008) palette and perceptually uniform colour maps, which stay
readable for colour-blind readers and in greyscale print.

Functions
---------
plot_profile : cumulative A_V (or E(B-V), or A in a band) against distance for a sight line
plot_sky : A_V at a chosen distance (or differential extinction) on the sky
plot_face_on : face-on map of differential extinction near the Galactic mid-plane
plot_laws : A_lambda / A_V of several extinction laws with band positions marked
save_figure : write a figure to PNG/PDF/SVG atomically
sky_position : (l, b) of a point in data coordinates of a map drawn by :func:`plot_sky`

Notes
-----
Extinction estimates from a model are statistical: they describe the average dust toward
a direction and distance. Check them against local data before using them for science or
for planning instrument time.
"""

import os

import numpy as np
from astropy import units as u

from ._lib.sky import separation_deg
from ._lib.formats import atomic_write, check_target, format_for
from ._lib.validation import check_choice, check_real, param_error, to_value

__all__ = [
    "plot_profile",
    "plot_sky",
    "plot_face_on",
    "plot_laws",
    "save_figure",
    "sky_position",
    "sky_figsize",
    "quantity_label",
    "style_context",
    "settle_layout",
    "COLORS",
]

#: Okabe & Ito (2008) colour-blind-safe palette.
COLORS = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "purple": "#CC79A7",
    "grey": "#7F7F7F",
}

_STYLE = {
    "font.size": 10,
    "axes.labelsize": 11,
    "axes.titlesize": 11,
    "xtick.labelsize": 10,
    "ytick.labelsize": 10,
    "legend.fontsize": 9,
    "legend.frameon": False,
    "xtick.direction": "in",
    "ytick.direction": "in",
    "xtick.top": True,
    "ytick.right": True,
    "xtick.minor.visible": True,
    "ytick.minor.visible": True,
}

_LAW_STYLES = ("-", "--", "-.", ":", (0, (5, 1, 1, 1, 1, 1)))
_LAW_COLORS = ("black", "blue", "vermillion", "green", "purple", "orange", "sky_blue")


# ----------------------------------------------------------------------------- helpers

def style_context():
    """Context manager with dustkit's figure style (font sizes, ticks); use it to create axes.

    The plotting functions apply it to the figures they create; axes created by the caller
    inside this context get the same look.
    """
    import matplotlib

    return matplotlib.rc_context(_STYLE)


_rc = style_context


def _new_axes(ax, figsize, projection=None):
    """Return ``ax`` or new axes on a new constrained-layout figure."""
    if ax is not None:
        return ax
    import matplotlib.pyplot as plt

    fig = plt.figure(figsize=figsize, layout="constrained")
    return fig.add_subplot(projection=projection)


def _fitted(model):
    if not hasattr(model, "av_"):
        from .exceptions import ModelNotFittedError

        raise ModelNotFittedError(
            "This ExtinctionModel is not fitted yet. Call fit(tracers) first, or load a saved model."
        )
    return model


def _deg(name, value):
    return float(to_value(name, value, u.deg, default_unit=u.deg))


def _pc(name, value):
    return to_value(name, value, u.pc, default_unit=u.pc)


def _column(table, name, unit):
    """Values of a table column in ``unit`` (a bare column is taken to be in ``unit``)."""
    col = table[name]
    if isinstance(col, u.Quantity):
        return np.asarray(col.to_value(unit), float)
    cu = getattr(col, "unit", None)
    if cu is not None:
        return np.asarray((np.asarray(col, float) * u.Unit(cu)).to_value(unit), float)
    return np.asarray(col, float)


def _distance_scale(distance_unit, d_max_pc):
    """(factor from pc, unit name) for the distance axis; ``None`` picks kpc beyond 2 kpc."""
    if distance_unit is None:
        distance_unit = "kpc" if d_max_pc >= 2000.0 else "pc"
    unit = check_choice("distance_unit", str(distance_unit), ("pc", "kpc"))
    return (1e-3 if unit == "kpc" else 1.0), unit


def quantity_label(quantity="av", band=None):
    """Axis label (with unit) for ``'av'``, ``'ebv'`` or ``'band'`` (``band`` given)."""
    quantity, band = _check_quantity(quantity, band)
    if quantity == "av":
        return r"$A_V$ [mag]"
    if quantity == "ebv":
        return r"$E(B-V)$ [mag]"
    return rf"$A_{{\mathrm{{{_band_name(band)}}}}}$ [mag]"


def _band_name(band):
    from .bands import get_band

    return get_band(band).name if isinstance(band, str) else str(getattr(band, "name", band))


def _check_quantity(quantity, band):
    if band is not None and quantity == "av":
        quantity = "band"
    quantity = check_choice("quantity", quantity, ("av", "ebv", "band"))
    if quantity == "band" and band is None:
        raise param_error("band", "a band name such as 'J' or 'Ks' when quantity='band'", band)
    if quantity != "band" and band is not None:
        raise param_error("band", "None unless quantity='band'", band)
    return quantity, band


def _convert(av, av_err, quantity, band, law, rv):
    """A_V (mag arrays) -> the plotted quantity with the given law and R_V."""
    av = np.asarray(av, float)
    av_err = np.asarray(av_err, float)
    if quantity == "av":
        return av, av_err
    if quantity == "ebv":
        return av / rv, av_err / rv
    from .bands import av_to_band

    a, e = av_to_band(av, av_err, band, law=law, rv=rv)
    return np.asarray(a, float), np.asarray(e, float)


def _lon_formatter(x, pos=None):
    v = x % 360.0
    return f"{v:g}°" if abs(v - round(v)) > 1e-6 else f"{int(round(v)) % 360}°"


def _lat_formatter(x, pos=None):
    return f"{x:g}°"


# ----------------------------------------------------------------------------- profile

def plot_profile(
    model,
    l,
    b,
    radius=None,
    quantity="av",
    band=None,
    ax=None,
    show_tracers=True,
    show_layer=True,
    features=None,
    distance_unit=None,
):
    """Cumulative extinction against distance along a sight line or through a cone.

    Parameters
    ----------
    model : ExtinctionModel
        A fitted model.
    l, b : Quantity['angle'] or float (deg)
        Centre of the sight line (Galactic).
    radius : Quantity['angle'] or float (deg), optional
        Cone radius: the profile is averaged over the cone and the tracers inside it are
        shown. ``None`` (or 0) is a single sight line (tracers within one sky pixel shown).
    quantity : {'av', 'ebv', 'band'}
        Vertical axis: A_V, E(B-V) = A_V / R_V, or A in ``band`` (through
        :func:`dustkit.bands.av_to_band` with the model's law and R_V).
    band : str, optional
        Band name (see :func:`dustkit.bands.band_table`); implies ``quantity='band'``.
    ax : matplotlib Axes, optional
    show_tracers : bool
        Draw the tracers inside the cone with error bars in distance and extinction.
    show_layer : bool
        Draw the fitted smooth dust layer (dashed) for comparison.
    features : Table, optional
        Dust features to mark: columns ``distance`` (required), ``distance_err`` and
        ``delta_av`` (optional; Quantity or numbers in pc and mag).
    distance_unit : {'pc', 'kpc'}, optional
        Unit of the distance axis (default: kpc when the model reaches 2 kpc or more).

    Returns
    -------
    matplotlib.axes.Axes
        The profile line has gid ``'dustkit-profile'``, its band ``'dustkit-profile-band'``,
        the layer ``'dustkit-layer'``, the tracers ``'dustkit-tracers'``.
    """
    _fitted(model)
    quantity, band = _check_quantity(quantity, band)
    lv = _deg("l", l) % 360.0
    bv = _deg("b", b)
    rad = None
    if radius is not None:
        rad = check_real("radius", _deg("radius", radius), 0.0, 90.0)
        if rad == 0.0:
            rad = None
    prof = model.profile(lv * u.deg, bv * u.deg, radius=None if rad is None else rad * u.deg)
    law, rv = model.law, model.rv
    d_pc = prof["distance"].to_value(u.pc)
    scale, dunit = _distance_scale(distance_unit, float(d_pc[-1]))
    y, yerr = _convert(prof["av"].to_value(u.mag), prof["av_err"].to_value(u.mag), quantity, band, law, rv)
    ylay, _ = _convert(prof["av_layer"].to_value(u.mag), 0.0 * d_pc, quantity, band, law, rv)

    with _rc():
        ax = _new_axes(ax, (6.0, 4.2))
        x = d_pc * scale
        ax.fill_between(x, y - yerr, y + yerr, color=COLORS["sky_blue"], alpha=0.35, lw=0,
                        label=r"model $\pm1\sigma$", gid="dustkit-profile-band")
        ax.plot(x, y, color=COLORS["blue"], lw=2.0, label="model", gid="dustkit-profile")
        if show_layer:
            ax.plot(x, ylay, color=COLORS["black"], lw=1.3, ls="--", label="smooth layer", gid="dustkit-layer")
        n_shown = 0
        tr = prof.meta.get("tracers")
        if show_tracers and tr is not None and len(tr):
            td = _column(tr, "distance", u.pc)
            tde = _column(tr, "distance_err", u.pc)
            ta, tae = _convert(_column(tr, "av", u.mag), _column(tr, "av_err", u.mag), quantity, band, law, rv)
            n_shown = td.size
            eb = ax.errorbar(td * scale, ta, xerr=tde * scale, yerr=tae, fmt="o", ms=4, mfc=COLORS["orange"],
                             mec=COLORS["black"], mew=0.6, ecolor=COLORS["grey"], elinewidth=0.8, capsize=0,
                             zorder=3, label=f"tracers ({n_shown})")
            eb[0].set_gid("dustkit-tracers")
        if features is not None and len(features):
            _mark_features(ax, _features_near(features, lv, bv, max(rad or 0.0, model.grid_pixel_radius())),
                           scale, quantity, band, law, rv)
        ax.set_xlim(0.0, x[-1])
        ax.set_ylim(bottom=0.0)
        ax.set_xlabel(f"Distance [{dunit}]")
        ax.set_ylabel(quantity_label(quantity, band))
        where = f"$l$ = {lv:.2f}°, $b$ = {bv:+.2f}°"
        where += f", cone radius {rad:g}°" if rad else ", single sight line"
        where += f" ({law}, $R_V$ = {rv:g})"
        ax.set_title(where, fontsize="medium")
        ax.legend(loc="lower right")
    return ax


def _features_near(features, lon, lat, radius):
    """Features within ``radius`` deg of (lon, lat) when the table has ``l``/``b`` columns."""
    if "l" not in features.colnames or "b" not in features.colnames:
        return features

    sep = separation_deg(_column(features, "l", u.deg), _column(features, "b", u.deg), lon, lat)
    return features[sep <= radius]


def _mark_features(ax, features, scale, quantity, band, law, rv):
    """Vertical markers at feature distances, shaded by their distance uncertainty."""
    if len(features) == 0:
        return
    names = features.colnames
    if "distance" not in names:
        raise param_error("features", "a table with a 'distance' column", names)
    fd = _column(features, "distance", u.pc)
    fde = _column(features, "distance_err", u.pc) if "distance_err" in names else np.zeros_like(fd)
    jump = None
    if "delta_av" in names:
        dav = _column(features, "delta_av", u.mag)
        jump, _ = _convert(dav, np.zeros_like(dav), quantity, band, law, rv)
    label = "dust feature"
    sym = {"av": r"\Delta A_V", "ebv": r"\Delta E(B-V)"}.get(quantity, r"\Delta A")
    for i, d in enumerate(fd):
        ax.axvline(d * scale, color=COLORS["vermillion"], lw=1.2, ls="-.", zorder=2, label=label, gid="dustkit-feature")
        if fde[i] > 0:
            ax.axvspan((d - fde[i]) * scale, (d + fde[i]) * scale, color=COLORS["vermillion"], alpha=0.12, lw=0)
        if jump is not None and np.isfinite(jump[i]):
            ax.annotate(f"${sym}$ = {jump[i]:.2f}", xy=(d * scale, 0.97), xycoords=ax.get_xaxis_transform(),
                        xytext=(3, 0), textcoords="offset points", rotation=90, va="top", ha="left",
                        fontsize=8, color=COLORS["vermillion"])
        label = None


# ----------------------------------------------------------------------------- sky maps

def _auto_extent(model):
    """A rectangle around the model's tracers (padded), or 'all-sky' when they spread widely."""
    return _tracer_extent(getattr(model, "tracers_", None))


def _tracer_extent(tr):
    """A rectangle (l_min, l_max, b_min, b_max) around the tracers, padded; 'all-sky' if wide."""
    if tr is None or len(tr) == 0:
        return "all-sky"
    lon = np.asarray(tr.l, float)
    lat = np.asarray(tr.b, float)
    # centre longitudes on their circular mean so regions across l = 0 stay contiguous
    c = np.degrees(np.arctan2(np.sin(np.radians(lon)).mean(), np.cos(np.radians(lon)).mean()))
    rel = (lon - c + 180.0) % 360.0 - 180.0
    lo, hi = rel.min(), rel.max()
    if hi - lo > 200.0 or lat.max() - lat.min() > 120.0:
        return "all-sky"
    pad_l = max(2.0, 0.05 * (hi - lo))
    pad_b = max(2.0, 0.05 * (lat.max() - lat.min()))
    l_min = np.floor(c + lo - pad_l)
    l_max = np.ceil(c + hi + pad_l)
    shift = l_min - l_min % 360.0  # start in [0, 360); the end may pass 360 when crossing l = 0
    l_min, l_max = l_min - shift, l_max - shift
    return (float(l_min), float(l_max), float(max(-90.0, np.floor(lat.min() - pad_b))),
            float(min(90.0, np.ceil(lat.max() + pad_b))))


def _check_extent(extent):
    if isinstance(extent, str):
        key = check_choice("extent", extent, ("all-sky",))
        return key
    try:
        l_min, l_max, b_min, b_max = (float(v) for v in extent)
    except (TypeError, ValueError):
        raise param_error("extent", "None, 'all-sky' or (l_min, l_max, b_min, b_max) in deg", extent) from None
    if not (-90.0 <= b_min < b_max <= 90.0):
        raise param_error("extent", "a rectangle with -90 <= b_min < b_max <= 90 deg", extent)
    width = (l_max - l_min) % 360.0 or 360.0
    return (l_min, l_min + width, b_min, b_max)


def _sky_values(model, lon, lat, d_pc, kind):
    """A_V (mag) or differential extinction (mag/kpc) at the given positions and distance."""
    if kind == "cumulative":
        a, _ = model.av(lon * u.deg, lat * u.deg, np.full(lon.shape, d_pc) * u.pc)
        return a.to_value(u.mag)
    e = model.grid_.distance_edges
    k = int(np.clip(np.searchsorted(e, d_pc, side="right") - 1, 0, e.size - 2))
    near, _ = model.av(lon * u.deg, lat * u.deg, np.full(lon.shape, e[k]) * u.pc)
    far, _ = model.av(lon * u.deg, lat * u.deg, np.full(lon.shape, e[k + 1]) * u.pc)
    return (far - near).to_value(u.mag) / ((e[k + 1] - e[k]) / 1000.0)


def plot_sky(
    model,
    distance,
    ax=None,
    kind="cumulative",
    extent=None,
    show_tracers=True,
    cmap="viridis",
    vmin=None,
    vmax=None,
    mark=None,
    resolution=None,
    features=None,
):
    """Map of extinction on the sky at one distance.

    Parameters
    ----------
    model : ExtinctionModel
        A fitted model.
    distance : Quantity['length'] or float (pc)
    ax : matplotlib Axes, optional
        Rectilinear axes give a Galactic rectangular map; ``'mollweide'`` axes a full-sky map.
    kind : {'cumulative', 'differential'}
        A_V out to ``distance`` (mag), or the extinction added per kpc in the model's
        distance bin containing ``distance`` (mag/kpc).
    extent : None, 'all-sky' or (l_min, l_max, b_min, b_max) in deg
        ``None`` zooms onto the tracers (or the whole sky when they spread over it). A
        rectangle may cross l = 0, e.g. (350, 20, -10, 10). Longitude increases to the left.
    show_tracers : bool
        Overplot the tracers: filled circles nearer than ``distance``, small grey dots beyond.
    cmap : str or Colormap
        Colour map (perceptually uniform and colour-blind safe by default).
    vmin, vmax : float, optional
        Colour limits (default 0 and the 99.5th percentile of the map).
    mark : (l, b) or (l, b, radius), optional
        Mark a sight line (a cross, and a circle of the cone radius), in deg.
    resolution : float, optional
        Grid step of the map in deg (default: a quarter of a model pixel, at most 600
        columns).
    features : Table, optional
        Dust features (:func:`dustkit.features.detect_features`) to draw as a layer: a
        circle of each feature's ``extent`` around its ``l``, ``b``, labelled with its
        ``distance`` (gid ``'dustkit-features'``).

    Returns
    -------
    matplotlib.axes.Axes
        The map is ``ax.collections[0]`` (gid ``'dustkit-sky'``) and carries the colour bar.
    """
    _fitted(model)
    kind = check_choice("kind", kind, ("cumulative", "differential"))
    d_pc = float(check_real("distance", float(_pc("distance", distance)), 0.0))
    if extent is None:
        extent = "all-sky" if (ax is not None and ax.name == "mollweide") else _auto_extent(model)
    extent = _check_extent(extent)
    mollweide = extent == "all-sky" and (ax is None or ax.name == "mollweide")
    if ax is not None and ax.name == "mollweide" and extent != "all-sky":
        raise param_error("extent", "'all-sky' (or None) on Mollweide axes", extent)
    if extent == "all-sky":
        extent = (-180.0, 180.0, -90.0, 90.0)
    l_min, l_max, b_min, b_max = extent

    step = resolution
    if step is None:
        step = max(model.grid_pixel_radius() / 6.0, (l_max - l_min) / 600.0, (b_max - b_min) / 400.0)
    step = check_real("resolution", float(step), 0.0, 90.0, low_inclusive=False)
    n_l = max(int(np.ceil((l_max - l_min) / step)), 8)
    n_b = max(int(np.ceil((b_max - b_min) / step)), 4)
    l_edges = np.linspace(l_min, l_max, n_l + 1)
    b_edges = np.linspace(b_min, b_max, n_b + 1)
    lc = 0.5 * (l_edges[1:] + l_edges[:-1])
    bc = 0.5 * (b_edges[1:] + b_edges[:-1])
    L, B = np.meshgrid(lc, bc)
    values = _sky_values(model, L.ravel() % 360.0, B.ravel(), d_pc, kind).reshape(L.shape)
    lo = 0.0 if vmin is None else float(vmin)
    hi = float(np.nanpercentile(values, 99.5)) if vmax is None else float(vmax)
    if not hi > lo:
        hi = lo + (0.1 if kind == "cumulative" else 0.5)
    if kind == "cumulative":
        clabel = r"$A_V$ [mag]"
    else:
        clabel = r"$\mathrm{d}A_V/\mathrm{d}d$ [mag/kpc]"

    with _rc():
        ax = _new_axes(ax, (9.0, 5.0) if mollweide else sky_figsize(extent),
                       projection="mollweide" if mollweide else None)
        if mollweide:
            # x = -l (radians, wrapped to [-pi, pi]) so that longitude increases to the left
            mesh = ax.pcolormesh(np.radians(-l_edges), np.radians(b_edges), values, cmap=cmap,
                                 vmin=lo, vmax=hi, shading="flat", rasterized=True)
            ax.xaxis.set_major_formatter(lambda x, pos=None: _lon_formatter(-np.degrees(x)))
            ax.grid(True, color="white", alpha=0.4, lw=0.5)
            from matplotlib import patheffects

            halo = [patheffects.withStroke(linewidth=2.5, foreground="white")]
            for lab in ax.get_xticklabels():
                lab.set_path_effects(halo)
                lab.set_fontsize(8)
        else:
            mesh = ax.pcolormesh(l_edges, b_edges, values, cmap=cmap, vmin=lo, vmax=hi,
                                 shading="flat", rasterized=True)
            ax.set_xlim(l_max, l_min)
            ax.set_ylim(b_min, b_max)
            ax.set_aspect("equal")
            ax.xaxis.set_major_formatter(_lon_formatter)
            ax.yaxis.set_major_formatter(_lat_formatter)
            ax.minorticks_off()
        mesh.set_gid("dustkit-sky")
        ax.set_xlabel("Galactic longitude $l$")
        ax.set_ylabel("Galactic latitude $b$")
        what = "$A_V$" if kind == "cumulative" else "Differential extinction"
        if kind == "cumulative":
            ax.set_title(f"{what} to {_distance_text(d_pc)}", pad=14 if mollweide else 6)
        else:
            e = model.grid_.distance_edges
            k = int(np.clip(np.searchsorted(e, d_pc, side="right") - 1, 0, e.size - 2))
            ax.set_title(f"{what}, {_distance_text(e[k])} to {_distance_text(e[k + 1])}", pad=14 if mollweide else 6)
        if show_tracers and getattr(model, "tracers_", None) is not None:
            _sky_tracers(ax, model.tracers_, d_pc, mollweide, (l_min, l_max, b_min, b_max))
        if mark is not None:
            _mark_sight_line(ax, mark, mollweide, l_min)
        if features is not None and len(features):
            _sky_features(ax, features, mollweide, l_min)
        fig = ax.figure
        fig.colorbar(mesh, ax=ax, label=clabel, shrink=0.9 if mollweide else 1.0,
                     orientation="horizontal" if mollweide else "vertical",
                     fraction=0.05 if mollweide else 0.04, pad=0.04)
    return ax


def sky_figsize(extent, width=7.5):
    """Figure size (inches) that fits a rectangular :func:`plot_sky` map of ``extent`` snugly.

    The map keeps equal degrees on both axes; the size leaves room for the labels, the
    title and the colour bar so the colour bar is as tall as the map.
    """
    l_min, l_max, b_min, b_max = _check_extent(extent)
    ratio = float(np.clip((b_max - b_min) / max(l_max - l_min, 1e-6), 0.15, 2.0))
    map_width = width - 2.0  # room for latitude labels and the colour bar
    return (width, float(np.clip(map_width * ratio + 1.0, 2.5, 9.0)))


def _distance_text(d_pc):
    return f"{d_pc / 1000.0:g} kpc" if d_pc >= 1000.0 else f"{d_pc:g} pc"


def _unwrap_into(lon, l_min):
    """Longitudes moved into [l_min, l_min + 360)."""
    return l_min + (np.asarray(lon, float) - l_min) % 360.0


def _sky_tracers(ax, tracers, d_pc, mollweide, extent):
    lon = np.asarray(tracers.l, float)
    lat = np.asarray(tracers.b, float)
    near = np.asarray(tracers.distance, float) <= d_pc
    if mollweide:
        x = np.radians(-((lon + 180.0) % 360.0 - 180.0))
        y = np.radians(lat)
    else:
        x = _unwrap_into(lon, extent[0])
        y = lat
    size = 0.6 if mollweide else 1.0
    far_pts, = ax.plot(x[~near], y[~near], ls="none", marker=".", ms=2.0 * size, color=COLORS["grey"], alpha=0.6,
                       label="tracers beyond", gid="dustkit-tracers-far")
    near_pts, = ax.plot(x[near], y[near], ls="none", marker="o", ms=2.8 * size, mfc="white", mec=COLORS["black"],
                        mew=0.4, label="tracers nearer", gid="dustkit-tracers-near")
    for pts in (far_pts, near_pts):  # points outside the map must not push the layout around
        pts.set_in_layout(False)


def _mark_sight_line(ax, mark, mollweide, l_min):
    vals = [float(v) for v in mark]
    if len(vals) not in (2, 3):
        raise param_error("mark", "(l, b) or (l, b, radius) in deg", mark)
    lm, bm = vals[0], vals[1]
    rad = vals[2] if len(vals) == 3 else 0.0
    if mollweide:
        x0 = np.radians(-((lm + 180.0) % 360.0 - 180.0))
        y0 = np.radians(bm)
    else:
        x0, y0 = float(_unwrap_into(lm, l_min)), bm
    ax.plot([x0], [y0], ls="none", marker="+", ms=12, mew=2.0, color=COLORS["vermillion"], gid="dustkit-mark")[0] \
        .set_in_layout(False)
    if rad > 0:
        t = np.linspace(0, 2 * np.pi, 181)
        # a small circle of angular radius ``rad`` around (lm, bm) on the sphere
        bb = np.degrees(np.arcsin(np.clip(np.sin(np.radians(bm)) * np.cos(np.radians(rad))
                                          + np.cos(np.radians(bm)) * np.sin(np.radians(rad)) * np.cos(t), -1, 1)))
        dl = np.degrees(np.arctan2(np.sin(t) * np.sin(np.radians(rad)) * np.cos(np.radians(bm)),
                                   np.cos(np.radians(rad)) - np.sin(np.radians(bm)) * np.sin(np.radians(bb))))
        ll = lm + dl
        if mollweide:
            xs, ys = np.radians(-((ll + 180.0) % 360.0 - 180.0)), np.radians(bb)
        else:
            xs, ys = x0 + dl, bb
        ax.plot(xs, ys, color=COLORS["vermillion"], lw=1.5, gid="dustkit-mark-cone")[0].set_in_layout(False)


def _sky_features(ax, features, mollweide, l_min):
    """Feature layer: a circle of each feature's extent, its distance written beside it."""
    names = features.colnames
    for col in ("l", "b", "distance"):
        if col not in names:
            raise param_error("features", "a table with 'l', 'b' and 'distance' columns", names)
    fl = _column(features, "l", u.deg)
    fb = _column(features, "b", u.deg)
    fd = _column(features, "distance", u.pc)
    fr = _column(features, "extent", u.deg) if "extent" in names else np.full(fl.size, 0.5)
    t = np.linspace(0, 2 * np.pi, 91)
    label = "dust feature"
    for lm, bm, rad, d in zip(fl, fb, np.maximum(fr, 0.05), fd):
        sb, cb = np.sin(np.radians(bm)), np.cos(np.radians(bm))
        sr, cr = np.sin(np.radians(rad)), np.cos(np.radians(rad))
        bb = np.degrees(np.arcsin(np.clip(sb * cr + cb * sr * np.cos(t), -1, 1)))
        dl = np.degrees(np.arctan2(np.sin(t) * sr * cb, cr - sb * np.sin(np.radians(bb))))
        if mollweide:
            xs, ys = np.radians(-((lm + dl + 180.0) % 360.0 - 180.0)), np.radians(bb)
            xt, yt = np.radians(-((lm + 180.0) % 360.0 - 180.0)), np.radians(min(bm + rad, 89.0))
        else:
            x0 = float(_unwrap_into(lm, l_min))
            xs, ys, xt, yt = x0 + dl, bb, x0, bm + rad
        line, = ax.plot(xs, ys, color=COLORS["vermillion"], lw=1.4, label=label, gid="dustkit-features")
        line.set_in_layout(False)
        text = f"{d / 1000:.2f} kpc" if d >= 1000 else f"{d:.0f} pc"
        txt = ax.annotate(text, (xt, yt), xytext=(0, 2), textcoords="offset points", ha="center",
                          va="bottom", fontsize=7, color=COLORS["vermillion"])
        txt.set_in_layout(False)
        label = None


def sky_position(ax, x, y):
    """Galactic (l, b) in deg of a point given in the data coordinates of a :func:`plot_sky` map.

    Works for both the rectangular maps (x = l, y = b in deg) and the Mollweide maps
    (x = -l, y = b in radians).
    """
    x = float(x)
    y = float(y)
    if ax.name == "mollweide":
        return (-np.degrees(x)) % 360.0, float(np.degrees(y))
    return x % 360.0, y


# ----------------------------------------------------------------------------- face-on map

def plot_face_on(
    model,
    ax=None,
    z_max=50 * u.pc,
    extent=None,
    show_tracers=True,
    cmap="magma_r",
    vmax=None,
    resolution=None,
):
    """Face-on map of differential extinction near the Galactic mid-plane.

    Heliocentric Cartesian coordinates: X toward the Galactic centre (l = 0), Y toward
    l = 90 deg, in kpc; the Sun at the origin.

    Parameters
    ----------
    model : ExtinctionModel
    ax : matplotlib Axes, optional
    z_max : Quantity['length'] or float (pc)
        The map averages dA_V/dd over heights -z_max..+z_max from the Sun's plane (5 levels).
    extent : (x_min, x_max, y_min, y_max) in kpc, optional
        Default: the area covered by the tracers (padded), or the whole disc out to the
        model's last distance when they spread over the sky.
    show_tracers : bool
        Overplot the tracers that lie within ``z_max`` of the Sun's plane.
    cmap : str or Colormap
    vmax : float, optional
        Upper colour limit in mag/kpc (default: 99th percentile).
    resolution : float, optional
        Grid step in kpc (default: 1/250 of the larger side).

    Returns
    -------
    matplotlib.axes.Axes
    """
    _fitted(model)
    zmax = float(check_real("z_max", float(_pc("z_max", z_max)), 0.0))
    e = model.grid_.distance_edges
    r_max = float(e[-1])
    if extent is None:
        extent = _auto_face_extent(model, r_max)
    try:
        x_min, x_max, y_min, y_max = (float(v) for v in extent)
    except (TypeError, ValueError):
        raise param_error("extent", "(x_min, x_max, y_min, y_max) in kpc", extent) from None
    if not (x_max > x_min and y_max > y_min):
        raise param_error("extent", "a rectangle with x_min < x_max and y_min < y_max (kpc)", extent)
    step = resolution if resolution is not None else max(x_max - x_min, y_max - y_min) / 250.0
    step = check_real("resolution", float(step), 0.0, np.inf, low_inclusive=False)
    xe = np.arange(x_min, x_max + 0.5 * step, step)
    ye = np.arange(y_min, y_max + 0.5 * step, step)
    X, Y = np.meshgrid(0.5 * (xe[1:] + xe[:-1]), 0.5 * (ye[1:] + ye[:-1]))
    rho = np.hypot(X, Y).ravel() * 1000.0  # pc
    lon = np.degrees(np.arctan2(Y.ravel(), X.ravel())) % 360.0
    h = 0.5 * float(np.min(np.diff(e)))  # finite-difference half step (pc)
    inside = (rho > h) & (rho < r_max - h)
    total = np.zeros(rho.size)
    levels = np.linspace(-zmax, zmax, 5) if zmax > 0 else np.array([0.0])
    ri, li = rho[inside], lon[inside]
    for z in levels:  # a handful of heights, each vectorised over the whole map
        b = np.degrees(np.arctan2(z, ri))
        d = np.hypot(ri, z)
        hi, _ = model.av(li * u.deg, b * u.deg, (d + h) * u.pc)
        lo, _ = model.av(li * u.deg, b * u.deg, (d - h) * u.pc)
        total[inside] += (hi - lo).to_value(u.mag) / (2 * h / 1000.0)
    values = np.where(inside, total / levels.size, np.nan).reshape(X.shape)
    # where no tracer reaches, the model is the smooth layer alone: shade it so it is not
    # mistaken for a measurement
    reach = _tracer_reach(model)
    pix = model.grid_.pixel(lon, np.zeros_like(lon))
    uninformed = (inside & (rho > reach[pix])).reshape(X.shape)
    top = float(np.nanpercentile(values, 99.0)) if vmax is None else float(vmax)
    if not top > 0:
        top = 1.0

    with _rc():
        ax = _new_axes(ax, (6.0, 5.2))
        mesh = ax.pcolormesh(xe, ye, values, cmap=cmap, vmin=0.0, vmax=top, shading="flat", rasterized=True)
        mesh.set_gid("dustkit-face-on")
        if uninformed.any():
            from matplotlib.colors import ListedColormap
            from matplotlib.patches import Patch

            ax.pcolormesh(xe, ye, np.where(uninformed, 1.0, np.nan), cmap=ListedColormap(["white"]),
                          alpha=0.6, shading="flat", rasterized=True, gid="dustkit-face-on-layer-only")
            layer_patch = Patch(facecolor="0.75", edgecolor="none", label="no tracers: smooth layer only")
        else:
            layer_patch = None
        if show_tracers and getattr(model, "tracers_", None) is not None:
            tr = model.tracers_
            d = np.asarray(tr.distance, float)
            bb = np.radians(np.asarray(tr.b, float))
            ll = np.radians(np.asarray(tr.l, float))
            near_plane = np.abs(d * np.sin(bb)) <= max(zmax, 1.0)
            xt = d * np.cos(bb) * np.cos(ll) / 1000.0
            yt = d * np.cos(bb) * np.sin(ll) / 1000.0
            pts, = ax.plot(xt[near_plane], yt[near_plane], ls="none", marker="o", ms=2.5, mfc="white",
                           mec=COLORS["black"], mew=0.4, label=f"tracers within {zmax:g} pc of the plane",
                           gid="dustkit-tracers")
            pts.set_in_layout(False)  # tracers beyond the map must not push the layout around
        ax.plot([0], [0], ls="none", marker="o", ms=9, mfc="white", mec="black", mew=1.2, zorder=5)
        ax.plot([0], [0], ls="none", marker=".", ms=4, color="black", zorder=6, gid="dustkit-sun")
        from matplotlib import patheffects

        sun = ax.annotate("Sun", (0, 0), xytext=(7, -12), textcoords="offset points", fontsize=9)
        sun.set_path_effects([patheffects.withStroke(linewidth=2.5, foreground="white")])
        sun.set_in_layout(False)
        ax.set_xlim(x_min, x_max)
        ax.set_ylim(y_min, y_max)
        ax.set_aspect("equal")
        ax.minorticks_off()
        ax.set_xlabel("$X$ (toward Galactic centre) [kpc]")
        ax.set_ylabel("$Y$ (toward $l$ = 90°) [kpc]")
        ax.set_title(f"Differential extinction, |z| ≤ {zmax:g} pc")
        ax.figure.colorbar(mesh, ax=ax, label=r"$\mathrm{d}A_V/\mathrm{d}d$ [mag/kpc]", fraction=0.05, pad=0.03)
        handles, _ = ax.get_legend_handles_labels()
        if layer_patch is not None:
            handles.append(layer_patch)
        if handles:
            # inside the map: kept out of the layout, which otherwise fights the equal aspect
            ax.legend(handles=handles, loc="upper left", markerscale=1.5, frameon=True,
                      framealpha=0.85).set_in_layout(False)
    return ax


def _tracer_reach(model):
    """Per pixel, the farthest distance edge (pc) informed by tracers (-1 where none)."""
    informed = np.asarray(model.n_tracers_) >= 0.1
    e = model.grid_.distance_edges
    last = informed.shape[1] - 1 - np.argmax(informed[:, ::-1], axis=1)
    return np.where(informed.any(axis=1), e[last], -1.0)


def _auto_face_extent(model, r_max_pc):
    r = r_max_pc / 1000.0
    tr = getattr(model, "tracers_", None)
    ext = _auto_extent(model) if tr is not None else "all-sky"
    if ext == "all-sky":
        return (-r, r, -r, r)
    l_min, l_max = ext[0], ext[1]
    ang = np.radians(np.linspace(l_min, l_max, 91))
    xs = np.concatenate([[0.0], r * np.cos(ang)])
    ys = np.concatenate([[0.0], r * np.sin(ang)])
    pad = 0.05 * r
    return (float(xs.min() - pad), float(xs.max() + pad), float(ys.min() - pad), float(ys.max() + pad))


# ----------------------------------------------------------------------------- laws

def plot_laws(
    laws=("ccm89", "odonnell94", "fitzpatrick99", "gordon23"),
    rv=3.1,
    ax=None,
    bands=("U", "B", "V", "R", "I", "J", "H", "Ks"),
    wavelength_range=(0.3, 3.0) * u.micron,
):
    """A_lambda / A_V of several extinction laws over the optical and near-infrared.

    Each law is drawn only inside its own valid wavelength range; a law with a fixed
    R_V (e.g. ``'rieke85'``) is drawn at that R_V and says so in the legend.

    Parameters
    ----------
    laws : sequence of str
        Law names from :data:`dustkit.laws.LAWS`.
    rv : float
        R_V for the R_V-dependent laws (must lie in each law's range).
    ax : matplotlib Axes, optional
    bands : sequence of str
        Bands whose effective wavelengths are marked (dotted lines, named along the top).
    wavelength_range : Quantity['length']
        Plotted range (default 0.3-3 micron), log axis.

    Returns
    -------
    matplotlib.axes.Axes
        One line per law (gid ``'dustkit-law-<name>'``).
    """
    from .bands import get_band
    from .laws import get_law

    lam_lo, lam_hi = (float(v) for v in to_value("wavelength_range", wavelength_range, u.micron))
    if not 0 < lam_lo < lam_hi:
        raise param_error("wavelength_range", "two increasing positive wavelengths", wavelength_range)
    if isinstance(laws, str):
        laws = (laws,)
    with _rc():
        ax = _new_axes(ax, (6.0, 4.2))
        for i, name in enumerate(laws):
            law = get_law(name)
            w_lo, w_hi = (float(v) for v in law.wavelength_range.to_value(u.micron))
            lo, hi = max(lam_lo, w_lo), min(lam_hi, w_hi)
            if not lo < hi:
                continue
            law_rv = law.rv_range[0] if law.rv_fixed else rv
            lam = np.geomspace(lo, hi, 400)
            y = np.asarray(law.a_over_av(lam * u.micron, rv=law_rv), float)
            label = f"{_law_title(law)}" + (f", fixed $R_V$ = {law_rv:g}" if law.rv_fixed else "")
            ax.plot(lam, y, color=COLORS[_LAW_COLORS[i % len(_LAW_COLORS)]], ls=_LAW_STYLES[i % len(_LAW_STYLES)],
                    lw=1.6, label=label, gid=f"dustkit-law-{law.name}")
        ax.set_xscale("log")
        ax.set_xlim(lam_lo, lam_hi)
        ax.set_ylim(bottom=0.0)
        from matplotlib.ticker import FuncFormatter, LogLocator

        ax.xaxis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 3.0, 5.0)))
        ax.xaxis.set_major_formatter(FuncFormatter(lambda x, pos=None: f"{x:g}"))
        ax.xaxis.set_minor_formatter(FuncFormatter(lambda x, pos=None: ""))
        trans = ax.get_xaxis_transform()
        for name in bands:
            band = get_band(name)
            w = float(band.wavelength.to_value(u.micron))
            if lam_lo <= w <= lam_hi:
                ax.axvline(w, color=COLORS["grey"], lw=0.8, ls=":", zorder=0, gid=f"dustkit-band-{band.name}")
                ax.text(w, 1.01, band.name, transform=trans, ha="center", va="bottom", fontsize=9,
                        color="0.3")
        ax.set_xlabel(r"Wavelength $\lambda$ [$\mu$m]")
        ax.set_ylabel(r"$A_\lambda / A_V$")
        ax.set_title(f"Extinction laws, $R_V$ = {rv:g}", pad=16)
        ax.legend(loc="upper right")
    return ax


def _law_title(law):
    title = getattr(law, "title", None) or getattr(law, "citation", None) or law.name
    return str(title)


# ----------------------------------------------------------------------------- saving



def settle_layout(fig, passes=2):
    """Run the constrained layout a few times so it settles before a figure is written.

    The layout depends on the tick labels, which depend on the layout; with equal-aspect
    maps one pass can leave a label partly outside the figure. Extra passes fix that.
    """
    for _ in range(passes):
        fig.draw_without_rendering()
    return fig


def save_figure(fig, path, overwrite=False, dpi=300, **savefig_kwargs):
    """Write a figure to a file atomically (temporary file in the same folder, then rename).

    Parameters
    ----------
    fig : matplotlib Figure (or Axes, whose figure is saved)
    path : str or path-like
        Output file; the format comes from the suffix (``.png``, ``.pdf``, ``.svg``, ``.eps``).
    overwrite : bool
        Replace an existing file. A failed write leaves any existing file untouched.
    dpi : int
        Resolution for raster output (300 suits print).
    **savefig_kwargs
        Passed to ``Figure.savefig``.

    Returns
    -------
    pathlib.Path
        The path written.
    """
    import pathlib

    fig = getattr(fig, "figure", fig) if not hasattr(fig, "savefig") else fig
    path = pathlib.Path(os.fspath(path)).expanduser()
    fmt = format_for(path, "figure")  # FileFormatError (a ParameterError) lists the suffixes
    check_target(path, overwrite)  # OutputFolderError / OutputExistsError before the layout work
    settle_layout(fig)
    atomic_write(path, lambda tmp: fig.savefig(tmp, format=fmt, dpi=dpi, **savefig_kwargs), overwrite,
                 what="figure")
    return path
