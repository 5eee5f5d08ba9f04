"""Face-on maps: differential extinction near the Galactic mid-plane (plot_face_on)."""

import numpy as np
from astropy import units as u

from .._lib.validation import check_real, param_error
from .common import COLORS, as_pc, fitted, new_axes, style_context
from .sky import auto_extent

__all__ = ["plot_face_on"]


def plot_face_on(
    model,
    ax=None,
    z_max=50 * u.pc,
    extent=None,
    show_tracers=True,
    cmap="magma_r",
    vmax=None,
    resolution=None,
    features=None,
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
    features : Table, optional
        Dust features (:func:`dustkit.features.density_features` or ``detect_features``) to
        label: located ones as a marker with their distance error along the sight line
        (gid ``'dustkit-face-feature'``), ``'nearer than'`` ones as a dotted line from the Sun
        to their upper distance (gid ``'dustkit-face-feature-nearer'``).

    Returns
    -------
    matplotlib.axes.Axes
    """
    fitted(model)
    zmax = float(check_real("z_max", float(as_pc("z_max", z_max)), 0.0))
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

    with style_context():
        ax = new_axes(ax, (6.0, 5.2))
        mesh = ax.pcolormesh(xe, ye, values, cmap=cmap, vmin=0.0, vmax=top, shading="flat", rasterized=True)
        mesh.set_gid("dustkit-face-on")
        if uninformed.any():
            from matplotlib.colors import ListedColormap
            from matplotlib.patches import Patch

            ax.pcolormesh(xe, ye, np.where(uninformed, 1.0, np.nan), cmap=ListedColormap(["white"]),
                          alpha=0.6, shading="flat", rasterized=True, gid="dustkit-face-on-layer-only")
            # the legend swatch as the map shows such cells: their typical colour under the white wash
            typical = np.nanmedian(np.where(uninformed, values, np.nan)) if np.isfinite(values[uninformed]).any() else 0.5 * top
            wash = 0.4 * np.asarray(mesh.cmap(mesh.norm(typical))[:3]) + 0.6
            layer_patch = Patch(facecolor=tuple(wash), edgecolor="0.5", lw=0.5, label="no tracers: smooth layer only")
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
        if features is not None and len(features):
            _face_features(ax, features)
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


def _face_features(ax, features):
    """Features on the face-on map: marker + distance error along the sight line, or a bound."""
    from .common import column

    names = features.colnames
    for col in ("l", "b", "distance"):
        if col not in names:
            raise param_error("features", "a table with 'l', 'b' and 'distance' columns", names)
    ll, bb = np.radians(column(features, "l", u.deg)), np.radians(column(features, "b", u.deg))
    d = column(features, "distance", u.pc)
    de = column(features, "distance_err", u.pc) if "distance_err" in names else np.zeros(d.size)
    up = column(features, "distance_upper", u.pc) if "distance_upper" in names else np.full(d.size, np.nan)
    ids = np.asarray(features["feature"]) if "feature" in names else np.arange(1, d.size + 1)
    ux, uy = np.cos(bb) * np.cos(ll) / 1000.0, np.cos(bb) * np.sin(ll) / 1000.0  # kpc per pc along the line
    label, label_up = "dust feature", "dust nearer than (foreground unconstrained)"
    for i in range(d.size):
        if np.isfinite(d[i]):
            err = np.nan_to_num(de[i])
            ax.plot([(d[i] - err) * ux[i], (d[i] + err) * ux[i]], [(d[i] - err) * uy[i], (d[i] + err) * uy[i]],
                    color=COLORS["blue"], lw=1.5, zorder=4)
            ax.plot([d[i] * ux[i]], [d[i] * uy[i]], ls="none", marker="D", ms=5, mfc=COLORS["sky_blue"],
                    mec=COLORS["blue"], zorder=4, label=label, gid="dustkit-face-feature")
            at, label = d[i], None
        elif np.isfinite(up[i]):
            ax.plot([0.0, up[i] * ux[i]], [0.0, up[i] * uy[i]], color=COLORS["blue"], lw=1.2, ls=":", zorder=4,
                    label=label_up, gid="dustkit-face-feature-nearer")
            at, label_up = up[i], None
        else:
            continue
        txt = ax.annotate(f"#{ids[i]}", (at * ux[i], at * uy[i]), xytext=(4, 3), textcoords="offset points",
                          fontsize=7, color=COLORS["blue"])
        txt.set_in_layout(False)


def _tracer_reach(model):
    """Per pixel, the farthest distance edge (pc) informed by tracers (-1 where none)."""
    informed = np.asarray(model.n_tracers_) >= 0.1
    e = model.grid_.distance_edges
    last = informed.shape[1] - 1 - np.argmax(informed[:, ::-1], axis=1)
    return np.where(informed.any(axis=1), e[last], -1.0)


def _auto_face_extent(model, r_max_pc):
    r = r_max_pc / 1000.0
    tr = getattr(model, "tracers_", None)
    ext = auto_extent(model) if tr is not None else "all-sky"
    if ext == "all-sky":
        return (-r, r, -r, r)
    l_min, l_max = ext[0], ext[1]
    ang = np.radians(np.linspace(l_min, l_max, 91))
    xs = np.concatenate([[0.0], r * np.cos(ang)])
    ys = np.concatenate([[0.0], r * np.sin(ang)])
    pad = 0.05 * r
    return (float(xs.min() - pad), float(xs.max() + pad), float(ys.min() - pad), float(ys.max() + pad))
