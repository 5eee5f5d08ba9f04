"""Duplicated tracers: exact copies of a row, and near-duplicates (the same name, or the same place
with distance and A_V within their errors, as when two compilations are merged).

Groups are found without Python loops over tracers. Places: rows alone in their cell of a
coarse grid (64 times the tolerance across, cells counted by hashed keys and ``np.bincount``)
and away from its edges are set aside first; the others are sorted by the keys of four grids
of cells twice the separation tolerance across, shifted by half a cell in latitude and in
longitude, with longitude scaled by the cosine of each latitude band's edge farthest from the
equator, so that every pair closer than the tolerance shares a cell in at least one grid at
any l and b; the rows near l = 0/360 are searched once more with the wrap moved. Within a
cell every pair is compared (rows ``k`` apart in the sorted order, for ``k = 1, 2, ...``
while any cell holds more than ``k`` rows), its separation checked exactly, and it is one
tracer only if distance and A_V also agree within ``nsigma`` times their combined errors. So
a crowded field, many distinct stars within the tolerance but at different distances or
reddenings, is not merged. Exact copies repeat every value of a close pair. Names: rows of a
name that occurs more than once are paired when they are within ``SAME_NAME_SEPARATION_ARCMIN``
of each other (the same cell search, with the name's code in each cell's key, so that every
pair of a name group is compared however the rows sort); rows of one name farther apart stay
apart (:func:`keys_apart` finds them for the report). Pairs are joined into groups by connected
components.
"""

import numpy as np
from astropy.table import Table
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from ..exceptions import CatalogError
from .context import empty_duplicates
from .rules import DUPLICATE_NSIGMA, DUPLICATE_SEPARATION_ARCSEC, SAME_NAME_PAIRS_LIMIT, SAME_NAME_SEPARATION_ARCMIN

__all__ = [
    "close_pairs_by_key",
    "find_duplicates",
    "keys_apart",
    "merge_groups",
    "merge_measurements",
    "group_scale_factors",
    "scale_factor",
    "MERGED_QUANTITIES",
]

#: The merged quantities, (value, error), whose errors are scaled by the scatter of the measurements.
MERGED_QUANTITIES = (("distance", "distance_err"), ("av", "av_err"), ("excess", "excess_err"))


def _pairs_same_key(key, all_pairs=True):
    """Index pairs (i, j) of rows that share a value of ``key``: every pair (``all_pairs``), else
    neighbours in sorted order only (enough where sharing a key is transitive, e.g. names)."""
    order = np.argsort(key)
    ks = key[order]
    ii, jj = [], []
    k = 1
    while k < ks.size:
        same = np.flatnonzero(ks[k:] == ks[:-k])
        if same.size == 0:
            break
        ii.append(order[same])
        jj.append(order[same + k])
        if not all_pairs:
            break
        k += 1
    if not ii:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    return np.concatenate(ii), np.concatenate(jj)


def close_pairs_by_key(key, l, b, tol_deg, shown=lambda value: repr(str(value))):
    """Index pairs (i, j), i != j, of rows that share a value of ``key`` and are at most ``tol_deg``
    apart on the sky (each such pair at least once).

    Rows whose key occurs once are set aside; the others are searched by the cells of
    :func:`_close_pairs` with the key's code in each cell's key, so every pair of rows of one key
    that is within the limit is compared, at any l and b and across l = 0/360 (no loop over rows).
    A key that more than ``SAME_NAME_PAIRS_LIMIT`` pairs share in one cell is not a name: CatalogError
    naming it (``shown(value)``) with a hint.
    """
    key = np.asarray(key)
    if key.size < 2:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    code = np.unique(key, return_inverse=True)[1].ravel().astype(np.int64)
    rows = np.flatnonzero(np.bincount(code)[code] > 1)
    if rows.size < 2:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    l, b = np.asarray(l, float)[rows], np.asarray(b, float)[rows]
    try:
        i, j = _close_pairs(l, b, float(tol_deg), key=code[rows], search_all=True)
    except _TooManyPairs as crowd:
        value = key[rows[np.flatnonzero(code[rows] == crowd.code)[0]]]
        raise CatalogError(
            f"The name {shown(value)} is shared by {crowd.rows} rows within {2 * float(tol_deg):g} deg of each other "
            f"(more than {SAME_NAME_PAIRS_LIMIT} pairs to compare): the name column does not name objects. Hint: "
            "read the catalogue without names (columns={'name': None}; --column name=) or give it unique names."
        ) from None
    return rows[i], rows[j]


