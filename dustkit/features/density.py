"""Dust features in the 3-D density of a fitted :class:`~dustkit.density.DensityModel` (density_features).

A cloud is a compact over-density of the dust: cells (HEALPix pixel x distance bin) whose
differential extinction exceeds the smooth layer's by a clear factor, connected on the sky
and in depth. This module finds such regions in the posterior mode, measures each against
the tracers it holds (a step fitted to them), and lists them with position, distance, size, the extinction they
add, the tracers in front of and behind them, and a significance.

The method
----------
1. *Contrast.* For each active cell the posterior-mode extinction added in the bin is
   divided by the smooth layer's in the same bin (the density contrast ``exp(f)`` of the
   log-normal model). Candidate cells have a contrast of at least ``min_contrast`` and
   an excess (model minus layer) of at least ``min_excess`` mag/kpc (so that cells where
   the layer itself is negligible, far from the plane, cannot pose as clouds).
2. *Regions.* Candidate cells are joined into connected regions: cells in the same or
   neighbouring HEALPix pixels (the 8 neighbours) and in the same or an adjacent distance
   bin belong together. The model's smoothing joins clouds that are neighbours on the sky
   (in the invented galaxies of ``benchmarks/features.py`` regions of 25-125 pixels held two
   to four clouds, and the merged region's centre lay 2-3 deg off each), so each region is
   split on the sky into the basins of its peaks: a member pixel's excess column (summed
   over the region's cells there) climbs to its highest neighbour in the region, the
   pixels that reach the same peak form a basin, and two basins are joined again where a
   common border (the lower column of two adjacent pixels) is at least 0.7 of the lower
   peak and their peaks' excess-weighted distances differ by less than 22% (0.2 in ln d:
   two clouds 7 deg apart at 1.0 and 1.3 kpc often share a border of more than 0.85 of the
   lower peak, as the model smooths them into each other, so the border alone joined
   them; with a border of half the peak they stayed joined in three of four draws). Each
   basin keeps its whole depth (its distance comes from its tracers, step 6; a split in
   depth as well, by 3-D basins, cut single clouds into a near and a far half and found no
   more clouds).
3. *Measurement.* The region's extinction-weighted centre on the sky and distance, its
   extent on the sky and in depth (weighted RMS), and its added extinction: ``delta A_V``
   through its peak pixel (the member pixel with the largest excess column) over the
   region's distance range, minus the layer's over the same range.
4. *Significance.* The posterior probability, from the tracers of the feature's footprint,
   that the feature adds more than ``min_delta_av`` through its peak pixel: the step
   likelihood of step 6 (each tracer in front of or behind a cloud at distance D, by its own
   distance error) with the model's column at each tracer's pixel times a scale ``a``
   that has a flat prior from 0 (no cloud) to 2; D and the common scatter are marginalised,
   and the significance is the posterior mass of the scales for which ``a`` times the
   peak pixel's column, ``delta_av``, exceeds ``min_delta_av`` (so a region the model
   gives less than half of ``min_delta_av`` is never significant). On tracers drawn with no cloud at all
   (20 per draw, 0.1 mag errors, 5% wrong members, a model column of 1 mag; at 0.2 mag) it passes 0.99
   in 1% of draws and 0.9 in 7%; with a 1 mag step, in all of them (tests). The model's
   own posterior probability is kept as ``model_significance``: for every posterior
   sample (``av_ + samples_``) the same ``delta A_V`` is computed; the samples are
   Gaussian deviations from the mode (the model's Laplace posterior, propagated
   linearly), so it is the Student t probability ``T_S((delta - min_delta_av) / s)`` with
   ``s`` their RMS deviation from the mode and S (the number of samples) degrees of
   freedom. It is not the listing criterion: where tracers are sparse the model's prior
   is wide (in the invented galaxies of ``benchmarks/features.py`` its 1-sigma intervals
   hold 95% of the truth in the 'near' galaxies), and clouds that 10-20 tracers show
   clearly sat at 0.84-0.89. (A region with fewer than two tracers in its footprint, never
   listed with the default ``min_support``, gets the model's probability as its
   significance.) The spread of the sample values gives the uncertainty of ``delta A_V``
   (half the 16-84 percentile range).
5. *Tracers and "nearer than".* The tracers in the feature's footprint (the member pixels
   whose excess column is at least 0.25 of the peak's) are sorted into those that show
   the feature's extinction (their A_V minus the layer exceeds the model's excess in front
   of the region plus half the feature's column at their pixel) and those that do not.
   ``n_front`` counts tracers nearer than the feature that do not show it, ``n_behind``
   tracers farther that do. (A quarter, not half, of the peak: with cluster catalogues a
   cloud 2-3 deg across covers a few pixels of 1.8 deg holding 0-2 clusters each, and the
   half-peak core alone often had fewer than two tracers in front of a cloud with five or
   more in front within twice its radius. Alone, a quarter let noise at the region's faint
   edge pass as support (on 21 invented galaxies 14 features where the field adds nothing
   against 9 at 0.3); with the model's own probability required as well (step 4 and "Why
   these defaults"), on the 60 invented galaxies of seeds 1-20 it located 39 of the 52 clouds
   testable within one radius against 38 at 0.3 (155 of 285 within two against 149) with 14
   such features against 15; a fifth gave 40 and 166, but 16.) A region that fewer than ``min_support`` (2)
   tracers show is not listed: a lone tracer can be a wrong member, and the model draws a
   cloud around it where no other tracer says otherwise (on the invented galaxies of
   ``benchmarks/features.py`` all three false features of the six smooth and near galaxies
   were such lone tracers at high latitude, listed as "nearer than" with significance 1).
   A 'nearer than' feature (below) needs ``min_support_nearer`` (3) tracers showing it.
   With fewer than ``min_front`` tracers in front, nothing constrains where along the foreground the dust sits (the model then spreads it over
   the whole empty foreground): the feature is reported as ``kind = 'nearer than'`` with
   an upper distance ``distance_upper`` (the second-nearest tracer that shows it, plus twice
   its distance error; the nearest one when only one does) instead of a distance.
6. *Distance and its error.* The distance is the posterior mean of a step fitted to the
   tracers of the footprint (not the excess-weighted distance of the mode, which the
   prior's correlation along the sight line pulls toward the empty foreground: on the
   invented galaxies of ``benchmarks/features.py`` it came out 7% too near, median). A
   tracer at measured distance d with log-normal error s lies behind a cloud at D with
   probability ``P = Phi((ln d - ln D) / s)``; its A_V above the layer, less the model's
   excess at its distance outside the region (other dust in front of or behind the region,
   which the model has placed), is then ``a col`` (behind) or 0 (in front), each with
   noise, so its likelihood is the
   mixture ``P N(a col, v) + (1 - P) N(0, v)`` (not a Gaussian about the mean ``a col P``,
   which ignores that a tracer near D is either in front or behind, and gave posteriors
   3 times too narrow on data drawn from the model itself). ``col`` is the region's own
   column in the model at the tracer's pixel (over the region's distance range; with the
   model's column over a wider range, other dust behind a weak region gave it
   significance 1: three false features in two fresh smooth galaxies), ``a`` a scale on
   it (0 to 2), ``v`` the tracer's error squared
   plus a scatter common to the footprint (0-0.35 mag); both are marginalised on grids, a
   broad component (5%, 1.5 mag) takes wrong members, and D has a flat prior over the
   region's distance range widened by a factor 1.4 each way (at most 2 000 of the
   footprint's tracers, a fixed random subset, enter the fit). The error is the larger of
   two (not their sum in quadrature: the same tracers inform both): (i) the spread of that
   posterior; (ii) the tracers' bracket. Sorted by
   distance, the tracers of the footprint's core (the member pixels with at least half the
   peak's column; the bracket is sharper there, where every tracer behind the cloud shows
   it clearly) are split into "in front" and "behind" where the split misplaces the
   fewest of them (tracers that show the feature in front, tracers that do not behind;
   every split with that fewest count is kept, so conflicting tracers widen the bracket
   instead of being ignored). The cloud lies between the tracer before the first such
   split (``distance_front``) and the one after the last (``distance_behind``), and where
   within that gap nothing says: the term is the RMS offset of the quoted distance from a
   uniform position in the gap (gap / sqrt(12) when the distance sits in its middle, more
   towards an end), with each end's own distance error (a third of its square each: the
   ends are themselves uncertain). Where no tracer closes a side, the region's distance
   range closes it. The likelihood's spread alone is too small on the invented galaxies
   (53% of actual errors within it, 83% within twice it): the cloud's own extent and the
   model's smeared column at the tracers are not in it. With the larger of the two, on
   those nine galaxies (29 located features at significance >= 0.5 matched to an invented
   cloud within 40%), the median distance error is 9.0% of the distance (10.0% with the
   mode's distance) with a median bias of -0.6% (-7.2%); 76% of the actual errors are
   within the quoted error and 97% within twice it (68% / 95% for honest Gaussian errors),
   RMS error / quoted error 0.96 (0.70 and 0.69 in the smooth and near galaxies: there the
   quoted errors are about 1.45 times the actual; with the two terms added in quadrature
   they were 1.7-1.8 times). (With only one tracer in
   the footprint the distance is the mode's and its error the samples' spread and the bin
   width / sqrt(12) in quadrature.)

Why these defaults (the look-elsewhere effect)
----------------------------------------------
A catalogue's model has 10^4-10^5 cells, so a per-cell test at 95% would give hundreds of
false features. The search guards against that in three stages: (i) the contrast threshold
(1.3, i.e. ln 1.3 = 0.26 in log-density) is applied to the posterior *mode*, which the
prior shrinks toward the layer where the data do not demand otherwise, so the candidate
regions (sky basins, step 2) number 13-37 per galaxy of 2 500-3 000 clusters (55-90 in the
clumpy galaxies), not thousands, and most of them
have a significance near 0; (ii) at least two tracers must show a candidate (three for a
'nearer than' one); (iii) it must add at least ``min_delta_av`` = 0.25 mag with a
probability from its tracers of at least ``1 - false_rate / n_candidates`` (0.1 by
default), and at least 0.99. 0.25 mag is four times the A_V error of a typical cluster (0.02
mag in E(B-V) times R_V), so a single tracer's noise cannot provide it, and it stands above
the 0.1-0.3 mag steps that small clumps of a clumpy medium put on a sight line: on the 21
invented galaxies of ``benchmarks/features.py`` 0.2 mag gave 9 features where the invented
field adds nothing against 5 (and 2, 1, 4 against 1, 1, 1 in three clumpy galaxies of 6 000
clusters), for one cloud of 98 located (55 against 54; none of 1 000-cluster catalogues).
The threshold is
the look-elsewhere correction: the tracers' probability has a flat prior on the column
that leans toward a cloud (with no cloud at all its median is 0.57, and 7% of draws pass
0.9), and 13-90 candidates are tested per galaxy. Each is held to ``false_rate / n`` of
the n tested, so that the chance of listing any region its tracers do not support is at
most ``false_rate`` over the whole search (Bonferroni's bound; ``probability_threshold``):
0.9941 for 17 candidates, 0.9986 for 70. The bound holds as far as the probabilities are
right: on 3 000 draws of 20 tracers with no cloud (0.1 mag errors, 5% wrong members) 0.6%
passed 0.99 and 0.3% passed 0.999, nearly all of them two wrong members beyond the others
that agree, a cloud as far as any tracer can tell. A fixed 0.99 (``min_probability=0.99``,
or ``false_rate=None``) listed 19 features where the invented field adds nothing on the 84
galaxies of ``benchmarks/features.py`` (smooth, 'near' and clumpy, seeds 1-28), two of
the clumpy galaxies having two or three; with the correction (and three tracers for a
'nearer than' feature, below) 12, none with more than one, and the same 48 of 62 clouds
located within one radius (197 of 378 within two, against 201). On the galaxies of
other character (poor data, thin disc, large clouds; seeds 1-4) 4 such features became 1.
False rates of 0.2 and 0.05 gave 14 and 10 such features (one galaxy with two at 0.2), and
201 and 193 clouds within two radii. The number of listed features expected to be chance, if the probabilities
are right, is the sum of ``1 - significance`` over them (``meta['expected_false']``).

A 'nearer than' feature (step 5) needs three tracers showing it (``min_support_nearer``):
with no tracer in front, nothing corroborates the ones behind it, and in the galaxies with
6% wrong members (``noisy`` in ``benchmarks/galaxies.py``) three of the four features
where the invented field adds nothing were such pairs of wrong members near each other,
listed "nearer than" with probabilities of 0.999-1. It costs two of the 15 clouds bounded
as "nearer than" on the 84 galaxies, and no located one.

The tracers' probability is not the only judge: a feature must also be held by the model's
own posterior, ``model_significance >= min_model_probability`` (0.75). The tracers' step fit
sees only the footprint's tracers; the model sees them with every neighbour through its
prior, and where it doubts a step that two or three tracers carry (the posterior puts less
than three chances in four on 0.25 mag), the step is more often their noise or a clump of a
clumpy medium than a cloud. On 84 invented galaxies of ``benchmarks/features.py`` (smooth,
'near' and clumpy, seeds 1-28; 2026-12-05) the cut removed 6 of 26 features where the
invented field adds nothing (the galaxies with more than one such feature went from 6 to
2, all clumpy), and lost 1 of the 48 clouds located within one radius (4 of the 192 within
two); at 0.8 it also lost one more cloud of the smooth galaxies, whose posteriors are wide, and
at 0.9 three more on seeds 1-20. 0 turns it off. On the
21 invented galaxies of ``benchmarks/features.py`` (seeds 0-6, 2026-12-03): 54 of 98
testable clouds located (on seeds 0-4 with 0.2 mag, 42 of 73 against 41 before the regions
were split into sky basins and the footprint narrowed to 0.3 of the peak), with 5 features
where the invented field has no real excess: one in the fourteen smooth and near galaxies,
0-2 in each clumpy one.

Cautions
--------
The depth and distance of a feature are those of the model, which resolves the dust in
depth only as far as its correlation length and the tracers' distance errors allow: a
compact cloud appears as a region a few hundred pc deep, and its quoted ``depth`` is that
of the model, not of the cloud. The sky extent is at least a pixel. ``delta A_V`` is the
model's column through the peak pixel's centre, which is below the cloud's peak where the
cloud is smaller than a pixel. As every answer of the model, features are statistical
estimates: check them against local data before science or instrument time.

Notes
-----
Segmenting a 3-D dust map into clouds by thresholding it and labelling connected regions is
common practice in 3-D extinction mapping (the maps themselves: Lallement et al. 2019, A&A
625, A135; Leike & Ensslin 2019, A&A 631, A32); the contrast against the fitted layer, the
step fit to the footprint's tracers for distance and significance, and the "nearer than" rule
are dustkit's own (a mixture likelihood for a tracer in front of or behind a step is common
practice in 3-D extinction work).
Connected components of a sparse graph: scipy.sparse.csgraph.
"""

