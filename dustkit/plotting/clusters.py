"""Figures of main-sequence fits: colour-magnitude and colour-colour diagrams.

Every function takes ``ax=None`` (a new figure then) and returns the axes. The members are
coloured by the membership weight of the fit, evolved stars left out of the fit are
crosses, and the fitted (reddened, shifted) sequence, the equal-mass binary sequence and
the reddening vector are drawn. A caution line sits under the axes.

Main-sequence fits are estimates to check: the mean dwarf sequence is for roughly solar
metallicity, metallicity and age shift it, young clusters may hold pre-main-sequence stars,
and differential reddening widens a cluster's sequence.
"""

import numpy as np

from ..clusters import read_photometry, reddening_curve, shifted_sequence

__all__ = ["plot_cluster_cmd", "plot_cluster_colour_colour", "CLUSTER_FIGURE_CAUTION"]

#: The caution line drawn under every figure of this module.
CLUSTER_FIGURE_CAUTION = ("Estimates to check: mean solar-metallicity dwarf sequence;\nage, metallicity, "
                          "pre-main-sequence stars and differential reddening shift or widen it.")


def _axes(ax):
    if ax is None:
        from matplotlib.figure import Figure

        ax = Figure(figsize=(5.6, 6.0), layout="constrained").add_subplot()
    return ax


def _caution(ax):
    t = ax.text(0.0, -0.09, CLUSTER_FIGURE_CAUTION, transform=ax.transAxes, fontsize=6.5, color="0.35",
                ha="left", va="top", gid="caution")
    t.set_in_layout(True)


def _members_layer(ax, x, y, weights, evolved):
    good = np.isfinite(x) & np.isfinite(y)
    w = np.clip(np.asarray(weights, dtype=float), 0, 1)
    kept = good & ~evolved
    sc = ax.scatter(x[kept], y[kept], c=w[kept], cmap="viridis", vmin=0, vmax=1, s=14, edgecolors="none",
                    zorder=3, gid="members")
    if np.any(good & evolved):
        ax.scatter(x[good & evolved], y[good & evolved], marker="x", color="tab:red", s=22, zorder=3,
                   gid="evolved", label="left out (evolved)")
    return sc


def _label(spec):
    return spec if isinstance(spec, str) else f"{spec[0]} - {spec[1]}"


def plot_cluster_cmd(members, fit, *, colour=("B", "V"), magnitude="V", ebv=None, distance_modulus=None,
                     sequence=None, ax=None, colorbar=True):
    """Colour-magnitude diagram of a cluster with its fitted main sequence.

    Parameters
    ----------
    members : table-like
        The members table the fit was made from.
    fit : ClusterFit
        The fit (weights, law, R_V, evolved stars).
    colour : (str, str)
        Bands of the x colour, e.g. ``("B", "V")``, ``("BP", "RP")``, ``("J", "Ks")``.
    magnitude : str
        Band of the y axis.
    ebv, distance_modulus : float, optional
        Draw the sequence at these values instead of the fitted ones (mag).
    sequence : MainSequence, optional
        The sequence of the fit when it was not the default.
    ax : matplotlib Axes, optional

    Returns
    -------
    matplotlib Axes
    """
    ax = _axes(ax)
    ebv = fit.ebv if ebv is None else float(ebv)
    mu0 = fit.distance_modulus if distance_modulus is None else float(distance_modulus)
    phot, _ = read_photometry(members)
    x, _ = phot.quantity(tuple(colour))
    y, _ = phot.quantity(magnitude)
    sc = _members_layer(ax, x, y, fit.weights, fit.evolved)
    sx, sy = shifted_sequence(ebv, mu0, colour[0], colour[1], magnitude, law=fit.law, rv=fit.rv, sequence=sequence)
    bx, by = shifted_sequence(ebv, mu0, colour[0], colour[1], magnitude, law=fit.law, rv=fit.rv, sequence=sequence,
                              binary=True)
    ylo, yhi = np.nanmin(y) - 1.0, np.nanmax(y) + 0.5
    vis = (sy > ylo) & (sy < yhi)
    ax.plot(sx[vis], sy[vis], color="k", lw=1.4, gid="sequence",
            label=f"sequence, E(B-V) = {ebv:.3f}, mu0 = {mu0:.2f} mag")
    visb = (by > ylo) & (by < yhi)
    ax.plot(bx[visb], by[visb], color="k", lw=1.0, ls="--", gid="binary_sequence", label="equal-mass binaries (-0.75 mag)")
    # reddening vector for 0.5 mag of E(B-V), from the upper left of the data
    eg, tab = reddening_curve((colour[0], colour[1], magnitude), fit.law, fit.rv)
    a0 = np.array([np.interp(ebv, eg, tab[:, j]) for j in range(3)])
    a1 = np.array([np.interp(ebv + 0.5, eg, tab[:, j]) for j in range(3)])
    dx, dy = (a1[0] - a1[1]) - (a0[0] - a0[1]), a1[2] - a0[2]
    x0 = np.nanpercentile(x, 5)
    y0 = np.nanmin(y) + 0.1 * (np.nanmax(y) - np.nanmin(y))
    ax.plot([x0, x0 + dx], [y0, y0 + dy], color="tab:red", lw=1.6, gid="reddening_vector",
            label=f"reddening vector, E(B-V) = 0.5 ({fit.law}, R_V = {fit.rv:g})")
    ax.plot([x0 + dx], [y0 + dy], marker="v", color="tab:red", ms=5, gid="reddening_vector_tip")
    ax.set_xlabel(f"{_label(tuple(colour))} [mag]")
    ax.set_ylabel(f"{magnitude} [mag]")
    ax.set_ylim(np.nanmax(y) + 0.5, np.nanmin(y) - 1.0)
    ax.legend(loc="lower left", fontsize=6.5, frameon=False)
    flag = " (E(B-V) and mu0 degenerate here)" if "ebv_mu0_degenerate" in fit.flags else ""
    ax.set_title(f"Colour-magnitude diagram{flag}", fontsize=10)
    if colorbar:
        ax.figure.colorbar(sc, ax=ax, label="membership weight", shrink=0.8)
    _caution(ax)
    return ax


