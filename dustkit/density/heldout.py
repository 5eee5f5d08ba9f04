"""What held-out tracers tell the density model beyond its prior: misses, raised cells, unresolved parts.

The density model (:mod:`dustkit.density.estimator`) scores every candidate prior on
tracers held out in spatially blocked folds. From those held-out residuals this module
derives: the unresolved fractions of extinction (:func:`fit_unresolved_fractions`), each
tracer's miss beyond its predicted spread (:func:`held_out_excess`), the local variance the
cells cannot resolve (:func:`unresolved_variance`), the cells whose prior amplitude is raised
where tracers behind them missed (:func:`cell_boost`), and the background amplitude once
those cells carry the clouds (:func:`compare_background`). Two more variances come from the
fitted model and its own tracers: its local bias (:func:`local_bias_variance`) and where a
rise sits between two tracers of a sight line (:func:`placement_variance`). Plain numpy
arrays throughout.
"""

import numpy as np
from scipy import optimize, sparse
from scipy.spatial import cKDTree

from .._lib import healpix
from .lattice import chord, unit_vectors
from .solver import NU

__all__ = ["LOWEST_AMPLITUDE", "EVIDENCE_MARGIN", "OUTLIER_Z", "ERROR_SIGNIFICANCE", "excess_noise", "layer_increments",
           "fit_unresolved_fractions", "held_out_excess", "cell_boost", "unresolved_variance", "compare_background",
           "placement_variance"]

#: Smallest background amplitude the second comparison (with raised cells) may choose.
LOWEST_AMPLITUDE = 0.01
#: A held-out tracer that the fit with it inside misses by more than this many of its own errors
#: is a wrong member: its miss raises no cell (a Student-t of 4 degrees of freedom lies beyond 8
#: with probability 0.0013: about three of 2 500 tracers by chance).
OUTLIER_Z = 8.0
#: Standard errors of its noise by which the kernel mean of held-out tracers' excess is lowered
#: (and kept only where it stays above zero) before it raises a cell of the prior the answers'
#: errors are drawn under (``dustkit.density.estimator._error_prior``): each tracer's excess has
#: the null variance ``2 V^2`` (its squared residual less its predicted variance ``V``), so a
#: handful of tracers that missed by chance raise a node's mean by about one standard error. A
#: one-sided 2-sigma bar (2.3% of the nodes under noise alone; common practice). With the misses
#: taken as they come, in the invented galaxy of ``benchmarks/accuracy.py`` with no cloud at all
#: (``plain``) 1 300-1 600 pixels were raised, most to the cap, and 0.98 of the truths lay inside
#: 1 sigma (``benchmarks/README.md``, stop 35).
ERROR_SIGNIFICANCE = 2.0
#: Rise of the log-evidence by which each further third of the background amplitude must win
#: ("very strong" evidence, a Bayes factor above e^5 ~ 150; Kass & Raftery 1995, JASA 90, 773).
EVIDENCE_MARGIN = 5.0


def layer_increments(layer, b_deg, edges):
    n = np.size(b_deg)
    cum = layer.av_pc(np.repeat(b_deg, edges.size), np.tile(edges, n)).reshape(n, edges.size)
    return np.maximum(np.diff(cum, axis=1), 0.0)


def fit_unresolved_fractions(resid, pvar, err, base, struct):
    """Unresolved fractions by maximum Student-t likelihood of held-out residuals; returns (tau, tau_s, score).

    ``tau`` is the fraction of all extinction the cells cannot resolve, ``tau_s`` the
    fraction of the extinction the model attributes to structure beyond the layer
    (``struct``): clouds and clumps carry more unresolved structure of their own (their
    edges and cores inside a cell) than the smooth dust around them.
    """
    def nll(p):
        v = pvar + err**2 + (p[0] * base) ** 2 + (p[1] * struct) ** 2
        z2 = resid**2 / v
        return float(np.mean(0.5 * np.log(v) + 0.5 * (NU + 1.0) * np.log1p(z2 / NU)))

    best = min(((t, ts) for t in (0.0, 0.03, 0.1) for ts in (0.0, 0.1, 0.3)), key=nll)
    res = optimize.minimize(nll, best, method="L-BFGS-B", bounds=[(0.0, 1.0), (0.0, 2.0)])
    return float(res.x[0]), float(res.x[1]), float(res.fun)