import numpy as np
from astropy import units as u
from astropy.table import QTable
from scipy import sparse, stats
from scipy.special import ndtr
from scipy.sparse.csgraph import connected_components

from .._lib import healpix
from .._lib.progress import progress
from .._lib.sky import separation_deg
from .._lib.validation import check_int, check_real, param_error, to_scalar
from ..answers import CAUTION
from ..exceptions import ModelNotFittedError

__all__ = ["density_features", "significant_features", "probability_threshold", "DENSITY_METHOD", "KIND_LOCATED",
           "KIND_NEARER", "MIN_PROBABILITY", "FALSE_RATE", "MIN_MODEL_PROBABILITY", "MIN_CONTRAST", "MIN_DELTA_AV",
           "MIN_SUPPORT_NEARER"]

#: One-line description of the method, stored in table metadata.
DENSITY_METHOD = (
    "connected over-densities of the 3-D density model's posterior mode (contrast against the smooth layer), "
    "significance = the footprint's tracers' posterior probability (a step at a marginalised distance, each tracer "
    "in front or behind by its own distance error) of adding more than min_delta_av through the peak pixel; "
    "at least min_support tracers must show it"
)

#: Least significance of a listed feature, whatever the number of candidates (see "Why these defaults").
MIN_PROBABILITY = 0.99
#: Default chance, over a whole search, that a region its tracers do not support passes the significance
#: threshold (the look-elsewhere correction: ``1 - FALSE_RATE / n_candidates``; see "Why these defaults").
FALSE_RATE = 0.1
#: Default least posterior probability of the model itself (its samples) that a listed feature adds more
#: than ``min_delta_av`` (see "Why these defaults").
MIN_MODEL_PROBABILITY = 0.75
#: Default least contrast of a candidate cell against the smooth layer.
MIN_CONTRAST = 1.3
#: Default least extinction (mag) a listed feature adds through its peak pixel (see "Why these defaults").
MIN_DELTA_AV = 0.25

