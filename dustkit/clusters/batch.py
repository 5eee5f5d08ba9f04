"""Fit many clusters: one row per cluster, in a table that :func:`dustkit.read_tracers` reads.

Columns of the result (all in mag unless said otherwise):

``name``; ``l``, ``b`` (deg, membership-weighted mean of the members' positions);
``ebv``, ``ebv_err``; ``mu0``, ``mu0_err`` (the TRUE distance modulus, extinction
removed: the name says so, so it is not taken for an apparent one); ``distance_pc``,
``distance_pc_err`` (pc, for readers that want a distance); ``ebv_mu0_corr`` (correlation
coefficient of E(B-V) and mu0); ``n_members_used``; ``field_fraction``;
``binary_fraction``; ``flags`` (comma-separated); ``observables``.

``table.meta`` records the law, R_V, the sequence (source and version), the caution and
every cluster's notes.
"""

import warnings

import numpy as np
from astropy import units as u
from astropy.coordinates import SkyCoord
from astropy.table import Table

from ..exceptions import AssumptionWarning, CatalogError, RowsRejectedWarning
from .._lib.progress import progress
from .._lib.validation import param_error
from .fit import CAUTION, DegeneracyWarning, fit_cluster

__all__ = ["fit_clusters", "tracer_row", "tracer_table", "TRACER_COLUMNS"]

#: Columns of :func:`fit_clusters`' table, in order.
TRACER_COLUMNS = ("name", "l", "b", "ebv", "ebv_err", "mu0", "mu0_err", "distance_pc", "distance_pc_err",
                  "ebv_mu0_corr", "n_members_used", "field_fraction", "binary_fraction", "flags", "observables")

_CLUSTER_SPELLINGS = ("cluster", "cluster_name", "clustername", "cl", "name", "group")


def _degrees(members, column, rows):
    """Plain float values of rows of a column; NaN where a value is masked (an empty cell of a
    CSV file), never the masked array's hidden filler, which would pull the mean position."""
    values = np.ma.filled(np.ma.asarray(members[column], dtype=float), np.nan)
    return values[rows]


def _positions(members, rows, weights):
    """Weighted mean Galactic l, b (deg) of rows; from l/b or ra/dec columns. NaN if none."""
    lower = {}
    for c in members.colnames:  # exact names win: a 'B' magnitude is not the latitude 'b'
        if len(c) > 1 or c.islower():
            lower.setdefault(c.lower(), c)
    for c in members.colnames:
        lower[c] = c
    for lc, bc in (("glon", "glat"), ("l", "b"), ("lii", "bii")):
        if lc in lower and bc in lower:
            lon = _degrees(members, lower[lc], rows)
            lat = _degrees(members, lower[bc], rows)
            coord = SkyCoord(lon * u.deg, lat * u.deg, frame="galactic")
            break
    else:
        for rc, dc in (("ra", "dec"), ("raj2000", "dej2000"), ("ra_icrs", "de_icrs"), ("ra", "de")):
            if rc in lower and dc in lower:
                ra = _degrees(members, lower[rc], rows)
                de = _degrees(members, lower[dc], rows)
                coord = SkyCoord(ra * u.deg, de * u.deg, frame="icrs").galactic
                break
        else:
            return np.nan, np.nan
    xyz = coord.cartesian.xyz.value  # (3, n): a mean on the sphere, safe across l = 0/360
    w = np.where(np.isfinite(xyz).all(axis=0), weights, 0.0)
    if w.sum() <= 0:
        w = np.isfinite(xyz).all(axis=0).astype(float)
        if w.sum() <= 0:
            return np.nan, np.nan
    x, y, z = np.nansum(np.where(np.isfinite(xyz), xyz, 0.0) * w, axis=1) / w.sum()
    lon = np.degrees(np.arctan2(y, x)) % 360.0
    lat = np.degrees(np.arctan2(z, np.hypot(x, y)))
    return float(lon), float(lat)