def cell_boost(grid, layer, pixels, l, b, d, excess, weight, amplitude, length, max_amplitude=2.0, shortest=60.0,
               x=None):
    """Per-cell factor on the prior amplitude and per-cell correlation length (n_bins, n_pix), from held-out misses.

    The excess variance of held-out tracers (squared residual beyond its predicted
    variance), spread on the sky and in log distance as for the unresolved variance, and
    made non-decreasing with distance, says how much extinction variance the prior missed
    out to each distance; its growth across a bin, ``dX_k``, sits in that bin. A cell whose
    prior spread of extinction is ``s inc_k`` (``inc_k``: the layer's extinction in the bin)
    gets ``boost^2 = 1 + dX_k / (s inc_k)^2``: compact clouds get the freedom they need
    where tracers behind them miss and tracers in front do not, without loosening the prior
    of the smooth rest of the sky. Capped so that ``s boost`` stays at most
    ``max_amplitude``. A raised cell also gets a correlation length along the sight line
    shorter by the same factor (at least ``shortest`` pc): the structure it stands for is
    compact, and a long length would smear it in depth. An empirical-Bayes, non-stationary
    (heavier-tailed) prior.
    """
    e = grid.distance_edges
    _, bc = grid.pixel_centres(pixels)
    if x is None:
        x = unresolved_variance(grid, l, b, d, excess, weight, pixels=pixels)        # (P, E)
    dx = np.diff(np.maximum.accumulate(x, axis=1), axis=1)              # (P, K)
    inc = layer_increments(layer, bc, e)                               # (P, K)
    boost2 = 1.0 + dx / np.maximum((amplitude * inc) ** 2, 1e-12)
    boost = np.minimum(np.sqrt(boost2), max(max_amplitude / amplitude, 1.0)).T   # (K, P)
    return boost, np.clip(length / boost, min(shortest, length), length)


def unresolved_variance(grid, l, b, d, excess, weight, sky_deg=2.0, depth=0.3, prior_weight=3.0, pixels=None,
                        noise=None, k=0.0):
    """Local variance the cells miss (npix, n_edges), from held-out tracers' excess squared residuals.

    Each tracer's excess (its held-out squared residual beyond the predicted variance)
    spreads over nodes within a Gaussian of ``sky_deg`` on the sky and ``depth`` in log
    distance, averaged with ``prior_weight`` tracers' worth of zero (so a lone miss does
    not inflate a whole region). Zero far from tracers, where the prior's spread rules.
    With ``noise`` (each tracer's null variance of its excess, :func:`excess_noise`) and ``k``,
    the mean is lowered by ``k`` standard errors of its noise (the squared kernel, a Gaussian
    narrower by sqrt(2), weighs the noise) and kept where it stays above zero.
    """
    den, num = _node_sums(grid, l, b, d, (weight, weight * excess), sky_deg, depth, pixels)
    mean = num / (den + prior_weight)
    if noise is not None and k > 0:
        (s2,) = _node_sums(grid, l, b, d, (weight**2 * noise,), sky_deg / np.sqrt(2.0), depth / np.sqrt(2.0), pixels)
        mean = mean - k * np.sqrt(np.maximum(s2, 0.0)) / (den + prior_weight)
    out = np.zeros((den.shape[0], den.shape[1] + 1))
    out[:, 1:] = np.maximum(mean, 0.0)
    return out


def _node_sums(grid, l, b, d, columns, sky_deg, depth, pixels=None):
    """Kernel-weighted sums at the nodes (n_out, n_edges - 1), one per per-tracer array in ``columns``.

    The kernel is a Gaussian of ``sky_deg`` on the sky (cut at 3 widths) times a Gaussian of
    ``depth`` in ln distance, at every edge but the first. The tracers are first summed into
    cells of the grid's pixels x 0.05-wide bins of ln distance (each moved to its pixel's
    centre, well inside the sky kernel, and by at most 0.025 in ln distance against
    ``depth``), then spread from the cells: memory and time grow with the cells, not with
    pixel-tracer pairs (10^8 pairs for 10^5 field stars), and the cells and the kernel are
    built once for all the columns.
    """
    e = grid.distance_edges
    lc, bc = grid.pixel_centres(pixels)
    src, cell = np.unique(grid.pixel(l, b), return_inverse=True)
    lnd = np.log(np.maximum(d, 1.0))
    step = 0.05
    m = np.floor((lnd - lnd.min()) / step).astype(np.int64)
    n_m = int(m.max()) + 1
    flat = cell * n_m + m
    size = src.size * n_m
    centres = lnd.min() + (np.arange(n_m) + 0.5) * step
    depth_w = np.exp(-0.5 * ((np.log(np.maximum(e[1:], 1e-9))[:, None] - centres[None, :]) / depth) ** 2)  # (E-1, M)
    ls, bs = grid.pixel_centres(src)
    pairs = cKDTree(unit_vectors(lc, bc)).sparse_distance_matrix(cKDTree(unit_vectors(ls, bs)), chord(3 * sky_deg),
                                                                   output_type="ndarray")  # zero distances kept
    ang = np.rad2deg(2 * np.arcsin(np.clip(pairs["v"] / 2, 0, 1)))
    ksky = sparse.csr_matrix((np.exp(-0.5 * (ang / sky_deg) ** 2), (pairs["i"], pairs["j"])), shape=(lc.size, src.size))
    return [ksky @ (np.bincount(flat, c, minlength=size).reshape(src.size, n_m) @ depth_w.T) for c in columns]