class _TooManyPairs(Exception):
    """One code's rows in one cell have more than ``SAME_NAME_PAIRS_LIMIT`` pairs."""

    def __init__(self, code, rows):
        super().__init__(code, rows)
        self.code, self.rows = int(code), int(rows)


def keys_apart(key, group):
    """True for the rows whose value of ``key`` (a name) is also that of a row of another group:
    rows of one name kept as separate tracers. Also returns an example ``(row, other)``: the first
    such row and the first row of its name in another group (None when there is none)."""
    key = np.asarray(key)
    group = np.asarray(group)
    if key.size < 2:
        return np.zeros(key.size, bool), None
    code = np.unique(key, return_inverse=True)[1].ravel()
    order = np.lexsort((group, code))
    c, g = code[order], group[order]
    new_pair = np.r_[True, (c[1:] != c[:-1]) | (g[1:] != g[:-1])]  # first row of each (name, group)
    n_groups = np.bincount(c[new_pair], minlength=int(code.max()) + 1)
    apart = n_groups[code] > 1
    if not apart.any():
        return apart, None
    row = int(np.flatnonzero(apart)[0])
    other = int(np.flatnonzero((code == code[row]) & (group != group[row]))[0])
    return apart, (row, other)


def find_duplicates(l, b, d, d_err, av, av_err, names=None, tol_arcsec=DUPLICATE_SEPARATION_ARCSEC,
                    nsigma=DUPLICATE_NSIGMA, name_tol_arcmin=SAME_NAME_SEPARATION_ARCMIN):
    """Group labels of duplicated tracers, and whether each row is an exact copy of another.

    Parameters
    ----------
    l, b : ndarray
        Galactic longitude and latitude, deg.
    d, d_err, av, av_err : ndarray
        Distance and error (pc), A_V and error (mag).
    names : ndarray of str, optional
        Names (None: no grouping by name). Rows of one name are one tracer where they are within
        ``name_tol_arcmin`` of each other (joined through chains of such pairs).
    tol_arcsec : float
        Separation below which two tracers may be at the same place, arcsec (0: only names
        and exact copies group rows).
    nsigma : float
        Two tracers at the same place are one if distance and A_V differ by at most ``nsigma``
        times their combined error.
    name_tol_arcmin : float
        Separation within which rows of the same name are one tracer, arcmin
        (``SAME_NAME_SEPARATION_ARCMIN``).

    Returns
    -------
    group : ndarray of int
        Group label per row (rows alone in their group share no label with others).
    exact : ndarray of bool
        True for a row that repeats an earlier row's position, distance, A_V and errors exactly.
    copied : ndarray of bool
        True for every row of such a set of exact copies (the first one too).

    Notes
    -----
    Longitude wraps: the rows within two cells of l = 0/360 deg are searched once more with
    the wrap moved to l = 180 deg, so that two records of one cluster at l = 359.9999 and
    0.0001 deg are compared.
    Rows alone in their cell of a coarse grid (cells 64 times the tolerance) and away from its
    edges are set aside before any sort (cells counted by hashing their keys into
    ``np.bincount``). In every grid, longitude is scaled by the cosine of the latitude band's
    edge farthest from the equator, so that a pair within the tolerance is within it in both
    cell coordinates at any latitude and longitude.
    """
    n = l.size
    ii, jj = [], []
    exact = np.zeros(n, dtype=bool)
    copied = np.zeros(n, dtype=bool)
    if names is not None:
        i, j = close_pairs_by_key(names, l, b, float(name_tol_arcmin) / 60.0)
        ii.append(i)
        jj.append(j)
    tol = max(float(tol_arcsec), 1e-6) / 3600.0  # exact copies are found even with a zero tolerance
    i, j = _close_pairs(l, b, tol)
    if i.size:
        same = np.ones(i.size, dtype=bool)
        for col in (l, b, d, d_err, av, av_err):
            same &= col[i] == col[j]
        # an exact copy repeats a row with a lower index (every pair in a cell is seen)
        exact[np.maximum(i, j)[same]] = True
        copied[i[same]] = True
        copied[j[same]] = True
        if float(tol_arcsec) <= 0:
            i, j = i[same], j[same]
        close = same | ((np.abs(d[i] - d[j]) <= nsigma * np.hypot(d_err[i], d_err[j])) & (
            np.abs(av[i] - av[j]) <= nsigma * np.hypot(av_err[i], av_err[j])))
        ii.append(i[close])
        jj.append(j[close])
    i = np.concatenate(ii) if ii else np.zeros(0, np.int64)
    j = np.concatenate(jj) if jj else np.zeros(0, np.int64)
    if i.size == 0:
        return np.arange(n), exact, copied
    graph = coo_matrix((np.ones(i.size, dtype=np.int8), (i, j)), shape=(n, n))
    _, group = connected_components(graph, directed=False)
    return group, exact, copied