#: Default least number of tracers showing a 'nearer than' feature (no tracer in front corroborates it).
MIN_SUPPORT_NEARER = 3

KIND_LOCATED = "located"
KIND_NEARER = "nearer than"

_CORE_FRACTION = 0.5  # core: member pixels whose excess column is at least this fraction of the peak's (bracket)
_FOOTPRINT_FRACTION = 0.25  # footprint: the same at a quarter of the peak's (tracers counted in front and behind)
_SADDLE = 0.7  # sky basins of a region are joined where their common border holds this fraction of the lower peak
_DEPTH_TOL = 0.2  # ... and their peaks' excess-weighted ln distances differ by less than this (about 22%)
_REACH = 1.4  # the distance likelihood searches the region's distance range widened by this factor each way
_OUTLIER_SHARE, _OUTLIER_SD = 0.05, 1.5  # the likelihood's broad component for wrong members (share, mag)
_SCALES = np.linspace(0.0, 2.0, 21)  # the scale on the model's column (flat prior, none to twice), marginalised
_SCATTER = np.array([0.0, 0.05, 0.1, 0.2, 0.35])  # mag: the footprint's common scatter, marginalised likewise
_STEP_TRACERS = 2000  # at most this many of a footprint's tracers (a fixed random subset) enter the step fit


def _check_model(model):
    if not (hasattr(model, "samples_") or (hasattr(model, "fit") and hasattr(model, "active_radius"))):
        raise param_error("model", "a fitted DensityModel (for a binned ExtinctionModel use "
                          "dustkit.features.detect_features)", type(model).__name__)
    if not hasattr(model, "av_"):
        raise ModelNotFittedError("This DensityModel is not fitted yet. Hint: call model.fit(tracers) first, "
                                  "or load a saved model with dustkit.load_model(path).")