def tracer_row(fit, name, members=None, *, ebv=None, distance_modulus=None):
    """One cluster's row of the tracer table (a dict keyed by :data:`TRACER_COLUMNS`).

    Parameters
    ----------
    fit : ClusterFit
    name : str
    members : table-like, optional
        For the position (membership-weighted mean of l/b or ra/dec); NaN without.
    ebv, distance_modulus : float, optional
        Values to use instead of the fitted ones (e.g. set by hand in a panel); the errors
        and correlation stay the fit's, and ``flags`` gains ``"set_by_hand"``.
    """
    if members is not None:
        if not isinstance(members, Table):
            members = Table(members)
        l, b = _positions(members, np.arange(len(members)), np.maximum(fit.weights, 0.0))
    else:
        l = b = np.nan
    flags = list(fit.flags)
    e = fit.ebv if ebv is None else float(ebv)
    m = fit.distance_modulus if distance_modulus is None else float(distance_modulus)
    if (ebv is not None and e != fit.ebv) or (distance_modulus is not None and m != fit.distance_modulus):
        flags.append("set_by_hand")
    d = 10.0 ** (m / 5.0 + 1.0)
    return dict(zip(TRACER_COLUMNS, (
        str(name), l, b, e, fit.ebv_err, m, fit.distance_modulus_err, d, d * np.log(10.0) / 5.0 * fit.distance_modulus_err,
        fit.correlation, fit.n_members_used, fit.field_fraction, fit.binary_fraction, ",".join(flags),
        ",".join(fit.observables))))


def tracer_table(rows, meta=None):
    """An astropy Table (units on the columns) from rows made by :func:`tracer_row`."""
    t = Table()
    units = {"l": u.deg, "b": u.deg, "ebv": u.mag, "ebv_err": u.mag, "mu0": u.mag, "mu0_err": u.mag,
             "distance_pc": u.pc, "distance_pc_err": u.pc}
    for cname in TRACER_COLUMNS:
        values = [r[cname] for r in rows]
        if cname in ("name", "flags", "observables"):
            t[cname] = np.array(values, dtype=str) if values else np.array([], dtype=str)
        elif cname == "n_members_used":
            t[cname] = np.array(values, dtype=int)
        else:
            t[cname] = np.array(values, dtype=float)
            if cname in units:
                t[cname].unit = units[cname]
    t["mu0"].description = "true distance modulus (extinction removed) from main-sequence fitting"
    t["ebv_mu0_corr"].description = "correlation coefficient of ebv and mu0"
    t.meta.update(meta or {})
    return t


def _label_text(members, column):
    """The column as stripped text, and where it is empty (masked cells, blank strings)."""
    col = members[column]
    text = np.char.strip(np.asarray(np.ma.getdata(col)).astype(str))
    empty = np.ma.getmaskarray(col) | (text == "")
    return text, empty


def _cluster_labels(members, cluster_column):
    """(column, names, labels): each row's index into ``names``, -1 for rows without a name.

    Found columns whose every row holds a different value name stars, not clusters (a
    ``name`` column of star designations): they are passed over, and the choice announced.
    Rows with an empty name are left out, counted and announced."""
    if cluster_column is None:
        lower = {c.lower(): c for c in members.colnames}
        for spelling in _CLUSTER_SPELLINGS:
            if spelling not in lower:
                continue
            text, empty = _label_text(members, lower[spelling])
            filled = text[~empty]
            if filled.size > 1 and np.unique(filled).size == filled.size:
                warnings.warn(
                    f"The column {lower[spelling]!r} has a different value on every row: read as star names, not "
                    "cluster names. Hint: pass cluster_column=... to name the column that says which cluster "
                    "each star belongs to.", AssumptionWarning, stacklevel=3)
                continue
            cluster_column = lower[spelling]
            break
    if cluster_column is None:
        return None, ["cluster"], np.zeros(len(members), dtype=int)
    text, empty = _label_text(members, cluster_column)
    names, labels = np.unique(text[~empty], return_inverse=True)
    full = np.full(len(members), -1)
    full[~empty] = labels
    if empty.any():
        warnings.warn(
            f"{int(empty.sum())} of {len(members)} rows have no cluster name in {cluster_column!r} (first at row "
            f"{int(np.argmax(empty))}) and are left out of every fit. Hint: fill in their cluster, or drop them.",
            RowsRejectedWarning, stacklevel=3)
    return cluster_column, [str(n) for n in names], full


