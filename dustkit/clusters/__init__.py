"""From a cluster's own photometry to its reddening and distance: main-sequence fitting.

>>> from dustkit.clusters import fit_cluster, fit_clusters     # doctest: +SKIP
>>> fit = fit_cluster(members, law="ccm89", rv=3.1)            # doctest: +SKIP
>>> fit.ebv, fit.ebv_err, fit.distance_modulus, fit.distance    # doctest: +SKIP
>>> tracers = fit_clusters(all_members, cluster_column="cluster")  # doctest: +SKIP

The intrinsic sequence is the mean dwarf sequence of Pecaut & Mamajek (2013, ApJS 208, 9;
E. Mamajek's updated table, shipped by the MeanStars package). Results are estimates to
check: see :data:`CAUTION`.
"""

from .batch import TRACER_COLUMNS, fit_clusters, tracer_row, tracer_table
from .fit import (
    BINARY_OFFSET,
    CAUTION,
    PARALLAX_FLOOR,
    PARALLAX_ZERO_POINT,
    ClusterFit,
    DegeneracyWarning,
    fit_cluster,
    fit_colour_colour,
    colour_residuals,
    reddening_curve,
    shifted_sequence,
)
from .members import Photometry, read_photometry
from .sequence import MainSequence, default_sequence, read_sequence_file
from .simulate import simulate_members

__all__ = [
    "fit_cluster",
    "fit_clusters",
    "fit_colour_colour",
    "ClusterFit",
    "MainSequence",
    "default_sequence",
    "read_sequence_file",
    "read_photometry",
    "Photometry",
    "reddening_curve",
    "shifted_sequence",
    "colour_residuals",
    "tracer_row",
    "tracer_table",
    "TRACER_COLUMNS",
    "simulate_members",
    "DegeneracyWarning",
    "CAUTION",
    "BINARY_OFFSET",
    "PARALLAX_ZERO_POINT",
    "PARALLAX_FLOOR",
]