def _close_pairs(l, b, tol, key=None, search_all=False):
    """Index pairs (i, j), i != j, of rows at most ``tol`` deg apart (each pair at least once).

    Four grids of cells ``2 tol`` across, shifted by half a cell in latitude and in
    longitude: a pair closer than ``tol`` in both coordinates shares a cell in one of them.
    Only the rows :func:`_not_alone` keeps are searched (every row with ``search_all``). Longitude
    wraps: those within two cells of l = 0/360 are searched once more with the wrap moved to
    l = 180 deg. With ``key`` (int64 codes, one per row) only rows of one code are paired.
    """
    l = np.mod(l, 360.0)
    rows = np.arange(l.size) if search_all else _not_alone(l, b, tol)
    if rows.size < 2:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    lr, br = l[rows], b[rows]
    kr = None if key is None else key[rows]
    ci, cj = _grid_pairs(lr, br, tol, kr)
    near = np.flatnonzero(np.minimum(lr, 360.0 - lr) * np.maximum(np.cos(np.radians(br)), 1e-6) < 4.0 * tol)
    if near.size > 1:
        lw = lr[near]
        i, j = _grid_pairs(np.where(lw > 180.0, lw - 180.0, lw + 180.0), br[near], tol,
                           None if kr is None else kr[near])
        ci += [near[x] for x in i]
        cj += [near[x] for x in j]
    if not ci:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    return rows[np.concatenate(ci)], rows[np.concatenate(cj)]


def _band_scale(kb, shift, size):
    """cos of the latitude band edge farthest from the equator (band ``kb`` of cells ``size`` deg
    across, shifted by ``shift`` cells): l times it is at most the arc length along any parallel of
    the band, so two rows of a band within ``tol`` deg are within ``tol`` in it. (One cosine per
    band, looked up per row.)"""
    lo = np.min(kb) if kb.size else 0.0
    bands = np.arange(lo, (np.max(kb) if kb.size else 0.0) + 1.0)
    edge = np.maximum(np.abs(bands - shift), np.abs(bands - shift + 1)) * size
    table = np.maximum(np.cos(np.radians(np.minimum(edge, 90.0))), 1e-6)
    return table[(kb - lo).astype(np.intp)]


