"""Sight-line figures: cumulative extinction against distance (plot_profile)."""

import numpy as np
from astropy import units as u

from .._lib.sky import separation_deg
from .._lib.validation import check_real, param_error
from .common import COLORS, as_deg, check_quantity, column, convert, distance_scale, fitted, new_axes, quantity_label, style_context

__all__ = ["plot_profile"]


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
        the layer ``'dustkit-layer'``, the tracers ``'dustkit-tracers'``. For a 3-D density model
        the distances where the answer on the centre line is the prior alone (``support`` below
        0.1: tracers barely inform it) are shaded grey (``'dustkit-prior-only'``).
    """
    fitted(model)
    quantity, band = check_quantity(quantity, band)
    lv = as_deg("l", l) % 360.0
    bv = as_deg("b", b)
    rad = None
    if radius is not None:
        rad = check_real("radius", as_deg("radius", radius), 0.0, 90.0)
        if rad == 0.0:
            rad = None
    prof = model.profile(lv * u.deg, bv * u.deg, radius=None if rad is None else rad * u.deg)
    law, rv = model.law, model.rv
    d_pc = prof["distance"].to_value(u.pc)
    scale, dunit = distance_scale(distance_unit, float(d_pc[-1]))
    y, yerr = convert(prof["av"].to_value(u.mag), prof["av_err"].to_value(u.mag), quantity, band, law, rv)
    ylay, _ = convert(prof["av_layer"].to_value(u.mag), 0.0 * d_pc, quantity, band, law, rv)

    with style_context():
        ax = new_axes(ax, (6.0, 4.2))
        x = d_pc * scale
        ax.fill_between(x, y - yerr, y + yerr, color=COLORS["sky_blue"], alpha=0.35, lw=0,
                        label=r"model $\pm1\sigma$", gid="dustkit-profile-band")
        ax.plot(x, y, color=COLORS["blue"], lw=2.0, label="model", gid="dustkit-profile")
        if show_layer:
            ax.plot(x, ylay, color=COLORS["black"], lw=1.3, ls="--", label="smooth layer", gid="dustkit-layer")
        if hasattr(model, "support"):  # the 3-D density model says where tracers barely inform the answer
            prior = np.array(model.support(np.full(x.size, lv) * u.deg, np.full(x.size, bv) * u.deg, d_pc * u.pc)[2])
            first = d_pc < model.grid_.distance_edges[1]  # A_V = 0 at the Sun is known, not informed:
            if np.any(~first):                              # the first bin is shaded as the next point is
                prior[first] = prior[np.argmax(~first)]
            _shade_prior_only(ax, x, prior)
        n_shown = 0
        tr = prof.meta.get("tracers")
        if show_tracers and tr is not None and len(tr):
            td = column(tr, "distance", u.pc)
            tde = column(tr, "distance_err", u.pc)
            ta, tae = convert(column(tr, "av", u.mag), column(tr, "av_err", u.mag), quantity, band, law, rv)
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


def _shade_prior_only(ax, x, prior_only):
    """Grey spans over the distances where the answer is the prior alone (one legend entry)."""
    step = np.diff(np.concatenate([[0], np.asarray(prior_only, bool).astype(int), [0]]))
    starts, ends = np.nonzero(step == 1)[0], np.nonzero(step == -1)[0] - 1
    for k, (i, j) in enumerate(zip(starts, ends)):
        ax.axvspan(x[i], x[min(j + 1, x.size - 1)], color=COLORS["grey"], alpha=0.15, lw=0, zorder=0,
                   label="prior only (support < 0.1)" if k == 0 else None, gid="dustkit-prior-only")


def _features_near(features, lon, lat, radius):
    """Features within ``radius`` deg of (lon, lat) when the table has ``l``/``b`` columns."""
    if "l" not in features.colnames or "b" not in features.colnames:
        return features

    sep = separation_deg(column(features, "l", u.deg), column(features, "b", u.deg), lon, lat)
    return features[sep <= radius]


def _mark_features(ax, features, scale, quantity, band, law, rv):
    """Vertical markers at feature distances, shaded by their distance uncertainty."""
    if len(features) == 0:
        return
    names = features.colnames
    if "distance" not in names:
        raise param_error("features", "a table with a 'distance' column", names)
    fd = column(features, "distance", u.pc)
    fde = column(features, "distance_err", u.pc) if "distance_err" in names else np.zeros_like(fd)
    # 'nearer than' features (foreground unconstrained): shaded from 0 to their upper distance
    up = column(features, "distance_upper", u.pc) if "distance_upper" in names else np.full(fd.size, np.nan)
    bound = ~np.isfinite(fd) & np.isfinite(up)
    for d_up in up[bound]:
        ax.axvspan(0.0, d_up * scale, color=COLORS["vermillion"], alpha=0.08, lw=0, gid="dustkit-feature-nearer")
        ax.annotate(f"dust nearer than {d_up:.0f} pc", xy=(d_up * scale, 0.03), xycoords=ax.get_xaxis_transform(),
                    xytext=(-3, 0), textcoords="offset points", ha="right", va="bottom", fontsize=8,
                    color=COLORS["vermillion"])
    keep = np.isfinite(fd)
    fd, fde = fd[keep], np.nan_to_num(fde[keep])
    jump = None
    if "delta_av" in names:
        dav = column(features, "delta_av", u.mag)[keep]
        jump, _ = convert(dav, np.zeros_like(dav), quantity, band, law, rv)
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
