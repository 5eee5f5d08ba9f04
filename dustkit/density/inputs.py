"""What a density-model fit takes from a tracer set: arrays, near-duplicate weights, distance shifts, the layer.

Shared by :class:`~dustkit.density.DensityModel`'s fit and refit, ``dustkit layer`` (the layer
a fit makes, :func:`fit_catalogue_layer`) and the lift caution (:func:`catalogue_lift`).
Plain numpy arrays (deg, pc, mag).
"""

import warnings
from typing import NamedTuple

import numpy as np
from scipy.spatial import cKDTree

from ..exceptions import DustkitWarning
from ..layer import DustLayer, fit_layer
from ..layer_lift import cloud_lift, lift_caution
from ..tracers.rules import AV_ERR_FLOOR
from .lattice import chord, unit_vectors
from .layer_share import remaining_pull
from .solver import sample_distance_shift

__all__ = ["DUPLICATE_SEPARATION_DEG", "duplicate_weights", "TracerInputs", "tracer_inputs", "fit_catalogue_layer",
           "catalogue_lift", "lift_report", "left_of_pull"]

#: Sky separation (deg) within which the density model treats agreeing tracers as one object listed twice.
DUPLICATE_SEPARATION_DEG = 1.0 / 60.0


def duplicate_weights(l, b, d, av, av_err, distance_err=None, separation_deg=DUPLICATE_SEPARATION_DEG):
    """Likelihood weight of each tracer: 1 / the size of its group of near-duplicates.

    Tracers within ``separation_deg`` on the sky (default 1 arcmin: two compilations'
    centres of one cluster) whose distances agree within twice their combined error (1% of
    the distance when no error is given) and whose A_V agree within twice their combined
    error are one object listed more than once (as when two compilations are merged); each
    such group counts as one tracer, so that duplicating a catalogue does not shrink the
    uncertainties. Distinct field stars a few arcminutes apart are not grouped: they are
    independent measurements of neighbouring sight lines.
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    d = np.asarray(d, float)
    de = 0.01 * d if distance_err is None else np.maximum(np.asarray(distance_err, float), 0.01 * d)
    pairs = cKDTree(unit_vectors(l, b)).query_pairs(r=chord(separation_deg), output_type="ndarray")
    if pairs.size:
        i, j = pairs[:, 0], pairs[:, 1]
        close = np.abs(d[i] - d[j]) <= 2.0 * np.hypot(de[i], de[j])
        agree = np.abs(av[i] - av[j]) <= 2.0 * np.hypot(av_err[i], av_err[j])
        i, j = i[close & agree], j[close & agree]
    else:
        i = j = np.zeros(0, np.int64)
    n = np.size(l)
    graph = coo_matrix((np.ones(i.size), (i, j)), shape=(n, n))
    _, label = connected_components(graph, directed=False)
    size = np.bincount(label)
    return 1.0 / size[label], int(np.sum(size > 1))


class TracerInputs(NamedTuple):
    """What a fit needs from a tracer set, as plain arrays (deg, pc, mag)."""

    l: np.ndarray
    b: np.ndarray
    d: np.ndarray
    de: np.ndarray
    av: np.ndarray
    ae: np.ndarray          # floored at AV_ERR_FLOOR
    floored: int            # how many A_V errors the floor raised
    weight: np.ndarray      # 1 / size of each tracer's near-duplicate group
    n_groups: int
    corr: np.ndarray        # correlation of the A_V and ln-distance errors
    shift: np.ndarray       # ln-distance shift to where each tracer most likely lies
    layer: DustLayer        # fitted at the shifted distances


def fit_catalogue_layer(tracers, random_state=0):
    """The smooth layer the density model fits to ``tracers`` (a :class:`~dustkit.layer.DustLayer`).

    As :func:`~dustkit.layer.fit_layer` with block errors and the pull, at the distances the
    catalogue's own distance distribution puts the tracers at (:func:`~.solver.sample_distance_shift`),
    near-duplicates counted once: ``dustkit layer`` writes it, so one given back with
    ``--layer-from`` is the one a fit to the same catalogue makes.
    """
    return tracer_inputs(tracers, random_state).layer


def tracer_inputs(tracers, random_state, layer=None):
    """The arrays, duplicate weights, distance shifts and layer shared by a fit and a refit.

    The shift comes from the catalogue's own distance distribution
    (:func:`~dustkit.density.solver.sample_distance_shift`); parallax distances already
    carry a prior of their own (``read_tracers``) and are not shifted. The layer is
    ``layer`` if one is given, else fitted, its errors summed over sky blocks
    (clouds correlate neighbouring residuals).
    """
    l, b, d, de, av, ae = (np.asarray(getattr(tracers, k), float)
                           for k in ("l", "b", "distance", "distance_err", "av", "av_err"))
    floored = int(np.sum(ae < AV_ERR_FLOOR))
    ae = np.maximum(ae, AV_ERR_FLOOR)
    weight, n_groups = duplicate_weights(l, b, d, av, ae, de)
    corr = getattr(tracers, "av_distance_corr", None)
    corr = np.zeros(l.size) if corr is None else np.asarray(corr, float)
    if getattr(tracers, "distance_kind", "distance") == "parallax":
        shift = np.zeros(l.size)
    else:
        shift = sample_distance_shift(d, de, weight)
    if layer is None:
        layer = fit_layer(tracers, block_errors=True, random_state=random_state, distance_shift=shift)
    return TracerInputs(l, b, d, de, av, ae, floored, weight, n_groups, corr, shift, layer)


def catalogue_lift(tracers, layer, random_state=0):
    """:func:`~dustkit.layer.cloud_lift` of ``layer`` over ``tracers`` at the distances the build judges it at."""
    return _lift_at(layer, tracer_inputs(tracers, random_state, layer))


def _lift_at(layer, inp):
    return cloud_lift(layer, inp.b, inp.d * np.exp(inp.shift), inp.de, inp.av, inp.ae)


def lift_report(layer, inp, given):
    """:func:`~dustkit.layer.cloud_lift` of a fit's layer (at the distances it was fitted at), with a caution if lifted."""
    lift = _lift_at(layer, inp)
    if lift["lifted"] and given is None:
        warnings.warn(lift_caution(lift), DustkitWarning, stacklevel=3)
    return lift


def left_of_pull(layer, inp, post, terms):
    """:func:`remaining_pull` of a fit: its tracer inputs (at the distances the layer was fitted at) and posterior."""
    return remaining_pull(layer, inp.b, inp.d * np.exp(inp.shift), inp.de, inp.av, inp.ae, post.predicted,
                          inp.weight, terms.censored)