def local_bias_variance(grid, l, b, d, resid, weight, sky_deg, rng, depth=0.3, prior_weight=3.0):
    """Squared local bias of the fitted model (npix, n_edges), from the residuals of its own tracers.

    Where the model smooths over structure smaller than its kernels (a compact cloud in a
    dense catalogue), its own tracers there sit on one side of it, more than their noise
    allows. The tracers are split at random into two halves; in each, the residuals' local
    mean ``m`` (averaged over nodes as :func:`unresolved_variance` averages the held-out
    excess, but signed) and its noise variance ``v`` (the local mean square over the
    summed kernel weight: generous, as the kernel's weights are at most 1). The product
    ``m_1 m_2`` has the squared bias as its expectation (the two halves' noises are
    independent, so no noise term enters it); it is kept where it exceeds ``sqrt(v_1 v_2)``,
    and is zero elsewhere (so that noise alone, whose clipped product is positive on
    average, adds little). A bias patch smaller than the kernels is diluted.
    """
    half = rng.uniform(size=resid.size) < 0.5
    columns = []
    for part in (half, ~half):
        w = weight * part
        columns += [w, w * resid, w * resid**2]
    sums = _node_sums(grid, l, b, d, columns, sky_deg, depth)
    means, noise = [], []
    for den, s1, s2 in (sums[:3], sums[3:]):
        means.append(s1 / (den + prior_weight))
        noise.append(s2 / (den + prior_weight) / (den + prior_weight))
    prod = means[0] * means[1]
    out = np.zeros((prod.shape[0], prod.shape[1] + 1))
    out[:, 1:] = np.where(prod > np.sqrt(np.maximum(noise[0] * noise[1], 0.0)), prod, 0.0)
    return out


def held_out_excess(av, ae, fitted, resid, pvar, base, tau, censored):
    """What held-out tracers missed beyond their predicted spread (signed; 0 for censored tracers).

    A tracer that even the fit with it inside disagrees with is an outlier (a wrong member),
    not unresolved dust: its excess is weighted down by the Student-t weight of that fit, and
    beyond :data:`OUTLIER_Z` of its errors it counts for nothing. (Weighted only, a wrong
    member 2 mag off demanded as much as two tracers behind a cloud; where the layer holds
    little dust, near the Sun and at high latitude, its cell was raised to the cap and the
    mode followed it: in the invented galaxies of ``benchmarks/accuracy.py``, seeds 1-10, the
    RMS error at |b| > 10 deg was 0.86x / 0.83x the baseline's in the smooth / 'near'
    galaxies, 0.66x / 0.62x with the cut.)
    The structure fraction is left out of the spread: misses behind clouds must raise the
    prior there.
    """
    z_fit = (av - fitted) / np.sqrt(ae**2 + (tau * fitted) ** 2)
    excess = np.where(censored | (np.abs(z_fit) > OUTLIER_Z), 0.0, resid**2 - pvar - ae**2 - (tau * base) ** 2)
    return excess * (NU / (NU + z_fit**2))


def excess_noise(av, ae, fitted, pvar, base, tau, excess):
    """Null variance of each held-out tracer's excess (0 where it counts for nothing).

    A residual ``r`` with predicted variance ``V`` (posterior, distance, own error and the
    unresolved fraction, as in :func:`held_out_excess`) has ``r^2 - V`` of variance ``2 V^2``
    when nothing is missed; times the square of the Student-t weight the excess carries.
    """
    z_fit = (av - fitted) / np.sqrt(ae**2 + (tau * fitted) ** 2)
    v = pvar + ae**2 + (tau * base) ** 2
    return np.where(excess != 0, 2.0 * v**2 * (NU / (NU + z_fit**2)) ** 2, 0.0)