def fit_clusters(members, cluster_column=None, *, law="ccm89", rv=3.1, quiet=None, return_fits=False, **kwargs):
    """Fit every cluster of a members table; one row per cluster, ready for ``read_tracers``.

    Parameters
    ----------
    members : `~astropy.table.Table` or table-like
        Member photometry of one or many clusters (see :func:`fit_cluster`), with positions
        (``l``/``b`` or ``ra``/``dec`` in deg) for the tracer table.
    cluster_column : str, optional
        Column naming each star's cluster; found among ``cluster``, ``cluster_name``, ``name``
        ... when not given (a found column with a different value on every row names stars and
        is passed over, with an ``AssumptionWarning``). Without one, all rows are one cluster.
        Rows whose cluster name is empty are left out, counted in
        ``table.meta["rows_without_cluster"]`` and announced (``RowsRejectedWarning``).
    law, rv
        Extinction law and R_V (as in :func:`fit_cluster`).
    quiet : bool, optional
        No progress bar (default: a bar on a terminal only).
    return_fits : bool
        Also return the dict name -> :class:`ClusterFit`.
    **kwargs
        Passed to :func:`fit_cluster` (``sequence``, ``evolved_cut``, ``parallax_floor``, ...).

    Returns
    -------
    table : `~astropy.table.Table`
        Columns :data:`TRACER_COLUMNS`; units on the columns. A cluster whose fit fails
        keeps its row with NaN values and the reason in ``flags`` (``failed: ...``).
    fits : dict, only if ``return_fits``

    Notes
    -----
    ``dustkit.read_tracers(table)`` reads it as it is: the distance comes from
    ``distance_pc`` (with ``distance_pc_err``), which is the same information as ``mu0``;
    read_tracers announces that it chose between the two (pass
    ``columns={"distance_modulus": "mu0"}`` to use the modulus, whose error is Gaussian).
    """
    if not isinstance(members, Table):
        try:
            members = Table(members)
        except Exception:
            raise param_error("members", "an astropy Table (or a dict of columns / DataFrame)", type(members).__name__) from None
    if cluster_column is not None and cluster_column not in members.colnames:
        raise CatalogError(f"cluster_column={cluster_column!r} is not a column of the members table. "
                           f"Columns found: {', '.join(members.colnames)}.")
    if len(members) == 0:
        raise CatalogError("The members table is empty.")
    cluster_column, names, labels = _cluster_labels(members, cluster_column)
    n_unnamed = int(np.count_nonzero(labels < 0))
    order = np.argsort(labels, kind="stable")[n_unnamed:]  # rows without a cluster name sort first
    bounds = np.searchsorted(labels[order], np.arange(len(names) + 1))
    rows_out = []
    fits = {}
    notes = {}
    for i in progress(range(len(names)), total=len(names), desc="fitting clusters", quiet=quiet):
        rows = order[bounds[i]:bounds[i + 1]]
        sub = members[rows]
        name = names[i]
        try:
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always", DegeneracyWarning)
                fit = fit_cluster(sub, law=law, rv=rv, **kwargs)
            for w in caught:
                if not issubclass(w.category, DegeneracyWarning):
                    warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
            if fit.degenerate:
                warnings.warn(f"cluster {name!r}: " + str(next(
                    (w.message for w in caught if issubclass(w.category, DegeneracyWarning)), "E(B-V) and mu0 are degenerate")),
                    DegeneracyWarning, stacklevel=2)
        except CatalogError as exc:
            l, b = _positions(members, rows, np.ones(rows.size))
            rows_out.append(dict(zip(TRACER_COLUMNS, (name, l, b) + (np.nan,) * 7 + (0, np.nan, np.nan, f"failed: {exc}", ""))))
            notes[name] = [str(exc)]
            continue
        fits[name] = fit
        rows_out.append(tracer_row(fit, name, sub))
        notes[name] = list(fit.notes)
    any_fit = next(iter(fits.values()), None)
    t = tracer_table(rows_out, {
        "method": "main-sequence fitting of member photometry (dustkit.clusters.fit_clusters)",
        "law": str(any_fit.law if any_fit else law), "rv": float(rv),
        "sequence_source": any_fit.sequence_source if any_fit else "",
        "sequence_version": (any_fit.sequence_version or "") if any_fit else "",
        "caution": CAUTION,
        "notes": {k: v for k, v in notes.items()},
        "rows_without_cluster": n_unnamed,
    })
    return (t, fits) if return_fits else t