def _layer_nodes(model, b_deg, edges):
    n = b_deg.size
    return model.layer_.av_pc(np.repeat(b_deg, edges.size), np.tile(edges, n)).reshape(n, edges.size)


def _regions(cand, neighbours_slot):
    """Connected components of candidate cells (P, K); returns (slot, bin, label) of candidate cells."""
    a, k = np.nonzero(cand)
    n = a.size
    if n == 0:
        return a, k, np.zeros(0, int), 0
    p_count, k_count = cand.shape
    cell_id = np.full(cand.shape, -1, np.int64)
    cell_id[a, k] = np.arange(n)
    src, dst = [], []
    for j in range(neighbours_slot.shape[0]):  # 9 sky offsets (self + 8 neighbours) x 3 depth offsets
        nb = neighbours_slot[j, a]
        for dk in (-1, 0, 1):
            kk = k + dk
            ok = (nb >= 0) & (kk >= 0) & (kk < k_count)
            other = np.full(n, -1, np.int64)
            other[ok] = cell_id[nb[ok], kk[ok]]
            keep = other >= 0
            src.append(np.nonzero(keep)[0])
            dst.append(other[keep])
    src, dst = np.concatenate(src), np.concatenate(dst)
    graph = sparse.coo_matrix((np.ones(src.size), (src, dst)), shape=(n, n))
    n_reg, label = connected_components(graph, directed=False)
    return a, k, label, n_reg


def _sky_basins(ca, ck, label, excess, ln_mid, neighbours_slot):
    """Split regions on the sky into the basins of their excess-column peaks; returns new labels per cell.

    Each region's member pixels carry its excess column (summed over the region's cells at
    the pixel) and their excess-weighted ln distance; every pixel climbs to its highest
    neighbour within the region, pixels that reach the same peak form a basin, and two
    basins are joined where a common border (the lower column of two adjacent pixels) holds
    at least ``_SADDLE`` of the lower peak and their peaks' ln distances differ by less than
    ``_DEPTH_TOL``. Returns the cells' new labels and their number.
    """
    if ca.size == 0:
        return label, 0
    p_count = excess.shape[0]
    key = label.astype(np.int64) * p_count + ca
    nodes, inv = np.unique(key, return_inverse=True)
    w = np.maximum(excess[ca, ck], 0.0)
    col = np.bincount(inv, w, nodes.size)
    ln_d = np.bincount(inv, w * ln_mid[ck], nodes.size) / np.maximum(col, 1e-12)
    n_lab, n_slot = nodes // p_count, nodes % p_count
    nbr = np.full((neighbours_slot.shape[0], nodes.size), -1, np.int64)
    for j in range(neighbours_slot.shape[0]):
        other = neighbours_slot[j, n_slot]
        k2 = n_lab * p_count + np.maximum(other, 0)
        pos = np.clip(np.searchsorted(nodes, k2), 0, nodes.size - 1)
        nbr[j] = np.where((other >= 0) & (nodes[pos] == k2), pos, -1)
    ncol = np.where(nbr >= 0, col[np.maximum(nbr, 0)], -np.inf)
    up = nbr[np.argmax(ncol, axis=0), np.arange(nodes.size)]   # self is row 0: a peak points to itself
    for _ in range(64):
        nxt = up[up]
        if np.array_equal(nxt, up):
            break
        up = nxt
    root = up
    # join neighbouring basins over a high common border at a like distance
    a_idx = np.repeat(np.arange(nodes.size)[None, :], nbr.shape[0], axis=0).ravel()
    b_idx = nbr.ravel()
    ok = (b_idx >= 0) & (root[a_idx] != root[np.maximum(b_idx, 0)])
    a_idx, b_idx = a_idx[ok], b_idx[ok]
    sad = np.minimum(col[a_idx], col[b_idx])
    low_peak = np.minimum(col[root[a_idx]], col[root[b_idx]])
    join = (sad >= _SADDLE * low_peak) & (np.abs(ln_d[root[a_idx]] - ln_d[root[b_idx]]) < _DEPTH_TOL)
    graph = sparse.coo_matrix((np.ones(int(join.sum())), (root[a_idx[join]], root[b_idx[join]])),
                              shape=(nodes.size, nodes.size))
    _, basin = connected_components(graph, directed=False)
    _, new = np.unique(basin[root][inv], return_inverse=True)
    return new, int(new.max()) + 1 if new.size else 0


def _weighted_sky(lc, bc, w):
    """Weighted centre (deg) of positions on the sphere, and the weighted RMS offset per axis (deg)."""
    l, b = np.deg2rad(lc), np.deg2rad(bc)
    vec = np.column_stack([np.cos(b) * np.cos(l), np.cos(b) * np.sin(l), np.sin(b)])
    c = np.sum(w[:, None] * vec, axis=0)
    c = c / np.linalg.norm(c)
    cl = np.rad2deg(np.arctan2(c[1], c[0])) % 360.0
    cb = np.rad2deg(np.arcsin(np.clip(c[2], -1.0, 1.0)))
    off = separation_deg(lc, bc, cl, cb)
    return cl, cb, float(np.sqrt(np.sum(w * off**2) / (2.0 * np.sum(w))))