def compare_background(evaluate, raise_cells, amp, length, xi0):
    """The background amplitude once the raised cells carry the clouds: ``amp`` or a third of it, and lower on evidence.

    The search before this had to explain clouds by the amplitude everywhere; with the
    raised cells (``raise_cells(amplitude)`` -> per-cell boost and length) holding the
    clouds' extra variance, the rest of the sky may need less freedom. Both candidates get
    the same extra variance in the raised cells (the same held-out misses), so neither
    gains from them; the held-out score decides. A third that wins is compared with a third
    of itself, down to :data:`LOWEST_AMPLITUDE` (where the truth between the clouds is the
    layer, a floor keeps the errors too wide), but by the marginal likelihood of all the
    tracers: so far down the held-out score hardly tells the candidates apart (paired
    t-values of 0.1-0.3 in the invented galaxies of ``benchmarks/accuracy.py``), and a coin
    toss that narrows the errors is worse than one that leaves them wide. A further third
    must raise the Laplace log-evidence by more than :data:`EVIDENCE_MARGIN`.

    The errors need not take that coin toss either way: where the evidence decided and the
    lower third lost, the amplitude the answers' errors are drawn under is the two
    candidates' prior variances averaged with their posterior odds (equal prior odds, the
    Laplace evidences): ``s_err^2 = (1 - w) s^2 + w (s / 3)^2``, ``w = 1 / (1 + exp(-(E_low
    - E)))``, the prior variance of the two-candidate mixture (the standard marginalisation
    over a hyperparameter; MacKay 1992, Neural Comput. 4, 415). Elsewhere ``s_err = s``.
    In the smooth galaxies of ``benchmarks/accuracy.py`` the gain of the lower third is -2.4
    to +2.9 (no draw reaches the margin): inside 1 sigma 0.85 -> 0.78 over six draws.

    ``evaluate`` returns, last, a function giving its candidate's log-evidence. Returns
    (amplitude, boost, cell_length, xi0, error_amplitude).
    """
    boost, cell_length = raise_cells(amp)
    hi, e_hi, steps, err_amp = None, None, 0, amp
    while amp / 3.0 >= LOWEST_AMPLITUDE:
        if hi is None:
            hi = evaluate(amp, length, xi0, boost, cell_length)
        lower = amp / 3.0
        b_lo, cl_lo = raise_cells(lower)
        lo = evaluate(lower, length, xi0 * 3.0, b_lo, cl_lo)
        e_lo = None
        if steps == 0:
            wins = lo[0][4] < hi[0][4]
        else:
            e_hi = hi[-1]() if e_hi is None else e_hi
            e_lo = lo[-1]()
            wins = e_lo > e_hi + EVIDENCE_MARGIN
            if not wins:
                w = float(1.0 / (1.0 + np.exp(-np.clip(e_lo - e_hi, -50.0, 50.0))))
                err_amp = float(np.sqrt((1.0 - w) * amp**2 + w * lower**2))
        if not wins:
            break
        amp, boost, cell_length, xi0, hi, e_hi = lower, b_lo, cl_lo, lo[1][:, :xi0.shape[1]], lo, e_lo
        err_amp = amp
        steps += 1
    return amp, boost, cell_length, xi0, err_amp


def placement_variance(grid, pixels, excess, l, b, d, de, max_distance, weight=None):
    """Variance (len(pixels), n_edges) of where a rise sits between two tracers of a sight line.

    Between the farthest tracer in front of a node (``d_f``, or the Sun) and the nearest
    behind it (``d_b``) nothing says where the extinction the model adds over the layer
    (``excess``: the mode's cumulative A_V minus the layer's at the pixels' edges) sits: the
    tracers fix only its total ``R`` from ``d_f`` to ``d_b``. The mode spreads ``R`` smoothly
    (the prior's cheapest way); a rise placed anywhere in the gap with equal odds has, at the
    node's fraction ``u`` of the gap, variance ``R^2 u (1 - u)``. The bracketing tracers are
    those of the node's pixel and its eight neighbours; but where the pixel has no tracer of its
    own in front of the node, its foreground is known only from the neighbours, whose tracers
    bracket their own sight lines: a cloud has edges, and a neighbour that shows no rise yet
    does not bound the rise in this pixel, which may sit anywhere from the Sun to the pixel's
    first tracer behind. There the larger of the two variances is kept (with the neighbours
    alone, in front of the clouds of the sparse catalogue of ``benchmarks/accuracy.py``, seeds
    1-6, 0.61 of the truths fell inside 1 sigma, 0.41 in two draws; with this rule 0.70,
    0.47-0.90 per draw, no galaxy's overall coverage moved by more than 0.01, and the 20 000
    field stars, whose pixels hold tracers in front, stayed at 0.65 in front of their clouds;
    with the pixel's own gap kept wherever it is the larger, they went to 0.87). Each
    bracketing tracer's distance error widens the gap (a tracer measured in front of a cloud
    may lie behind it) by a factor ``1 + (de / d) / sqrt(n)``, with ``n`` the tracers of the
    same pixels within that error of it, counted with their ``weight`` (1 / the size of a
    near-duplicate group, so that a catalogue listed twice does not narrow it): many tracers
    together place a rise better than one does (without the ``sqrt(n)`` the 20 000 field stars
    of ``benchmarks/accuracy.py`` had 0.86-0.95 of the truths in front of their clouds inside
    1 sigma). Zero with no tracer behind (the prior's spread rules there) and small where
    tracers are dense (short gaps, small rises). Censored tracers (beyond ``max_distance``)
    close no gap. Vectorised: the tracers' distances are sorted pixel by pixel once, and every
    node finds its two tracers by one binary search.
    """
    own, own_front = _gap_variance(grid, pixels, excess, l, b, d, de, max_distance, weight, False)
    around, _ = _gap_variance(grid, pixels, excess, l, b, d, de, max_distance, weight, True)
    return np.where(own_front, around, np.maximum(own, around))