def _not_alone(l, b, tol, coarse=64):
    """Sorted indices of the rows that may have another row within ``tol`` deg (the others have none).

    One grid of cells ``coarse * tol`` across (l in [0, 360) scaled by :func:`_band_scale`): a
    row alone in its cell, farther than ``tol`` from the cell's edges and from l = 360 has no
    row within ``tol``. Cells are counted by hashing their keys (multiply-shift) into about
    four buckets a row with ``np.bincount``, without a sort; only the rows of buckets holding
    two or more are sorted, to tell a shared cell from a shared bucket."""
    size = coarse * tol
    v = b / size
    kv = np.floor(v)
    v -= kv
    scale = _band_scale(kv, 0.0, size)
    u = l * scale
    m = 1.001 / coarse  # tol in cells, with a margin for rounding
    edge = (360.0 - l) * scale < 1.001 * tol  # near the wrap (l = 0 is a cell edge)
    u /= size
    ku = np.floor(u)
    u -= ku
    edge |= (u < m) | (u > 1.0 - m) | (v < m) | (v > 1.0 - m)
    key = (kv.astype(np.int64) << 31) + ku.astype(np.int64)
    del u, v, kv, ku, scale
    bits = min(max(int(np.ceil(np.log2(max(4 * l.size, 2)))), 4), 24)  # >= 4 buckets a row, <= 128 MB
    with np.errstate(over="ignore"):
        bucket = ((key.view(np.uint64) * np.uint64(0x9E3779B97F4A7C15)) >> np.uint64(64 - bits)).view(np.int64)
    shared = np.flatnonzero(np.bincount(bucket, minlength=1 << bits)[bucket] > 1)
    i, j = _pairs_same_key(key[shared], all_pairs=False)  # rows of a shared bucket that share a cell
    edge[shared[i]] = True
    edge[shared[j]] = True
    return np.flatnonzero(edge)


