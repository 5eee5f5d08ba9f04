"""dustkit: interstellar extinction models from catalogues of star clusters and field stars.

Read a catalogue of tracers (positions, distances, reddening), choose an extinction law and
R_V, build a HEALPix x distance model of cumulative A_V with honest uncertainties, and ask it
how much extinction lies toward any (l, b) out to any distance.

Extinction estimates are statistical: check them against local data before using them for
science or for instrument time.
"""

__version__ = "0.1.0"

from .exceptions import (  # noqa: F401
    CatalogError,
    DustkitError,
    LawRangeError,
    ModelFileError,
    ModelNotFittedError,
    ParameterError,
)
from .answers import estimate_targets  # noqa: F401
from .bands import av_to_band, excess_to_av, get_band  # noqa: F401
from .laws import get_law, list_laws  # noqa: F401
from .layer import DustLayer, fit_layer  # noqa: F401
from .model import CAUTION, ExtinctionModel, build_model  # noqa: F401
from .density import DensityModel  # noqa: F401
from .tracers import read_targets, read_tracers  # noqa: F401


def __getattr__(name):
    # file I/O is imported on first use so that `import dustkit` stays light
    if name in ("save_model", "load_model", "export_table"):
        from . import io

        return getattr(io, name)
    raise AttributeError(f"module 'dustkit' has no attribute {name!r}")


__all__ = [
    "__version__",
    "read_tracers",
    "read_targets",
    "estimate_targets",
    "ExtinctionModel",
    "DensityModel",
    "build_model",
    "fit_layer",
    "DustLayer",
    "get_law",
    "list_laws",
    "get_band",
    "excess_to_av",
    "av_to_band",
    "save_model",
    "load_model",
    "export_table",
    "CAUTION",
    "CatalogError",
    "DustkitError",
    "LawRangeError",
    "ModelFileError",
    "ModelNotFittedError",
    "ParameterError",
]
