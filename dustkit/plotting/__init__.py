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
plot_features : dust features on a Galactic map, coloured by distance ('nearer than' ones hatched)
plot_laws : A_lambda / A_V of several extinction laws with band positions marked
save_figure : write a figure to PNG/PDF/SVG atomically
sky_position : (l, b) of a point in data coordinates of a map drawn by :func:`plot_sky`

Notes
-----
Extinction estimates from a model are statistical: they describe the average dust toward
a direction and distance. Check them against local data before using them for science or
for planning instrument time.

Modules (split by figure kind): ``common`` (palette, style, shared checks), ``profiles``,
``sky``, ``face_on``, ``features``, ``laws`` and ``files`` (writing figures). Import from
``dustkit.plotting``; the modules are the implementation.
"""

from .common import COLORS, quantity_label, style_context
from .face_on import plot_face_on
from .features import plot_features
from .files import save_figure, settle_layout
from .laws import plot_laws
from .profiles import plot_profile
from .sky import plot_sky, sky_figsize, sky_position, tracer_extent
from .clusters import plot_cluster_cmd, plot_cluster_colour_colour

__all__ = [
    "plot_profile",
    "plot_cluster_cmd",
    "plot_cluster_colour_colour",
    "plot_sky",
    "plot_face_on",
    "plot_features",
    "plot_laws",
    "save_figure",
    "sky_position",
    "sky_figsize",
    "quantity_label",
    "style_context",
    "settle_layout",
    "COLORS",
    "tracer_extent",
]
