"""Sky maps: extinction at a distance on the sky (plot_sky) and their helpers."""

import numpy as np
from astropy import units as u

from .._lib.validation import check_choice, check_real, param_error
from .common import COLORS, as_pc, column, fitted, lat_formatter, lon_formatter, new_axes, style_context

__all__ = ["auto_extent", "tracer_extent", "plot_sky", "sky_figsize", "sky_position"]


def auto_extent(model):
    """A rectangle around the model's tracers (padded), or 'all-sky' when they spread widely."""
    return tracer_extent(getattr(model, "tracers_", None))


def tracer_extent(tr):
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
    fitted(model)
    kind = check_choice("kind", kind, ("cumulative", "differential"))
    d_pc = float(check_real("distance", float(as_pc("distance", distance)), 0.0))
    if extent is None:
        extent = "all-sky" if (ax is not None and ax.name == "mollweide") else auto_extent(model)
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

    with style_context():
        ax = new_axes(ax, (9.0, 5.0) if mollweide else sky_figsize(extent),
                       projection="mollweide" if mollweide else None)
        if mollweide:
            # x = -l (radians, wrapped to [-pi, pi]) so that longitude increases to the left
            mesh = ax.pcolormesh(np.radians(-l_edges), np.radians(b_edges), values, cmap=cmap,
                                 vmin=lo, vmax=hi, shading="flat", rasterized=True)
            ax.xaxis.set_major_formatter(lambda x, pos=None: lon_formatter(-np.degrees(x)))
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
            ax.xaxis.set_major_formatter(lon_formatter)
            ax.yaxis.set_major_formatter(lat_formatter)
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
        handles, labels = ax.get_legend_handles_labels()
        if handles:  # what the symbols are: small, in a corner clear of the axis labels, out of the layout
            ax.legend(handles, labels, loc="lower right" if mollweide else "lower left", fontsize=7, frameon=True,
                      framealpha=0.85, borderpad=0.4, handlelength=1.5).set_in_layout(False)
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
    """A distance for a title or legend: three figures in kpc, whole pc below 1 kpc (3478.46 pc -> '3.48 kpc')."""
    return f"{d_pc / 1000.0:.3g} kpc" if d_pc >= 1000.0 else f"{d_pc:.0f} pc"


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
                       label=f"tracers beyond {_distance_text(d_pc)}", gid="dustkit-tracers-far")
    near_pts, = ax.plot(x[near], y[near], ls="none", marker="o", ms=2.8 * size, mfc="white", mec=COLORS["black"],
                        mew=0.4, label=f"tracers nearer than {_distance_text(d_pc)}", gid="dustkit-tracers-near")
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
    from matplotlib import patheffects

    cross = ax.plot([x0], [y0], ls="none", marker="+", ms=12, mew=2.0, color=COLORS["vermillion"], gid="dustkit-mark",
                    label="sight line")[0]
    cross.set_path_effects([patheffects.withStroke(linewidth=3.5, foreground="white")])
    cross.set_in_layout(False)
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
    fl = column(features, "l", u.deg)
    fb = column(features, "b", u.deg)
    fd = column(features, "distance", u.pc)
    fr = column(features, "extent", u.deg) if "extent" in names else np.full(fl.size, 0.5)
    # a 'nearer than' feature (density_features) has no distance, only an upper one
    up = column(features, "distance_upper", u.pc) if "distance_upper" in names else np.full(fl.size, np.nan)
    from matplotlib import patheffects

    t = np.linspace(0, 2 * np.pi, 91)
    label = "dust feature"
    for lm, bm, rad, d, d_up in zip(fl, fb, np.maximum(fr, 0.05), fd, up):
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
        # white rings edged in black, apart from the sight line's vermilion mark, seen on any colour of the map
        line, = ax.plot(xs, ys, color="white", lw=1.4, label=label, gid="dustkit-features")
        line.set_path_effects([patheffects.withStroke(linewidth=2.8, foreground=COLORS["black"])])
        line.set_in_layout(False)
        bound = not np.isfinite(d) and np.isfinite(d_up)
        d = d_up if bound else d
        text = ("< " if bound else "") + (f"{d / 1000:.2f} kpc" if d >= 1000 else f"{d:.0f} pc")
        txt = ax.annotate(text, (xt, yt), xytext=(0, 2), textcoords="offset points", ha="center",
                          va="bottom", fontsize=8, color=COLORS["black"])
        txt.set_path_effects([patheffects.withStroke(linewidth=2.5, foreground="white")])
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