def density_features(model, *, min_contrast=MIN_CONTRAST, min_excess=0.2 * u.mag / u.kpc, min_delta_av=MIN_DELTA_AV * u.mag,
                     min_probability=None, false_rate=FALSE_RATE, min_model_probability=MIN_MODEL_PROBABILITY,
                     min_front=2, min_support=2, min_support_nearer=MIN_SUPPORT_NEARER, quiet=None):
    """Dust features of a fitted 3-D density model: compact over-densities with their significance.

    See :mod:`dustkit.features.density` for the method, the reasoning behind the defaults
    and the cautions. No cone radius is needed: the model's own cells are searched.

    Parameters
    ----------
    model : DensityModel
        A fitted :class:`~dustkit.density.DensityModel` (with posterior samples).
    min_contrast : float
        Least ratio of the model's differential extinction to the smooth layer's in a
        candidate cell (default 1.3).
    min_excess : Quantity['mag / length']
        Least excess of a candidate cell's differential extinction over the layer's
        (default 0.2 mag/kpc).
    min_delta_av : Quantity['mag']
        Least extinction a feature must add through its peak pixel (default 0.25 mag, ``MIN_DELTA_AV``).
    min_probability : float, optional
        Least posterior probability, from the feature's tracers, that it adds more than
        ``min_delta_av`` (see step 4 of the module notes). Default: corrected for the
        look-elsewhere effect of testing ``n_candidates`` regions,
        ``max(0.99, 1 - false_rate / n_candidates)`` (:func:`probability_threshold`); a value
        given here is used as it is.
    false_rate : float or None
        The chance, over the whole search, that a region its tracers do not support is listed
        (default 0.1, ``FALSE_RATE``; used when ``min_probability`` is not given; None: 0.99
        whatever the number of candidates).
    min_model_probability : float
        Least posterior probability of the model itself (``model_significance``, from its
        posterior samples) that the feature adds more than ``min_delta_av`` (default 0.75,
        ``MIN_MODEL_PROBABILITY``; 0 lists what the tracers alone support).
    min_front : int
        Fewer tracers than this in front of a feature (that do not show its extinction)
        make it a ``'nearer than'`` feature (default 2: one could be a wrong member).
    min_support : int
        Least number of tracers in the feature's footprint that show its extinction; a
        region that fewer tracers show is not listed (default 2: a lone tracer could be a
        wrong member, and the model then draws a cloud around it).
    min_support_nearer : int
        The same for a ``'nearer than'`` feature (default 3, ``MIN_SUPPORT_NEARER``, and at
        least ``min_support``): with no tracer in front to say otherwise, two wrong members
        near each other on the sky make a confident cloud.
    quiet : bool, optional
        Hide the progress bar (default: the model's setting; shown only on a terminal).

    Returns
    -------
    QTable
        One row per significant feature, nearest first, columns:
        ``feature`` (id), ``kind`` (``'located'`` or ``'nearer than'``), ``l``, ``b``
        (extinction-weighted centre, deg), ``extent`` (deg; weighted RMS angular offset of
        the member pixels per axis, with a pixel's own size: a Gaussian-sigma-like radius),
        ``extent_pc`` (the same in pc at the feature's distance, or at its upper distance),
        ``depth`` (pc; extinction-weighted RMS in distance, the model's resolution
        included), ``distance``, ``distance_err`` (pc; the posterior mean of a step fitted to the
        footprint's tracers, and its uncertainty: that posterior's spread, at least what the
        tracers' bracket allows, see step 6 of the module notes; NaN for ``'nearer than'``), ``distance_upper`` (pc; for ``'nearer than'``, NaN otherwise),
        ``distance_front``, ``distance_behind`` (pc; the tracers' bracket of the feature, see
        step 6 of the module notes, NaN where no tracer closes a side), ``distance_near``,
        ``distance_far`` (pc; the region's distance range), ``delta_av``,
        ``delta_av_err`` (mag; added extinction through the peak pixel and half its 16-84
        range over samples), ``delta_av_max`` (mag; largest member-pixel column of the
        mode), ``contrast`` (largest cell contrast), ``n_tracers`` (tracers in the
        footprint: member pixels with at least a quarter of the peak's column), ``n_front``, ``n_behind``, ``n_pixels``, ``n_cells`` and
        ``significance`` (the tracers' posterior probability of adding more than
        ``min_delta_av``), ``model_significance`` (the model's, from its posterior samples).
        ``meta`` holds the settings, ``nside``,
        ``ordering``, ``coordsys``, ``n_candidates`` (regions tested), ``n_unsupported``
        (candidates shown by fewer than ``min_support`` tracers, not listed), ``n_model_doubts``
        (supported candidates whose ``model_significance`` is below ``min_model_probability``,
        not listed),
        ``expected_false`` (the sum of 1 - significance over the listed features: the number
        of them expected to be chance, if the posterior is right), ``method``, ``caution``
        and ``resolution`` (the model's correlation length).
    """
    _check_model(model)
    min_contrast = check_real("min_contrast", min_contrast, 1.0, np.inf, low_inclusive=False)
    exc_min = to_scalar("min_excess", min_excess, u.mag / u.kpc, default_unit=u.mag / u.kpc)
    check_real("min_excess", exc_min, 0.0, np.inf)
    dav_min = to_scalar("min_delta_av", min_delta_av, u.mag, default_unit=u.mag)
    check_real("min_delta_av", dav_min, 0.0, np.inf)
    if min_probability is not None:
        min_probability = check_real("min_probability", min_probability, 0.0, 1.0)
    false_rate = _check_rate(false_rate)
    min_model_probability = check_real("min_model_probability", min_model_probability, 0.0, 1.0)
    min_front = check_int("min_front", min_front, 0, 1000)
    min_support = check_int("min_support", min_support, 0, 1000)
    min_support_nearer = max(check_int("min_support_nearer", min_support_nearer, 0, 1000), min_support)

    grid = model.grid_
    e = grid.distance_edges
    mid = 0.5 * (e[1:] + e[:-1])
    width_kpc = np.diff(e) / 1000.0
    pix = np.asarray(model.active_pixels_)
    lc, bc = grid.pixel_centres(pix)
    av = np.asarray(model.av_, float)[pix]                        # (P, E) posterior mode
    lay = _layer_nodes(model, bc, e)                              # (P, E) the smooth layer
    inc_m, inc_l = np.diff(av, axis=1), np.diff(lay, axis=1)      # (P, K) added per bin
    with np.errstate(divide="ignore", invalid="ignore"):
        contrast = np.where(inc_l > 0, inc_m / inc_l, np.where(inc_m > 0, np.inf, 1.0))
    excess = inc_m - inc_l
    cand = (contrast >= min_contrast) & (excess / width_kpc >= exc_min)

    slot_of = np.full(grid.npix, -1, np.int64)
    slot_of[pix] = np.arange(pix.size)
    nb = healpix.neighbours(grid.nside, pix, nest=grid.nest)     # (8, P), -1 where none
    nb_slot = np.where(nb >= 0, slot_of[np.maximum(nb, 0)], -1)
    nb_slot = np.vstack([np.arange(pix.size)[None, :], nb_slot])  # self first
    ca, ck, label, n_reg = _regions(cand, nb_slot)
    label, n_reg = _sky_basins(ca, ck, label, excess, np.log(mid), nb_slot)

    samples = np.asarray(model.samples_)                          # (P, E, S) deviations from av_
    tr = model.tracers_
    tl, tb, td, tde, tav, tae = (np.asarray(getattr(tr, k), float)
                                 for k in ("l", "b", "distance", "distance_err", "av", "av_err"))
    tslot = slot_of[grid.pixel(tl, tb)]
    tres = tav - model.layer_.av_pc(tb, np.minimum(td, e[-1]))
    pix_rad = float(np.sqrt(grid.pixel_area.to_value(u.deg**2) / np.pi))

    order = np.argsort(label, kind="stable")
    bounds = np.searchsorted(label[order], np.arange(n_reg + 1))
    rows = []
    bar = progress(range(n_reg), desc="features", quiet=getattr(model, "quiet", None) if quiet is None else quiet)
    for r in bar:  # one pass per candidate region (a few to a few hundred), vectorised inside
        cells = order[bounds[r]:bounds[r + 1]]
        row = _measure(cells, ca, ck, av, lay, inc_m, inc_l, excess, contrast, samples, mid, e, lc, bc, pix_rad,
                       tslot, td, tde, tres, tae, dav_min, min_front)
        rows.append(row)
    supported = [r for r in rows if r["_support"] >= (min_support_nearer if r["kind"] == KIND_NEARER else min_support)]
    listed = [r for r in supported if r["model_significance"] >= min_model_probability]
    t = _table(listed)
    t.meta.update({
        "nside": grid.nside, "ordering": grid.ordering.upper(), "coordsys": "G", "min_contrast": min_contrast,
        "min_excess_mag_per_kpc": exc_min, "min_delta_av": dav_min,
        "min_front": min_front, "min_support": min_support, "min_support_nearer": min_support_nearer,
        "n_candidates": int(n_reg),
        "n_unsupported": len(rows) - len(supported), "min_model_probability": min_model_probability,
        "n_model_doubts": len(supported) - len(listed), "n_samples": int(samples.shape[2]),
        "resolution": f"correlation length {getattr(model, 'length_', float('nan')):.0f} pc",
        "method": DENSITY_METHOD, "caution": CAUTION,
    })
    return significant_features(t, min_probability, false_rate=false_rate)


