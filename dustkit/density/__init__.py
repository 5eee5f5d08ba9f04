"""The 3-D dust density model: log-normal, spatially correlated, with posterior uncertainties.

See :class:`DensityModel`. The binned model (:class:`dustkit.ExtinctionModel`) remains the
path for catalogues of millions of field stars; both answer through the same interface.
"""

from .estimator import DensityModel, catalogue_lift, default_distance_edges, fit_catalogue_layer

__all__ = ["DensityModel", "default_distance_edges", "fit_catalogue_layer", "catalogue_lift"]
