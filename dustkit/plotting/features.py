"""Map of dust features on the sky, coloured by distance (plot_features)."""

import numpy as np
from astropy import units as u

from .._lib.validation import param_error
from .common import COLORS, column, distance_scale, lat_formatter, lon_formatter, new_axes, style_context

__all__ = ["plot_features"]


def _circle(lm, bm, rad, n=73):
    """Longitudes and latitudes (deg) of a small circle of radius ``rad`` deg around (lm, bm)."""
    t = np.linspace(0, 2 * np.pi, n)
    sb, cb = np.sin(np.radians(bm)), np.cos(np.radians(bm))
    sr, cr = np.sin(np.radians(rad)), np.cos(np.radians(rad))
    bb = np.degrees(np.arcsin(np.clip(sb * cr + cb * sr * np.cos(t), -1, 1)))
    dl = np.degrees(np.arctan2(np.sin(t) * sr * cb, cr - sb * np.sin(np.radians(bb))))
    return lm + dl, bb


def plot_features(features, ax=None, extent=None, cmap=None, distance_unit=None, label=True):
    """Dust features on a Galactic map: a circle of each feature's extent, filled by its distance.

    Located features are filled with the colour of their ``distance``; ``'nearer than'``
    features (fewer than two tracers in front: :func:`dustkit.features.density_features`) are drawn as
    hatched outlines in the colour of their ``distance_upper`` and labelled ``< D``.

    Parameters
    ----------
    features : Table
        Columns ``l``, ``b`` (deg), ``distance`` (pc); optional ``extent`` (deg, default
        0.5), ``kind`` and ``distance_upper`` (pc), ``feature`` (ids written beside the
        circles).
    ax : matplotlib Axes, optional
    extent : (l_min, l_max, b_min, b_max) in deg, optional
        Default: the features with a margin. Longitude increases to the left; a range may
        cross l = 0 (e.g. (350, 20, -10, 10)).
    cmap : str or Colormap, optional
        Colour map of the distance. Default: matplotlib's perceptually uniform 'plasma' without
        its palest sixth, so that the farthest features (and the hatched outlines of 'nearer
        than' ones) stay visible on white paper.
    distance_unit : {'pc', 'kpc'}, optional
        Unit of the colour bar (default kpc when a feature lies at 2 kpc or more).
    label : bool
        Write each feature's id and distance beside it.

    Returns
    -------
    matplotlib.axes.Axes
        Filled circles have gid ``'dustkit-feature-located'``, hatched ones
        ``'dustkit-feature-nearer'``; the colour bar is labelled with its unit.
    """
    import matplotlib as mpl
    from matplotlib.patches import Polygon

    names = features.colnames
    for col in ("l", "b", "distance"):
        if col not in names:
            raise param_error("features", "a table with 'l', 'b' and 'distance' columns", names)
    fl = column(features, "l", u.deg) % 360.0
    fb = column(features, "b", u.deg)
    fd = column(features, "distance", u.pc)
    fr = np.maximum(column(features, "extent", u.deg) if "extent" in names else np.full(fl.size, 0.5), 0.05)
    kind = np.asarray(features["kind"]).astype(str) if "kind" in names else np.full(fl.size, "located")
    up = column(features, "distance_upper", u.pc) if "distance_upper" in names else np.full(fl.size, np.nan)
    nearer = (kind == "nearer than") | ~np.isfinite(fd)
    shown = np.where(nearer, up, fd)
    ids = np.asarray(features["feature"]) if "feature" in names else np.arange(1, fl.size + 1)
    finite = shown[np.isfinite(shown)]
    scale, dunit = distance_scale(distance_unit, float(finite.max()) if finite.size else 1000.0)
    if extent is None:
        if fl.size:
            lw = ((fl - fl[0] + 180.0) % 360.0 - 180.0) + fl[0]  # unwrapped around the first feature
            pad = 2.0 + float(fr.max())
            extent = (float(lw.min() - pad), float(lw.max() + pad), float(max(fb.min() - pad, -90.0)),
                      float(min(fb.max() + pad, 90.0)))
        else:
            extent = (0.0, 360.0, -20.0, 20.0)
    l_min, l_max, b_min, b_max = (float(x) for x in extent)
    if l_max <= l_min:
        l_max += 360.0
    norm = mpl.colors.Normalize(vmin=0.0, vmax=(float(finite.max()) * scale if finite.size else 1.0))
    if cmap is None:
        cm = mpl.colors.ListedColormap(mpl.colormaps["plasma"](np.linspace(0.0, 0.85, 256)), name="plasma_printable")
    else:
        cm = mpl.colormaps[cmap] if isinstance(cmap, str) else cmap

    with style_context():
        ax = new_axes(ax, (7.5, 4.5))
        for i in range(fl.size):
            lm = float(((fl[i] - l_min) % 360.0) + l_min)
            xs, ys = _circle(lm, fb[i], fr[i])
            colour = cm(norm(shown[i] * scale)) if np.isfinite(shown[i]) else COLORS["grey"]
            if nearer[i]:
                patch = Polygon(np.column_stack([xs, ys]), closed=True, facecolor="none", edgecolor=colour,
                                hatch="///", lw=1.5, gid="dustkit-feature-nearer")
            else:
                patch = Polygon(np.column_stack([xs, ys]), closed=True, facecolor=colour, edgecolor=COLORS["black"],
                                alpha=0.85, lw=0.8, gid="dustkit-feature-located")
            ax.add_patch(patch)
            if label:
                d = shown[i] * scale
                text = f"#{ids[i]} " + ("< " if nearer[i] else "") + (f"{d:.2f} {dunit}" if dunit == "kpc" else f"{d:.0f} {dunit}")
                ax.annotate(text, (lm, fb[i] + fr[i]), xytext=(0, 2), textcoords="offset points", ha="center",
                            va="bottom", fontsize=7, color=COLORS["black"]).set_in_layout(False)
        ax.set_xlim(l_max, l_min)
        ax.set_ylim(b_min, b_max)
        ax.set_aspect("equal")
        ax.xaxis.set_major_formatter(lon_formatter)
        ax.yaxis.set_major_formatter(lat_formatter)
        ax.set_xlabel("Galactic longitude $l$")
        ax.set_ylabel("Galactic latitude $b$")
        n_near = int(nearer.sum())
        ax.set_title(f"{fl.size} dust feature(s)" + (f", {n_near} only bounded ('nearer than', hatched)" if n_near else ""),
                     fontsize="medium")
        sm = mpl.cm.ScalarMappable(norm=norm, cmap=cm)
        ax.figure.colorbar(sm, ax=ax, label=f"Distance [{dunit}]", fraction=0.04, pad=0.04)
    return ax