def _check_rate(false_rate):
    if false_rate is None:
        return None
    return check_real("false_rate", false_rate, 0.0, 1.0, low_inclusive=False)


def probability_threshold(n_candidates, false_rate=FALSE_RATE):
    """The least significance of a listed feature when ``n_candidates`` regions were tested.

    ``max(MIN_PROBABILITY, 1 - false_rate / n_candidates)``: each candidate is held to
    ``false_rate / n_candidates``, so that over the whole search the chance of listing a
    region its tracers do not support is at most ``false_rate`` (Bonferroni's bound, the
    usual correction for the look-elsewhere effect), and never below 0.99. ``false_rate=None``
    gives 0.99 whatever the number of candidates.
    """
    n = check_int("n_candidates", n_candidates, 0, 10**9)
    false_rate = _check_rate(false_rate)
    if false_rate is None:
        return MIN_PROBABILITY
    return float(max(MIN_PROBABILITY, 1.0 - false_rate / max(n, 1)))


def significant_features(features, min_probability=None, false_rate=FALSE_RATE):
    """The features of a :func:`density_features` table with a significance of at least ``min_probability``.

    ``density_features(model, min_probability=p)`` equals
    ``significant_features(density_features(model, min_probability=0), p)``: the search is
    made once and the threshold applied after (what the explorer's slider does); likewise
    with the look-elsewhere threshold (``min_probability=None``), from the table's
    ``meta['n_candidates']``. Features keep their order (nearest first) and are numbered
    again from 1; ``meta['min_probability']`` is set to the threshold used,
    ``meta['false_rate']`` to ``false_rate`` (None when ``min_probability`` was given) and
    ``meta['expected_false']`` to the sum of 1 - significance over the kept features.

    Parameters
    ----------
    features : QTable
        A table of :func:`density_features` (column ``significance``).
    min_probability : float, optional
        Least posterior probability that a feature adds more than the table's
        ``min_delta_av``. Default: :func:`probability_threshold` of the table's number of
        candidate regions and ``false_rate``.
    false_rate : float or None
        See :func:`density_features` (default 0.1, ``FALSE_RATE``).

    Returns
    -------
    QTable
    """
    if not {"significance", "model_significance"} <= set(getattr(features, "colnames", ())):
        # a detect_features table has a 'significance' too, but a BIC improvement (10, 25, ...), not a probability
        raise param_error("features", "a table of density_features (with 'significance' and 'model_significance' "
                          "columns; a detect_features table's significance is a BIC improvement: cut it with "
                          "table[table['significance'] >= value])", getattr(features, "colnames", type(features).__name__))
    if min_probability is None:
        n_cand = getattr(features, "meta", {}).get("n_candidates")
        if n_cand is None:
            raise param_error("min_probability", "a value: the table's meta has no 'n_candidates' to correct "
                              "for the look-elsewhere effect (give min_probability=0.99, say)", None)
        min_probability = probability_threshold(n_cand, false_rate)
    else:
        min_probability = check_real("min_probability", min_probability, 0.0, 1.0)
        false_rate = None
    t = features[np.asarray(features["significance"], float) >= min_probability]
    t["feature"] = np.arange(1, len(t) + 1)
    t.meta["min_probability"] = min_probability
    t.meta["false_rate"] = false_rate
    t.meta["expected_false"] = float(np.sum(1.0 - np.asarray(t["significance"], float)))
    return t


def _bracket(d_t, de_t, shows, dist, near_edge, far_edge):
    """The tracers' bracket of a cloud and the distance spread it allows (pc); see step 6 of the notes.

    Returns the bracket's ends (the tracers around the best split, NaN where no tracer closes
    a side) and the RMS offset of ``dist`` from a cloud anywhere in the bracket.
    """
    order = np.argsort(d_t, kind="stable")
    d, de, sh = d_t[order], de_t[order], shows[order]
    n = d.size
    # split s puts tracers [0, s) in front and [s, n) behind; misplaced: showing in front, not showing behind
    loss = np.concatenate([[0], np.cumsum(sh)]) + np.concatenate([np.cumsum((~sh)[::-1])[::-1], [0]])
    best = np.flatnonzero(loss == loss.min())
    s_lo, s_hi = int(best.min()), int(best.max())
    lo, s_f = (float(d[s_lo - 1]), float(de[s_lo - 1])) if s_lo > 0 else (near_edge, 0.0)
    hi, s_b = (float(d[s_hi]), float(de[s_hi])) if s_hi < n else (far_edge, 0.0)
    # the spread counts a gap that holds dist; the ends reported are the tracers' own distances
    lo_in, hi_in = min(lo, dist), max(hi, dist)
    centre, gap = 0.5 * (lo_in + hi_in), hi_in - lo_in
    spread = float(np.sqrt((dist - centre) ** 2 + gap**2 / 12.0 + (s_f**2 + s_b**2) / 3.0))
    return (lo if s_lo > 0 else np.nan), (hi if s_hi < n else np.nan), spread


