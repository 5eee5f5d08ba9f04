"""Extinction-law figures: A_lambda / A_V of several laws with band positions (plot_laws)."""

import numpy as np
from astropy import units as u

from .._lib.validation import param_error, to_value
from .common import COLORS, new_axes, style_context

__all__ = ["plot_laws"]


_LAW_STYLES = ("-", "--", "-.", ":", (0, (5, 1, 1, 1, 1, 1)))


_LAW_COLORS = ("black", "blue", "vermillion", "green", "purple", "orange", "sky_blue")


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
    from ..bands import get_band
    from ..laws import get_law

    lam_lo, lam_hi = (float(v) for v in to_value("wavelength_range", wavelength_range, u.micron))
    if not 0 < lam_lo < lam_hi:
        raise param_error("wavelength_range", "two increasing positive wavelengths", wavelength_range)
    if isinstance(laws, str):
        laws = (laws,)
    with style_context():
        ax = new_axes(ax, (6.0, 4.2))
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
