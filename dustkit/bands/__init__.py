"""Photometric bands, band extinction coefficients and colour-excess conversions.

The public names live here; the implementation is split into
:mod:`dustkit.bands.registry` (the bands, their curves and names),
:mod:`dustkit.bands.passbands` (synthetic photometry through transmission curves and
the precomputed coefficient tables) and :mod:`dustkit.bands.conversions` (A_V <->
band extinctions <-> colour excesses, and the E(B-V) convention).

The E(B-V) convention
---------------------
``A_V`` is the law's reference extinction (the quantity the model stores) and
``E(B-V)`` the nominal reddening of the same dust: E(B-V) = A_V / R_V exactly, under
every law (:func:`ebv_to_av`). Every other band and colour is integrated over its
transmission curve for the source star (a blackbody at ``temperature``, default
5800 K) at the actual amount of extinction. See :mod:`dustkit.bands.conversions`
for the reasons.

Notes
-----
Band coefficients from an average extinction law are statistical: individual sight
lines differ. Check converted values against local data before using them for
science or for planning instrument time.
"""

from .conversions import (
    a_band_over_av,
    av_to_band,
    av_to_excess,
    band_table,
    ebv_to_av,
    excess_over_ebv,
    excess_to_av,
    q_method_ebv,
)
from .passbands import (
    DEFAULT_AV,
    DEFAULT_TEMPERATURE,
    StarTemperatures,
    blackbody_colour,
    colour_temperature,
    example_passband_path,
    passband_a_over_av,
    read_transmission,
    star_temperatures,
)
from .registry import Band, add_band, get_band, parse_excess_name, registered_bands, remove_band

__all__ = [
    "Band",
    "get_band",
    "band_table",
    "registered_bands",
    "add_band",
    "remove_band",
    "a_band_over_av",
    "excess_over_ebv",
    "ebv_to_av",
    "excess_to_av",
    "av_to_excess",
    "av_to_band",
    "parse_excess_name",
    "q_method_ebv",
    "read_transmission",
    "passband_a_over_av",
    "example_passband_path",
    "blackbody_colour",
    "colour_temperature",
    "star_temperatures",
    "StarTemperatures",
    "DEFAULT_TEMPERATURE",
    "DEFAULT_AV",
]