def _probability(delta, delta_s, dav_min):
    """Posterior probability that the added extinction exceeds ``dav_min``; see step 4 of the notes.

    The samples are Gaussian deviations from the mode (a linearised Laplace posterior), so
    ``delta`` is the mean of ``delta_s``; their RMS deviation from it, estimated from the S
    samples, gives a Student t probability with S degrees of freedom.
    """
    sd = float(np.sqrt(np.mean((delta_s - delta) ** 2))) if delta_s.size else 0.0
    if not sd > 0:
        return float(delta > dav_min)
    return float(stats.t.cdf((delta - dav_min) / sd, df=delta_s.size))


def _scale_probability(p_scale, delta, dav_min):
    """Posterior mass of the scales on ``delta`` that add more than ``dav_min``; at most 1 (the sum rounds above)."""
    return min(1.0, float(np.sum(p_scale[_SCALES * delta > dav_min])))


def _excess_each(av, lay, slots, e, x):
    """The model's A_V above the layer in pixel slot ``slots[i]`` at distance ``x[i]`` (pc; linear in the bin)."""
    i = np.clip(np.searchsorted(e, x) - 1, 0, e.size - 2)
    f = (x - e[i]) / (e[i + 1] - e[i])
    return (av[slots, i] - lay[slots, i]) * (1.0 - f) + (av[slots, i + 1] - lay[slots, i + 1]) * f


def _step_posterior(d, de, y, col, err, lo, hi, n_grid=160):
    """A cloud's distance D (posterior mean and spread, pc) and its column's scale (posterior over ``_SCALES``).

    A tracer at measured distance ``d`` (log-normal error ``de``) lies behind a cloud at D
    with probability ``P = Phi((ln d - ln D) / (de / d))``. Its A_V above the model's
    foreground, ``y``, is then ``a col`` (behind) or 0 (in front), each with noise: the
    likelihood is the mixture ``P N(y; a col, v) + (1 - P) N(y; 0, v)``, with ``col`` the
    model's column at the tracer's pixel, ``a`` a scale on it and ``v`` the tracer's error
    squared plus a scatter common to the footprint; a broad component (share
    ``_OUTLIER_SHARE``, sd ``_OUTLIER_SD`` mag) takes wrong members. ``a`` and the scatter
    are marginalised over grids (flat priors; ``a`` from 0, no cloud, to 2), D has a flat
    prior between ``lo`` and ``hi``. Returns the mean and spread of D and the posterior
    probabilities of the scales ``_SCALES`` (D and the scatter marginalised).
    """
    s = np.maximum(de / np.maximum(d, 1.0), 1e-3)
    grid = np.exp(np.linspace(np.log(lo), np.log(hi), n_grid))
    behind = ndtr((np.log(np.maximum(d, 1.0))[None, :] - np.log(grid)[:, None]) / s[None, :])  # (G, n)
    total = np.zeros((grid.size, _SCALES.size, _SCATTER.size))
    for j, extra in enumerate(_SCATTER):
        var = np.maximum(err, 1e-3) ** 2 + extra**2
        wide = var + _OUTLIER_SD**2
        front = np.exp(-0.5 * y**2 / var) / np.sqrt(var)                                 # (n,)
        for i, a in enumerate(_SCALES):
            mu = a * col
            back = np.exp(-0.5 * (y - mu) ** 2 / var) / np.sqrt(var)
            broad = np.exp(-0.5 * (y[None, :] - mu[None, :] * behind) ** 2 / wide) / np.sqrt(wide)
            like = (1.0 - _OUTLIER_SHARE) * (behind * back + (1.0 - behind) * front) + _OUTLIER_SHARE * broad
            total[:, i, j] = np.sum(np.log(np.maximum(like, 1e-300)), axis=1)
    joint = np.exp(total - total.max()) * grid[:, None, None]   # flat in D on a grid even in ln D
    joint /= joint.sum()
    p = joint.sum(axis=(1, 2))                                  # D: the scale and the scatter marginalised
    mean = float(np.sum(p * grid))
    return mean, float(np.sqrt(np.sum(p * (grid - mean) ** 2))), joint.sum(axis=(0, 2))