def plot_cluster_colour_colour(members, fit, *, x=("B", "V"), y=("U", "B"), ebv=None, sequence=None, ax=None,
                               colorbar=True):
    """Colour-colour diagram (default U-B against B-V) with the sequence slid along the reddening line.

    Parameters
    ----------
    members : table-like
    fit : ClusterFit
    x, y : (str, str)
        Bands of the two colours.
    ebv : float, optional
        Draw the sequence at this E(B-V) instead of the fitted one (mag).
    sequence : MainSequence, optional
    ax : matplotlib Axes, optional

    Returns
    -------
    matplotlib Axes
    """
    ax = _axes(ax)
    ebv = fit.ebv if ebv is None else float(ebv)
    phot, _ = read_photometry(members)
    xv, _ = phot.quantity(tuple(x))
    yv, _ = phot.quantity(tuple(y))
    sc = _members_layer(ax, xv, yv, fit.weights, fit.evolved)
    s0x, s0y = shifted_sequence(0.0, 0.0, x[0], x[1], tuple(y), law=fit.law, rv=fit.rv, sequence=sequence)
    sx, sy = shifted_sequence(ebv, 0.0, x[0], x[1], tuple(y), law=fit.law, rv=fit.rv, sequence=sequence)
    ax.plot(s0x, s0y, color="0.6", lw=1.0, ls=":", gid="intrinsic_sequence", label="intrinsic sequence")
    ax.plot(sx, sy, color="k", lw=1.4, gid="sequence", label=f"reddened by E(B-V) = {ebv:.3f} mag")
    eg, tab = reddening_curve((x[0], x[1], y[0], y[1]), fit.law, fit.rv)
    e = np.linspace(0.0, max(ebv, 0.1) * 1.3, 30)
    ex = np.interp(e, eg, tab[:, 0]) - np.interp(e, eg, tab[:, 1])
    ey = np.interp(e, eg, tab[:, 2]) - np.interp(e, eg, tab[:, 3])
    x0, y0 = np.nanpercentile(xv, 3), np.nanpercentile(yv, 3)
    ax.plot(x0 + ex - ex[0], y0 + ey - ey[0], color="tab:red", lw=1.6, gid="reddening_vector",
            label=f"reddening line ({fit.law}, R_V = {fit.rv:g})")
    ax.set_xlabel(f"{_label(tuple(x))} [mag]")
    ax.set_ylabel(f"{_label(tuple(y))} [mag]")
    finite = np.isfinite(xv) & np.isfinite(yv)
    if np.any(finite):
        ax.set_xlim(np.nanmin(xv[finite]) - 0.2, np.nanmax(xv[finite]) + 0.2)
        ax.set_ylim(np.nanmax(yv[finite]) + 0.3, np.nanmin(yv[finite]) - 0.3)
    ax.legend(loc="lower left", fontsize=7, frameon=False)
    ax.set_title("Colour-colour diagram", fontsize=10)
    if colorbar:
        ax.figure.colorbar(sc, ax=ax, label="membership weight", shrink=0.8)
    _caution(ax)
    return ax