def _grid_pairs(l, b, tol, key=None):
    """Lists of index arrays (i, j) of the pairs within ``tol`` that share a cell of one of the four
    grids (cells ``2 tol`` across, l scaled per latitude band by :func:`_band_scale`); with ``key``
    (int64 codes) only pairs of one code (the cells numbered densely, then joined with the code)."""
    cell = 2.0 * tol
    ci, cj = [], []
    for sb in (0.0, 0.5):
        kb = np.floor(b / cell + sb)
        x = l * _band_scale(kb, sb, cell)
        kb = kb.astype(np.int64) << 31
        for sl in (0.0, 0.5):
            cells = kb + np.floor(x / cell + sl).astype(np.int64)
            if key is not None:  # codes < n and dense cell numbers < n: one int64 key below n**2
                cells = key * np.int64(l.size) + np.unique(cells, return_inverse=True)[1].ravel()
                _, first, counts = np.unique(cells, return_index=True, return_counts=True)
                if np.sum(counts * (counts - 1) // 2) > SAME_NAME_PAIRS_LIMIT:
                    at = int(np.argmax(counts))
                    raise _TooManyPairs(key[first[at]], counts[at])
            i, j = _pairs_same_key(cells)
            keep = _separation_deg(l[i], b[i], l[j], b[j]) <= tol
            ci.append(i[keep])
            cj.append(j[keep])
    return ci, cj


def _separation_deg(l1, b1, l2, b2):
    """Angular separation, deg (haversine: accurate at arcsec scales)."""
    l1, b1, l2, b2 = (np.radians(x) for x in (l1, b1, l2, b2))
    h = np.sin((b2 - b1) / 2) ** 2 + np.cos(b1) * np.cos(b2) * np.sin((l2 - l1) / 2) ** 2
    return np.degrees(2 * np.arcsin(np.sqrt(np.clip(h, 0.0, 1.0))))


def merge_groups(group, exact, copied, fields, rows, names, mode="merge"):
    """The report of duplicated rows and, with ``mode='merge'``, one tracer per group.

    Parameters
    ----------
    group, exact, copied : ndarray
        From :func:`find_duplicates`.
    fields : dict of ndarray
        Per-tracer arrays: ``l``, ``b``, ``distance``, ``distance_err``, ``av``, ``av_err``,
        ``excess``, ``excess_err``, optionally ``av_distance_corr``, ``distance_err_low``,
        ``distance_err_high`` (combined, see Notes) and others (taken from the group's first row).
    rows : ndarray of int
        Input row of each tracer.
    names : ndarray of str or None
    mode : {'merge', 'keep'}

    Returns
    -------
    keep : ndarray of int
        Index of the tracer that stands for each group (all tracers with ``'keep'``).
    merged : dict of ndarray
        The merged values of ``l``, ``b``, ``distance``, ``distance_err``, ``av``, ``av_err``,
        ``excess``, ``excess_err`` for the kept tracers; when groups were merged also
        ``position_weight``, the length of the sum of a group's unit vectors (1 for a single
        row), with which a later merge of merged tracers gives the same mean position, and
        ``scatter``: per merged quantity (``distance``, ``av``, ``excess``) the arrays
        ``(unscaled error, chi2, N)`` (a tracer not merged: its error, 0, 1), with which a later
        merge of merged tracers gives the same scaled errors (see :func:`merge_measurements`).
    report : `~astropy.table.Table`
        One row per tracer in a group of two or more: ``group``, ``row``, ``name``, ``kind``,
        ``merged_into``.

    Notes
    -----
    Exact copies are one measurement: they collapse to one row without changing its errors.
    The distinct measurements of a group are combined by inverse-variance means,
    x = sum(w x) / sum(w), sigma = sum(w)^-1/2 with w = 1 / sigma^2, for distance, A_V and the
    excess; the position is the mean of the unit vectors. Where the N distinct measurements
    disagree beyond their errors, chi2 = sum w (x_i - x)^2 > N - 1, the quoted errors are too
    small: sigma is scaled up by S = sqrt(chi2 / (N - 1)) (the weights, and so the mean, stay the
    quoted inverse variances; S is never below 1). Each quantity has its own S. The correlation
    of the two means follows from the same weights: rho = sum(rho_i / (sigma_AV,i sigma_d,i)) /
    sqrt(sum w_AV sum w_d), and is kept when the errors are scaled (the covariance is scaled by
    S_AV S_d). Asymmetric distance errors (``distance_err_low``/``_high``, from
    parallaxes) are the merged (scaled) ``distance_err`` times the inverse-variance (w_d) mean of each
    member's ratio ``low / distance_err`` (and ``high / distance_err``): the skew of the members
    is kept and low + high = 2 ``distance_err`` still holds.
    """
    n = group.size
    counts = np.bincount(group, minlength=group.max() + 1 if n else 0)
    multi = counts[group] > 1
    if not multi.any():  # nothing to merge or report (the common case: no sort at all)
        return np.arange(n), dict(fields), empty_duplicates()
    # the first row of each group stands for it; only rows of groups of two or more are sorted
    head = np.empty(counts.size, dtype=np.int64)
    head[group] = np.arange(n)  # right for single rows; groups of two or more are set below
    members = np.flatnonzero(multi)
    order = members[np.lexsort((members, group[members]))]
    first = np.ones(order.size, dtype=bool)
    first[1:] = group[order][1:] != group[order][:-1]
    head[group[order][first]] = order[first]
    keep = np.flatnonzero(head[group] == np.arange(n)) if mode == "merge" else np.arange(n)
    k = order[np.lexsort((rows[order], group[order]))]
    gid = np.unique(group[k], return_inverse=True)[1]
    report = Table(
        {
            "group": gid.astype(np.int64),
            "row": rows[k].astype(np.int64),
            "name": np.asarray(names)[k] if names is not None else np.char.add("row ", rows[k].astype(str)),
            "kind": np.where(copied[k], "exact", "near"),
            "merged_into": rows[head[group[k]]].astype(np.int64) if mode == "merge" else np.full(k.size, -1),
        }
    )
    if mode != "merge":
        return keep, {name: fields[name][keep] for name in fields}, report
    # every kept row as it is, then the heads of groups of two or more overwritten with their
    # group's merged values (computed on the groups' rows only)
    merged = {name: fields[name][keep] for name in fields}
    merged["position_weight"] = np.ones(keep.size)
    at = np.searchsorted(keep, order[first])  # where each group's head is among the kept rows
    values = merge_measurements({name: fields[name][order] for name in fields}, np.cumsum(first) - 1,
                                np.flatnonzero(first), ~exact[order])
    scatter = values.pop("scatter")
    for name, v in values.items():
        merged[name][at] = v
    merged["scatter"] = {}
    for (value, err), part in ((q, scatter.get(q[0])) for q in MERGED_QUANTITIES):
        if part is not None:  # a tracer not merged: its own error, chi2 = 0, one measurement
            kept = (merged[err].copy(), np.zeros(keep.size), np.ones(keep.size))
            for whole, v in zip(kept, part):
                whole[at] = v
            merged["scatter"][value] = kept
    return keep, merged, report


def merge_measurements(fields, group, head, use, weight=None, parts=None):
    """Merged values of each group of measurements (the formulas of :func:`merge_groups`).

    ``group`` numbers each row's group 0..m-1, ``head`` is each group's first row, ``use``
    marks the distinct measurements (False for exact copies; as numbers, how many times a row
    counts, -1 taking out a measurement another row already holds) and ``weight`` (default 1) the
    length of the sum of unit vectors a row's position already stands for (the unit vectors are
    summed with these weights). Only the pairs of ``fields`` present are merged. The result
    holds ``position_weight``, the length of each group's sum of unit vectors, and ``scatter``:
    per merged quantity ``(unscaled error, chi2, N)`` of each group, the error being the unscaled
    one times :func:`scale_factor` of chi2 and N.

    ``parts`` (default: every row one measurement) maps a quantity to per-row arrays
    ``(unscaled error, chi2, N)`` of the measurements a row already stands for (a tracer merged
    before, with its scaled error in ``fields``): the weights are then the unscaled inverse
    variances, N the sum of the parts' N and chi2 = sum chi2_g + sum W_g (x_g - x)^2, which is
    the chi2 of all the measurements together, so merging merged tracers gives the errors of
    merging all their rows at once.
    """
    m = head.size
    counts = np.bincount(group, minlength=m)
    use = np.asarray(use, float)
    merged, scatter, quoted = {}, {}, {}
    for value, err in MERGED_QUANTITIES:
        if value not in fields:
            continue
        part = None if parts is None else parts.get(value)
        merged[value], merged[err], scatter[value], quoted[err] = _scaled_mean(
            fields[value], fields[err], part, use, group, head, m)
    lr, br = np.radians(fields["l"]), np.radians(fields["b"])
    xyz = [np.cos(br) * np.cos(lr), np.cos(br) * np.sin(lr), np.sin(br)]
    wpos = use * (1.0 if weight is None else np.asarray(weight, float))
    sx, sy, sz = (np.bincount(group, wpos * c, m) for c in xyz)
    lm = np.mod(np.degrees(np.arctan2(sy, sx)), 360.0)
    bm = np.degrees(np.arctan2(sz, np.hypot(sx, sy)))
    # corr(A_V, ln d) of the two means: cov = sum(wa wd rho s_a s_d) / (sum wa sum wd), so
    # rho = sum(rho / (s_a s_d)) / sqrt(sum wa sum wd) over the distinct measurements
    if "av_distance_corr" in fields:
        sa, sd = quoted["av_err"], quoted["distance_err"]
        ok = (use != 0) & (sa > 0) & (sd > 0)
        with np.errstate(divide="ignore", invalid="ignore"):
            term = np.where(ok, use * fields["av_distance_corr"] / (sa * sd), 0.0)
            wa = np.where(ok, use / sa**2, 0.0)
            wd = np.where(ok, use / sd**2, 0.0)
            rho = np.bincount(group, term, m) / np.sqrt(np.bincount(group, wa, m) * np.bincount(group, wd, m))
        merged["av_distance_corr"] = np.where(np.isfinite(rho), np.clip(rho, -1.0, 1.0),
                                              fields["av_distance_corr"][head])
    # asymmetric distance errors (parallaxes): the merged error times the inverse-variance mean of
    # the members' ratios low / sigma and high / sigma, so low + high stays 2 sigma
    if "distance_err_low" in fields and "distance_err_high" in fields:
        s, s0 = fields["distance_err"], quoted["distance_err"]
        with np.errstate(divide="ignore", invalid="ignore"):
            w = np.where((use != 0) & (s0 > 0), use / s0**2, 0.0)
            sw = np.bincount(group, w, m)
            for side in ("distance_err_low", "distance_err_high"):
                ratio = np.where(s > 0, fields[side] / s, 0.0)
                mean = np.bincount(group, w * ratio, m) / sw
                merged[side] = np.where(np.isfinite(mean), mean * merged["distance_err"], fields[side][head])
    merged["l"] = np.where(counts > 1, lm, fields["l"][head])
    merged["b"] = np.where(counts > 1, bm, fields["b"][head])
    merged["position_weight"] = np.where(counts > 1, np.sqrt(sx * sx + sy * sy + sz * sz), wpos[head])
    merged["scatter"] = scatter
    return merged


def _scaled_mean(x, s, part, use, group, head, m):
    """One quantity of :func:`merge_measurements`: per group the inverse-variance mean, its error
    scaled up by S = sqrt(chi2 / (N - 1)) where S > 1, and ``(unscaled error, chi2, N)``; also the
    quoted error of each row (its weights' error). ``part`` (None: each row one measurement) is
    per row the ``(unscaled error, chi2, N)`` of the measurements a row already stands for."""
    s0, chi_part, n_part = (s, 0.0, 1.0) if part is None else (np.asarray(p, float) for p in part)
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where((use != 0) & (s0 > 0), use / s0**2, 0.0)
    sw = np.bincount(group, w, m)
    ok = sw > 0
    mean = np.where(ok, np.bincount(group, w * x, m) / np.where(ok, sw, 1.0), x[head])
    unscaled = np.where(ok, 1.0 / np.sqrt(np.where(ok, sw, 1.0)), s0[head])
    # chi2 of the union = the parts' own chi2 + sum W_g (xbar_g - xbar)^2 (exact for signed counts too)
    counted = w != 0
    chi2 = np.bincount(group, np.where(counted, use * chi_part + w * (x - mean[group]) ** 2, 0.0), m)
    n = np.bincount(group, np.where(counted, use * n_part, 0.0), m)
    chi2, n = np.where(ok, np.maximum(chi2, 0.0), 0.0), np.where(ok, np.rint(n), 1.0)
    factor = scale_factor(chi2, n)
    err = np.where(ok, unscaled * factor, s[head])
    return mean, err, (unscaled, chi2, n), s0


def scale_factor(chi2, n):
    """S = sqrt(chi2 / (N - 1)) where that exceeds 1, else 1 (also for N < 2): the factor by which the
    error of a weighted mean of N measurements whose scatter exceeds their errors is scaled up."""
    chi2, n = np.asarray(chi2, float), np.asarray(n, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        s = np.sqrt(np.where(n > 1, chi2 / np.where(n > 1, n - 1.0, 1.0), 1.0))
    return np.maximum(s, 1.0)


def group_scale_factors(scatter):
    """The largest scale factor of each tracer over its merged quantities (1 for a tracer not merged)
    from the ``scatter`` of :func:`merge_groups`; None gives None."""
    if not scatter:
        return None
    return np.max([scale_factor(chi2, n) for _, chi2, n in scatter.values()], axis=0)