def _measure(cells, ca, ck, av, lay, inc_m, inc_l, excess, contrast, samples, mid, e, lc, bc, pix_rad,
             tslot, td, tde, tres, tae, dav_min, min_front):
    """Position, size, distance, added extinction, tracers and significance of one region."""
    a, k = ca[cells], ck[cells]
    k_lo, k_hi = int(k.min()), int(k.max()) + 1                   # edges bounding the region's range
    members = np.unique(a)
    w = np.maximum(excess[a, k], 0.0)
    col = np.bincount(np.searchsorted(members, a), w, members.size)  # excess column per member pixel
    peak = members[np.argmax(col)]
    # the mode: centre, extent, distance, depth
    cl, cb, rms = _weighted_sky(lc[members], bc[members], np.maximum(col, 1e-12))
    extent = np.sqrt(rms**2 + pix_rad**2 / 4.0)
    wsum = max(float(w.sum()), 1e-12)
    dist = float(np.sum(w * mid[k]) / wsum)
    depth = float(np.sqrt(np.sum(w * ((mid[k] - dist) ** 2 + ((e[k + 1] - e[k]) ** 2) / 12.0)) / wsum))
    # added extinction through the peak pixel over the region's range: the mode and every sample
    lay_step = lay[peak, k_hi] - lay[peak, k_lo]
    delta = float(av[peak, k_hi] - av[peak, k_lo] - lay_step)
    s = samples[peak]                                             # (E, S)
    delta_s = (av[peak, k_hi] + s[k_hi]) - (av[peak, k_lo] + s[k_lo]) - lay_step
    q16, q84 = np.percentile(delta_s, [16, 84])
    model_significance = _probability(delta, delta_s, dav_min)
    significance = model_significance
    # tracers in the footprint (counted) and in its core (the bracket): who shows the feature's extinction
    in_fp = np.isin(tslot, members[col >= _FOOTPRINT_FRACTION * col.max()])
    ts = tslot[in_fp]
    fore = av[ts, k_lo] - lay[ts, k_lo]                           # model's excess in front of the region
    col_t = (av[ts, k_hi] - av[ts, k_lo]) - (lay[ts, k_hi] - lay[ts, k_lo])
    shows = tres[in_fp] > fore + 0.5 * np.maximum(col_t, 0.0)
    d_t, de_t = td[in_fp], tde[in_fp]
    # the distance: the tracers' step likelihood (see step 6 of the module notes), where two or more
    # tracers of the footprint can place it; else the excess-weighted distance of the mode
    if ts.size >= 2:
        lo, hi = max(e[k_lo] / _REACH, e[1]), min(e[k_hi] * _REACH, e[-1])
        # y: each tracer's A_V above the layer less the model's excess at its distance outside
        # the region (other structure in front or behind); col: the region's own column at its pixel
        own_lo, own_hi = av[ts, k_lo] - lay[ts, k_lo], av[ts, k_hi] - lay[ts, k_hi]
        inside = _excess_each(av, lay, ts, e, np.clip(d_t, e[k_lo], e[k_hi])) - own_lo
        y_all = tres[in_fp] - (_excess_each(av, lay, ts, e, np.minimum(d_t, e[-1])) - inside)
        col_all = np.maximum(own_hi - own_lo, 1e-3)
        use = np.arange(ts.size)
        if ts.size > _STEP_TRACERS:  # a fixed random subset: the step's posterior is set long before
            use = np.sort(np.random.default_rng(0).choice(ts.size, _STEP_TRACERS, replace=False))
        dist, lik_sd, p_scale = _step_posterior(d_t[use], de_t[use], y_all[use], col_all[use], tae[in_fp][use], lo, hi)
        # significance: the tracers' posterior probability that the cloud adds more than
        # dav_min through the peak pixel (the model's column there, delta, times the scale)
        significance = _scale_probability(p_scale, delta, dav_min)
    else:  # the mode's distance: its spread over the samples (excess-weighted over the region's cells)
        inc_s = np.diff(av[a][:, :, None] + samples[a], axis=1)       # (n_cells_pixels, K, S)
        ws = np.maximum(inc_s[np.arange(a.size), k] - inc_l[a, k][:, None], 0.0)  # (n_cells, S)
        d_s = np.sum(ws * mid[k][:, None], axis=0) / np.maximum(ws.sum(axis=0), 1e-12)
        spread = float(np.std(d_s, ddof=1)) if d_s.size > 1 else 0.0
        lik_sd = float(np.sqrt(spread**2 + (float(np.sum(w * (e[k + 1] - e[k])) / wsum)) ** 2 / 12.0))
    n_front, n_behind = int(np.sum(~shows & (d_t < dist))), int(np.sum(shows & (d_t > dist)))
    core = np.isin(ts, members[col >= _CORE_FRACTION * col.max()])
    d_front, d_behind, bracket = _bracket(d_t[core], de_t[core], shows[core], dist, float(e[k_lo]), float(e[k_hi]))
    # the distance error: the likelihood's spread, at least what the tracers' bracket allows (the same
    # tracers inform both, so they are not added)
    dist_err = float(max(lik_sd, bracket))
    kind, upper = KIND_LOCATED, float("nan")
    if n_front < min_front:
        kind = KIND_NEARER
        reach = np.sort(d_t[shows] + 2.0 * de_t[shows])
        upper = float(reach[1] if reach.size > 1 else (reach[0] if reach.size else e[k_hi]))
    delta_max = float(np.max((av[members, k_hi] - av[members, k_lo]) - (lay[members, k_hi] - lay[members, k_lo])))
    at = dist if kind == KIND_LOCATED else upper
    return {
        "kind": kind, "l": cl, "b": cb, "extent": extent, "extent_pc": np.deg2rad(extent) * at, "depth": depth,
        "distance": dist if kind == KIND_LOCATED else np.nan, "distance_err": dist_err if kind == KIND_LOCATED else np.nan,
        "distance_upper": upper, "distance_front": d_front, "distance_behind": d_behind, "distance_near": float(e[k_lo]), "distance_far": float(e[k_hi]),
        "delta_av": delta, "delta_av_err": float(0.5 * (q84 - q16)), "delta_av_max": delta_max,
        "contrast": float(np.max(contrast[a, k])), "n_tracers": int(in_fp.sum()), "n_front": n_front,
        "n_behind": n_behind, "n_pixels": int(members.size), "n_cells": int(a.size), "significance": significance,
        "model_significance": model_significance,
        "_order": dist if kind == KIND_LOCATED else upper, "_support": int(np.sum(shows)),
    }


_UNITS = {"l": u.deg, "b": u.deg, "extent": u.deg, "extent_pc": u.pc, "depth": u.pc, "distance": u.pc,
          "distance_err": u.pc, "distance_upper": u.pc, "distance_front": u.pc, "distance_behind": u.pc, "distance_near": u.pc, "distance_far": u.pc,
          "delta_av": u.mag, "delta_av_err": u.mag, "delta_av_max": u.mag}
_COLUMNS = ("kind", "l", "b", "extent", "extent_pc", "depth", "distance", "distance_err", "distance_upper",
            "distance_front", "distance_behind", "distance_near", "distance_far", "delta_av", "delta_av_err", "delta_av_max", "contrast", "n_tracers",
            "n_front", "n_behind", "n_pixels", "n_cells", "significance", "model_significance")
_INTEGER = ("n_tracers", "n_front", "n_behind", "n_pixels", "n_cells")


def _table(rows):
    rows = sorted(rows, key=lambda r: r["_order"])
    t = QTable()
    t["feature"] = np.arange(1, len(rows) + 1)
    for c in _COLUMNS:
        if c == "kind":
            t[c] = np.array([r[c] for r in rows], dtype="U11")
        elif c in _INTEGER:
            t[c] = np.array([r[c] for r in rows], dtype=int)
        else:
            vals = np.array([r[c] for r in rows], dtype=float)
            t[c] = vals * _UNITS[c] if c in _UNITS else vals
    return t
