"""Shared pieces of the figures: palette, style, axes, unit checks, quantity conversion, tick formats."""

import numpy as np
from astropy import units as u

from .._lib.validation import check_choice, param_error, to_scalar, to_value

__all__ = ["COLORS", "style_context", "new_axes", "fitted", "as_deg", "as_pc", "column", "distance_scale", "quantity_label", "check_quantity", "convert", "lon_formatter", "lat_formatter"]


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


def style_context():
    """Context manager with dustkit's figure style (font sizes, ticks); use it to create axes.

    The plotting functions apply it to the figures they create; axes created by the caller
    inside this context get the same look.
    """
    import matplotlib

    return matplotlib.rc_context(_STYLE)




def new_axes(ax, figsize, projection=None):
    """Return ``ax`` or new axes on a new constrained-layout figure."""
    if ax is not None:
        return ax
    import matplotlib.pyplot as plt

    fig = plt.figure(figsize=figsize, layout="constrained")
    return fig.add_subplot(projection=projection)


def fitted(model):
    if not hasattr(model, "av_"):
        from ..exceptions import ModelNotFittedError

        raise ModelNotFittedError(
            "This ExtinctionModel is not fitted yet. Call fit(tracers) first, or load a saved model."
        )
    return model


def as_deg(name, value):
    return to_scalar(name, value, u.deg, default_unit=u.deg)


def as_pc(name, value):
    return to_value(name, value, u.pc, default_unit=u.pc)


def column(table, name, unit):
    """Values of a table column in ``unit`` (a bare column is taken to be in ``unit``)."""
    col = table[name]
    if isinstance(col, u.Quantity):
        return np.asarray(col.to_value(unit), float)
    cu = getattr(col, "unit", None)
    if cu is not None:
        return np.asarray((np.asarray(col, float) * u.Unit(cu)).to_value(unit), float)
    return np.asarray(col, float)


def distance_scale(distance_unit, d_max_pc):
    """(factor from pc, unit name) for the distance axis; ``None`` picks kpc beyond 2 kpc."""
    if distance_unit is None:
        distance_unit = "kpc" if d_max_pc >= 2000.0 else "pc"
    unit = check_choice("distance_unit", str(distance_unit), ("pc", "kpc"))
    return (1e-3 if unit == "kpc" else 1.0), unit


def quantity_label(quantity="av", band=None):
    """Axis label (with unit) for ``'av'``, ``'ebv'`` or ``'band'`` (``band`` given)."""
    quantity, band = check_quantity(quantity, band)
    if quantity == "av":
        return r"$A_V$ [mag]"
    if quantity == "ebv":
        return r"$E(B-V)$ [mag]"
    # a band's name is text: '_' (g_PS1, BP_DR2) would otherwise start a subscript in mathtext
    name = _band_name(band).replace("_", r"\_")
    return rf"$A_{{\mathrm{{{name}}}}}$ [mag]"


def _band_name(band):
    from ..bands import get_band

    return get_band(band).name if isinstance(band, str) else str(getattr(band, "name", band))


def check_quantity(quantity, band):
    if band is not None and quantity == "av":
        quantity = "band"
    quantity = check_choice("quantity", quantity, ("av", "ebv", "band"))
    if quantity == "band" and band is None:
        raise param_error("band", "a band name such as 'J' or 'Ks' when quantity='band'", band)
    if quantity != "band" and band is not None:
        raise param_error("band", "None unless quantity='band'", band)
    return quantity, band


def convert(av, av_err, quantity, band, law, rv):
    """A_V (mag arrays) -> the plotted quantity with the given law and R_V."""
    av = np.asarray(av, float)
    av_err = np.asarray(av_err, float)
    if quantity == "av":
        return av, av_err
    if quantity == "ebv":
        return av / rv, av_err / rv
    from ..bands import av_to_band

    a, e = av_to_band(av, av_err, band, law=law, rv=rv)
    return np.asarray(a, float), np.asarray(e, float)


def lon_formatter(x, pos=None):
    v = x % 360.0
    return f"{v:g}°" if abs(v - round(v)) > 1e-6 else f"{int(round(v)) % 360}°"


def lat_formatter(x, pos=None):
    return f"{x:g}°"