def _gap_variance(grid, pixels, excess, l, b, d, de, max_distance, weight, neighbours):
    """:func:`placement_variance` with the tracers of each node's own pixel (and of its eight neighbours).

    Returns the variance and whether a tracer stands in front of each node (both (len(pixels), n_edges)).
    """
    e = grid.distance_edges
    n_pix = pixels.size
    slot_of = np.full(grid.npix, -1, np.int64)
    slot_of[pixels] = np.arange(n_pix)
    keep = d <= max_distance
    tp = grid.pixel(l[keep], b[keep])
    around = tp[None, :]
    if neighbours:
        around = np.vstack([around, healpix.neighbours(grid.nside, tp, nest=grid.nest)])   # (9, N)
    slot = np.where(around >= 0, slot_of[np.maximum(around, 0)], -1)
    ok = slot >= 0
    dist = np.broadcast_to(d[keep], slot.shape)[ok]
    frac = np.broadcast_to(np.minimum(de[keep] / np.maximum(d[keep], 1.0), 0.9), slot.shape)[ok]
    w = np.broadcast_to(np.ones(d.size)[keep] if weight is None else np.asarray(weight, float)[keep], slot.shape)[ok]
    if dist.size == 0:                                        # every tracer beyond the grid: no gap is closed
        return np.zeros((n_pix, e.size)), np.zeros((n_pix, e.size), bool)
    order = np.lexsort((dist, slot[ok]))                      # by pixel, then by distance
    owner, dist, frac, w = slot[ok][order], dist[order], frac[order], w[order]
    scale = 2.0 * float(e[-1]) + 1.0                          # one sorted key: pixel, then distance
    node_pix = np.repeat(np.arange(n_pix), e.size)
    node_d = np.tile(e, n_pix)
    key = owner * scale + dist
    i = np.searchsorted(key, node_pix * scale + node_d, side="right")
    front, behind = np.maximum(i - 1, 0), np.minimum(i, dist.size - 1)
    cum_w = np.concatenate([[0.0], np.cumsum(w)])
    crowd = (cum_w[np.searchsorted(key, owner * scale + dist * (1 + frac), side="right")]
             - cum_w[np.searchsorted(key, owner * scale + dist * (1 - frac), side="left")])
    widen = 1.0 + frac / np.sqrt(np.maximum(crowd, 1.0))
    has_front = (i > 0) & (owner[front] == node_pix)
    has_behind = (i < dist.size) & (owner[behind] == node_pix)
    d_f = np.where(has_front, dist[front] / widen[front], 0.0)
    d_b = np.where(has_behind, dist[behind] * widen[behind], 0.0)
    rise = np.maximum(_along(excess, grid, node_pix, d_b) - _along(excess, grid, node_pix, d_f), 0.0)
    u = np.clip((node_d - d_f) / np.maximum(d_b - d_f, 1e-9), 0.0, 1.0)
    return (np.where(has_behind, rise**2 * u * (1.0 - u), 0.0).reshape(n_pix, e.size),
            has_front.reshape(n_pix, e.size))


def _along(values, grid, row, dist):
    """Linear interpolation of node values (rows x edges) at ``dist`` along each ``row``, held past the ends."""
    k, f = grid.edge_position(dist)
    f = np.clip(f, 0.0, 1.0)
    return values[row, k] * (1.0 - f) + values[row, k + 1] * f
