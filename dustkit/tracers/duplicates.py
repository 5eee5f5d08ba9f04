"""Duplicated tracers: exact copies of a row, and near-duplicates (the same name, or the same place
with distance and A_V within their errors, as when two compilations are merged).

Groups are found without Python loops: exact copies by sorting the rows' values; names by
sorting the names; positions by sorting keys of four grids of cells twice the separation
tolerance across, shifted by half a cell in latitude and in longitude, so that every pair
closer than the tolerance in both coordinates shares a cell in at least one grid (each pair
found is then checked exactly). Pairs are joined into groups by connected components.
"""

import numpy as np
from astropy.table import Table
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from .context import empty_duplicates
from .rules import DUPLICATE_NSIGMA, DUPLICATE_SEPARATION_ARCSEC

__all__ = [
    "find_duplicates",
    "merge_groups",
]


def _pairs_same_key(key):
    """Index pairs (i, j) of neighbours in the order of ``key`` that share its value."""
    order = np.argsort(key)
    ks = key[order]
    same = np.flatnonzero(ks[1:] == ks[:-1])
    return order[same], order[same + 1]


def find_duplicates(l, b, d, d_err, av, av_err, names=None, tol_arcsec=DUPLICATE_SEPARATION_ARCSEC,
                    nsigma=DUPLICATE_NSIGMA):
    """Group labels of duplicated tracers, and whether each row is an exact copy of another.

    Parameters
    ----------
    l, b : ndarray
        Galactic longitude and latitude, deg.
    d, d_err, av, av_err : ndarray
        Distance and error (pc), A_V and error (mag).
    names : ndarray of str, optional
        Names (None: no grouping by name).
    tol_arcsec : float
        Separation below which two tracers are at the same place, arcsec.
    nsigma : float
        Two tracers at the same place are one if distance and A_V differ by at most ``nsigma``
        times their combined error.

    Returns
    -------
    group : ndarray of int
        Group label per row (rows alone in their group share no label with others).
    exact : ndarray of bool
        True for a row that repeats an earlier row's position, distance, A_V and errors exactly.
    copied : ndarray of bool
        True for every row of such a set of exact copies (the first one too).
    """
    n = l.size
    ii, jj = [], []
    # exact copies: one sort of a 64-bit hash of the six values, then neighbours compared exactly
    cols = [np.ascontiguousarray(x, dtype=float) for x in (l, b, d, d_err, av, av_err)]
    h = np.zeros(n, dtype=np.uint64)
    with np.errstate(over="ignore"):
        for k, x in enumerate(cols):
            h ^= (x.view(np.uint64) + np.uint64(k + 1)) * np.uint64(0x9E3779B97F4A7C15)
            h = (h << np.uint64(13)) | (h >> np.uint64(51))
    order = np.argsort(h)
    hs = h[order]
    cand = np.flatnonzero(hs[1:] == hs[:-1])
    same_pair = np.ones(cand.size, dtype=bool)
    for x in cols:
        same_pair &= x[order[cand]] == x[order[cand + 1]]
    cand = cand[same_pair]
    exact = np.zeros(n, dtype=bool)
    exact[order[cand + 1]] = True
    copied = exact.copy()
    copied[order[cand]] = True
    ii.append(order[cand])
    jj.append(order[cand + 1])
    if names is not None:
        i, j = _pairs_same_key(np.asarray(names))
        ii.append(i)
        jj.append(j)
    tol = tol_arcsec / 3600.0
    cell = 2.0 * tol
    cosb = np.maximum(np.cos(np.radians(b)), 1e-6)
    x = np.mod(l, 360.0) * cosb
    for sb in (0.0, 0.5):
        kb = np.floor(b / cell + sb).astype(np.int64)
        for sl in (0.0, 0.5):
            kl = np.floor(x / cell + sl).astype(np.int64)
            i, j = _pairs_same_key(kb * (1 << 31) + kl)
            if i.size:
                sep = _separation_deg(l[i], b[i], l[j], b[j])
                close = (sep <= tol) & (np.abs(d[i] - d[j]) <= nsigma * np.hypot(d_err[i], d_err[j])) & (
                    np.abs(av[i] - av[j]) <= nsigma * np.hypot(av_err[i], av_err[j]))
                ii.append(i[close])
                jj.append(j[close])
    i = np.concatenate(ii)
    j = np.concatenate(jj)
    if i.size == 0:
        return np.arange(n), exact, copied
    graph = coo_matrix((np.ones(i.size, dtype=np.int8), (i, j)), shape=(n, n))
    _, group = connected_components(graph, directed=False)
    return group, exact, copied


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
        ``excess``, ``excess_err`` and optional others (taken from the group's first row).
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
        ``excess``, ``excess_err`` for the kept tracers.
    report : `~astropy.table.Table`
        One row per tracer in a group of two or more: ``group``, ``row``, ``name``, ``kind``,
        ``merged_into``.

    Notes
    -----
    Exact copies are one measurement: they collapse to one row without changing its errors.
    The distinct measurements of a group are combined by inverse-variance means,
    x = sum(w x) / sum(w), sigma = sum(w)^-1/2 with w = 1 / sigma^2, for distance, A_V and the
    excess; the position is the mean of the unit vectors.
    """
    n = group.size
    counts = np.bincount(group, minlength=group.max() + 1 if n else 0)
    multi = counts[group] > 1
    order = np.lexsort((np.arange(n), group))
    first = np.ones(n, dtype=bool)
    first[1:] = group[order][1:] != group[order][:-1]
    head = np.empty(group.max() + 1 if n else 0, dtype=np.int64)
    head[group[order][first]] = order[first]
    keep = np.sort(head) if mode == "merge" else np.arange(n)
    report = empty_duplicates()
    if multi.any():
        k = np.flatnonzero(multi)
        k = k[np.lexsort((rows[k], group[k]))]
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
    merged = {}
    if mode != "merge" or not multi.any():
        return keep, {name: fields[name][keep] for name in fields}, report
    use = ~exact  # exact copies add no information
    m = group.max() + 1
    for value, err in (("distance", "distance_err"), ("av", "av_err"), ("excess", "excess_err")):
        x, s = fields[value], fields[err]
        with np.errstate(divide="ignore", invalid="ignore"):
            w = np.where(use & (s > 0), 1.0 / s**2, 0.0)
        sw = np.bincount(group, w, m)
        swx = np.bincount(group, w * x, m)
        ok = sw > 0
        mean = np.where(ok, swx / np.where(ok, sw, 1.0), x[head])
        sig = np.where(ok, 1.0 / np.sqrt(np.where(ok, sw, 1.0)), s[head])
        merged[value] = mean[group[keep]]
        merged[err] = sig[group[keep]]
    lr, br = np.radians(fields["l"]), np.radians(fields["b"])
    xyz = [np.cos(br) * np.cos(lr), np.cos(br) * np.sin(lr), np.sin(br)]
    wpos = use.astype(float)
    sx, sy, sz = (np.bincount(group, wpos * c, m) for c in xyz)
    lm = np.mod(np.degrees(np.arctan2(sy, sx)), 360.0)
    bm = np.degrees(np.arctan2(sz, np.hypot(sx, sy)))
    merged["l"] = np.where(counts > 1, lm, fields["l"][head])[group[keep]]
    merged["b"] = np.where(counts > 1, bm, fields["b"][head])[group[keep]]
    for name in fields:
        if name not in merged:
            merged[name] = fields[name][keep]
    return keep, merged, report
