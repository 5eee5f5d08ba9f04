"""Internals of the binned model (:class:`dustkit.model.ExtinctionModel`): how it is built.

Modules, from the bottom up (each imports only the ones above it in this list, plus
``dustkit._lib``, ``dustkit.grid`` and ``dustkit.layer``):

``folds``        which tracers are held out (K folds from a row hash, or one random set)
``statistics``   sufficient statistics per (pixel, distance edge): Monte Carlo or bin-scatter
``smoothing``    sky kernels, distance kernel, Kalman/RTS smoother along sight lines
``crossval``     predictions at held-out tracers and the choice of the smoothing
``calibration``  the predictive variance and its maximum-likelihood calibration
``finish``       statistics -> :class:`~dustkit.binned.finish.FitResult`; the empty-pixel fill

Nothing here knows about the estimator facade, files, figures or widgets.
"""

__all__ = []
