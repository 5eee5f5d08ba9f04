"""Reading a catalogue in row chunks for the out-of-core builds (:mod:`dustkit.scale`), in the computation layer of the readers.

Each chunk is read into an astropy Table and checked by the in-memory reader's own code
(``dustkit.tracers.assemble.build_tracers``), so a chunked build applies every reading rule of
:func:`dustkit.tracers.read_tracers`. Duplicates in different chunks are found from two 64-bit
keys of each chunk's tracers, kept sorted: a hash of the input row's values (exact copies) and a
hash of the name (the same name); the tracers they link are joined into groups by connected
components and merged by the reader's inverse-variance means (:func:`cross_chunk_groups`).
"""

from dataclasses import dataclass

import numpy as np
from astropy import units as u

from ..exceptions import CatalogError
from .arrow import arrow_to_table
from .assemble import build_tracers
from .duplicates import merge_measurements
from .rules import floor_errors

__all__ = ["Chunk", "ChunkCache", "read_chunk", "chunk_tracers", "row_hash_of", "fit_arrays", "raw_arrays",
           "sorted_keys", "cross_chunk_groups", "merge_across", "replace_in_sample", "drop_from_sample", "FIT_FIELDS"]

#: The per-tracer fields a fit uses, in the order of :func:`fit_arrays` and :func:`raw_arrays`.
FIT_FIELDS = ("l", "b", "distance", "distance_err", "av", "av_err")


@dataclass(frozen=True)
class Chunk:
    """Rows ``start:stop`` of one file; ``row0`` is the catalogue row number of ``start``."""

    kind: str  # "parquet" or "fits"
    path: str
    start: int
    stop: int
    row0: int
    hdu: int = 1
    row_groups: tuple = ()
    group_start: int = 0  # first row of row_groups[0] within the file


def read_chunk(chunk):
    """Rows ``start:stop`` of a file as an astropy Table (every column; FITS units kept, nulls masked)."""
    from astropy.table import Table

    n = chunk.stop - chunk.start
    if chunk.kind == "parquet":
        import pyarrow as pa
        import pyarrow.parquet as pq

        pf = pq.ParquetFile(chunk.path)
        batches = []
        pos = chunk.group_start
        for batch in pf.iter_batches(batch_size=min(max(n, 1024), 1 << 20), row_groups=list(chunk.row_groups),
                                     use_threads=False):
            lo = max(chunk.start - pos, 0)
            hi = min(chunk.stop - pos, batch.num_rows)
            pos += batch.num_rows
            if hi > lo:
                batches.append(batch.slice(lo, hi - lo))
            if pos >= chunk.stop:
                break
        tab = pa.Table.from_batches(batches, schema=pf.schema_arrow) if batches else pf.schema_arrow.empty_table()
        out = arrow_to_table(tab, pf.schema_arrow.metadata)  # as the in-memory reader converts it
    else:
        from astropy.io import fits

        with fits.open(chunk.path, memmap=True) as hl:
            h = hl[chunk.hdu]
            data = h.data[chunk.start:chunk.stop]  # only this chunk is read (and scaled, for TSCAL columns)
            out = Table()
            for c in h.columns:
                vals = np.array(data.field(c.name))
                if vals.dtype.kind == "S":
                    vals = np.char.decode(vals, "utf-8", "replace")
                unit = None
                if c.unit:
                    unit = u.Unit(c.unit, parse_strict="silent")
                    if isinstance(unit, u.UnrecognizedUnit):
                        unit = u.Unit(str(c.unit).strip().lower(), parse_strict="silent")
                out[c.name] = vals
                if unit is not None and not isinstance(unit, u.UnrecognizedUnit):
                    out[c.name].unit = unit
            del data
    if len(out) != n:
        raise CatalogError(f"Read {len(out)} rows instead of {n} from {chunk.path!r}; the file changed during the build?")
    return out


def chunk_tracers(chunk, reading, keys=False):
    """One chunk read and checked by the in-memory reader's rules (``build_tracers``: column recognition,
    units, moduli, parallax prior, correlations, rejections, default errors, duplicates within the
    chunk). Returns the fields of a TracerSet, the notes (warnings) the reader would give and, with
    ``keys``, what finding duplicates across chunks needs (else None): a dict of

    ``row``
        :func:`sorted_keys` of a 64-bit hash of each tracer's input row (its values in every column used);
    ``name``
        :func:`sorted_keys` of a 64-bit hash of each named tracer's name (None without a name column;
        rows with an empty name, named ``row <i>`` by the reader, are left out);
    ``heads``
        for the tracers that stand for a group of rows merged within the chunk: their positions,
        the number of rows and the length of the sum of the unit vectors their position is the
        mean of (``position_weight`` of ``merge_groups``).
    """
    table = read_chunk(chunk)
    extras = {}
    f, notes = build_tracers(table, source_desc=f"{chunk.path!r} rows {chunk.start}..{chunk.stop - 1}",
                             file_sha="", extras=extras, **reading)  # no content hash of a chunk's arrays
    if not keys:
        return f, notes, None
    used = list(dict.fromkeys(f["meta"]["columns"].values()))
    rows = np.asarray(f["row"], np.int64)
    out = {"row": sorted_keys(row_hash_of(table, used, rows)), "name": None}
    name_col = f["meta"]["columns"].get("name")
    if name_col is not None and f.get("name") is not None:
        raw = table[name_col]
        named = ~np.ma.getmaskarray(raw)[rows] & (np.asarray(f["name"]) != np.char.add("row ", rows.astype(str)))
        local = np.flatnonzero(named)
        out["name"] = sorted_keys(_hash_strings(np.asarray(f["name"])[local]), local)
    dup = f["duplicates"]
    if len(dup):
        heads, n_rows = np.unique(np.asarray(dup["merged_into"], np.int64), return_counts=True)
        at = np.searchsorted(rows, heads)
        out["heads"] = (at, n_rows, np.asarray(extras["position_weight"], float)[at])
    else:
        out["heads"] = (np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0))
    return f, notes, out


def sorted_keys(keys, local=None):
    """``(keys sorted, keys in tracer order, positions of those keys among the chunk's tracers)`` for
    :func:`cross_chunk_groups` (``local`` None: the keys of every tracer, in order)."""
    return np.sort(keys), keys, local


def _hash_strings(values):
    from pandas.util import hash_array

    return hash_array(np.asarray(values).astype(object))


def row_hash_of(table, names, rows):
    """A 64-bit hash of the values of columns ``names`` in rows ``rows`` (exact copies share it)."""
    h = np.zeros(np.size(rows), dtype=np.uint64)
    with np.errstate(over="ignore"):
        for k, name in enumerate(names):
            col = table[name]
            data = np.asarray(col.filled(np.nan) if hasattr(col, "filled") and col.dtype.kind == "f" else col)[rows]
            if data.dtype.kind in "fiub":
                x = np.ascontiguousarray(data, dtype=float).view(np.uint64)
            else:
                x = _hash_strings(data.astype(str))
            h ^= (x + np.uint64(k + 1)) * np.uint64(0x9E3779B97F4A7C15)
            h = (h << np.uint64(13)) | (h >> np.uint64(51))
    return h


def raw_arrays(f):
    """The six arrays of :data:`FIT_FIELDS` as read (errors not floored), float."""
    return tuple(np.asarray(f[k], float) for k in FIT_FIELDS)


def fit_arrays(f):
    """The six arrays a fit uses, errors floored as every fit floors them (rules.floor_errors);
    ``f`` is a dict of fields or the tuple of :func:`raw_arrays`."""
    l, b, d, de, av, ae = raw_arrays(f) if isinstance(f, dict) else f
    de, ae = floor_errors(d, de, ae, warn=False)
    return l, b, d, np.asarray(de, float), av, np.asarray(ae, float)


class ChunkCache:
    """Pass 1's checked arrays per chunk (keyed by its first catalogue row), shared by local threads.
    (An object, not a dict, so that dask passes it as it is.)"""

    def __init__(self):
        self.arrays = {}


def _repeated(parts):
    """``(key, chunk, position)`` of every tracer whose key (from :func:`sorted_keys`, per chunk in
    ``parts``) occurs more than once among all chunks: one merge of the sorted runs."""
    cids = sorted(c for c in parts if parts[c] is not None and parts[c][0].size)
    empty = (np.zeros(0, np.uint64), np.zeros(0, np.int64), np.zeros(0, np.int64))
    if len(cids) < 2:
        return empty
    s = np.sort(np.concatenate([parts[c][0] for c in cids]), kind="stable")  # merges sorted runs
    rep = np.unique(s[np.flatnonzero(s[1:] == s[:-1])])
    del s
    if rep.size == 0:
        return empty
    keys, cid, local = [], [], []
    for c in cids:
        hs, unsorted, pos_of = parts[c]
        lo, hi = np.searchsorted(hs, rep, "left"), np.searchsorted(hs, rep, "right")
        if not np.any(hi > lo):
            continue
        here = rep[hi > lo]  # the few repeated keys this chunk holds: found in its tracer order
        at = np.searchsorted(here, unsorted)
        pos = np.flatnonzero(here[np.minimum(at, here.size - 1)] == unsorted)
        keys.append(unsorted[pos])
        cid.append(np.full(pos.size, c, dtype=np.int64))
        local.append(pos if pos_of is None else np.asarray(pos_of)[pos])
    return np.concatenate(keys), np.concatenate(cid), np.concatenate(local)


def cross_chunk_groups(keys):
    """Tracers of different chunks that are one: exact copies (the same row hash) and the same name.

    ``keys`` maps each chunk's index to the ``keys`` of :func:`chunk_tracers`. The tracers linked
    by either key are joined into groups by connected components (as in memory, where the name
    and the copies join rows into one group). Returns a dict with, per group member (sorted by
    group, then chunk and position): ``chunk``, ``local`` (position among the chunk's tracers),
    ``group``, ``copy`` (an exact copy of an earlier member: no new measurement), ``source``
    (for a copy, the position among the members of the member it repeats; else -1), ``head`` (the
    group's first member, which stands for it), ``n_rows`` (rows the tracer stands for after the
    chunk's own merging) and ``weight`` (the length of the sum of unit vectors its position is
    the mean of; 1 for a single row).
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    found = [_repeated({c: k["row"] for c, k in keys.items()}),
             _repeated({c: k["name"] for c, k in keys.items() if k["name"] is not None})]
    node = np.concatenate([c * (1 << 32) + p for _, c, p in found])
    empty = {k: np.zeros(0, np.int64) for k in ("chunk", "local", "group", "n_rows")}
    if node.size == 0:
        return dict(empty, copy=np.zeros(0, bool), head=np.zeros(0, bool), weight=np.zeros(0),
                    source=np.zeros(0, np.int64))
    uniq, inv = np.unique(node, return_inverse=True)
    ii, jj, copy, source = [], [], np.zeros(uniq.size, bool), np.full(uniq.size, -1, np.int64)
    start = 0
    for kind, (key, cid, _) in zip(("row", "name"), found):
        idx = inv[start:start + key.size]
        start += key.size
        order = np.lexsort((idx, key))  # by key, then chunk and position (node ids sort so)
        k, i, c = key[order], idx[order], cid[order]
        link = np.flatnonzero((k[1:] == k[:-1]) & (c[1:] != c[:-1]))
        ii.append(i[link])
        jj.append(i[link + 1])
        if kind == "row":  # every member of a run of equal row hashes after its first is a copy
            run_first = np.maximum.accumulate(np.where(np.r_[True, k[1:] != k[:-1]], np.arange(k.size), 0))
            later = (np.arange(k.size) != run_first) & (c != c[run_first])
            copy[i[later]] = True
            source[i[later]] = i[run_first[later]]
    i, j = np.concatenate(ii), np.concatenate(jj)
    graph = coo_matrix((np.ones(i.size, np.int8), (i, j)), shape=(uniq.size, uniq.size))
    _, group = connected_components(graph, directed=False)
    sizes = np.bincount(group)
    members = np.flatnonzero(sizes[group] > 1)  # node ids sort by chunk, then position
    members = members[np.lexsort((members, group[members]))]
    chunk, local = uniq[members] >> 32, uniq[members] & ((1 << 32) - 1)
    grp = group[members]
    head = np.r_[True, grp[1:] != grp[:-1]]
    at_node = np.full(uniq.size, -1, np.int64)
    at_node[members] = np.arange(members.size)
    src = source[members]
    src = np.where(src >= 0, at_node[np.maximum(src, 0)], -1)  # the member each copy repeats
    n_rows, weight = np.ones(members.size, np.int64), np.ones(members.size)
    for c in np.unique(chunk):
        hpos, hrows, hweight = keys[int(c)]["heads"]
        sel = np.flatnonzero(chunk == c)
        at = np.searchsorted(hpos, local[sel])
        hit = at < hpos.size
        hit[hit] = hpos[at[hit]] == local[sel][hit]
        n_rows[sel[hit]] = hrows[at[hit]]
        weight[sel[hit]] = hweight[at[hit]]
    return {"chunk": chunk, "local": local, "group": np.unique(grp, return_inverse=True)[1].astype(np.int64),
            "copy": copy[members] & ~head, "source": np.where(copy[members] & ~head, src, -1), "head": head,
            "n_rows": n_rows, "weight": weight}


def merge_across(groups, raw_of):
    """What the groups of :func:`cross_chunk_groups` change: one tracer (the first) per group.

    ``raw_of(chunk)`` gives a chunk's :func:`raw_arrays`. Returns ``drops`` (chunk -> sorted
    positions of the members that are merged away), ``replace`` (chunk -> (positions of the
    groups' first members, their merged :func:`fit_arrays` as a (6, k) array)) for the groups of
    two or more distinct measurements, and the counts ``merged`` (tracers merged away),
    ``copies`` (exact copies among them), ``rows`` and ``groups`` (to add to the chunks' own
    duplicate rows and groups). The merged values are the reader's inverse-variance means of the
    members' values (each member already the mean of its chunk's group, so the sums equal the
    in-memory ones); positions are the mean of the members' unit vectors each weighted by the
    length of the sum it is the direction of, which is the in-memory sum of all the rows' vectors.
    """
    chunk, local, group, copy, head = (groups[k] for k in ("chunk", "local", "group", "copy", "head"))
    drops = {int(c): np.sort(local[(chunk == c) & ~head]) for c in np.unique(chunk[~head])}
    counts = {"merged": int((~head).sum()), "copies": int(copy.sum()), "rows": int(np.sum(groups["n_rows"] == 1)),
              "groups": int(head.sum()) - int(np.sum(groups["n_rows"] > 1))}
    # how often each member counts: copies not at all; but a copy that its own chunk merged with
    # other rows stands for them too: it counts, and the single row it repeats is taken out once
    use = (~copy).astype(float)
    src = groups["source"]
    carries = copy & (groups["n_rows"] > 1) & (src >= 0)
    carries[carries] = groups["n_rows"][src[carries]] == 1
    use[carries] = 1.0
    extra = src[carries]  # members counted once more with -1
    member = np.concatenate([np.arange(chunk.size), extra])
    mult = np.concatenate([use, np.full(extra.size, -1.0)])
    n_pos = np.bincount(group[member], mult > 0, minlength=int(head.sum()) if head.size else 0)
    sel = np.flatnonzero(n_pos[group[member]] >= 2)
    replace = {}
    if sel.size == 0:
        return drops, replace, counts
    need, mult = member[sel], mult[sel]
    fields = {k: np.empty(need.size) for k in FIT_FIELDS}
    for c in np.unique(chunk[need]):
        at = np.flatnonzero(chunk[need] == c)
        raw = raw_of(int(c))
        for k, arr in zip(FIT_FIELDS, raw):
            fields[k][at] = arr[local[need][at]]
    g = np.unique(group[need], return_inverse=True)[1]
    first = np.flatnonzero(head[need] & (mult > 0))
    first = first[np.unique(g[first], return_index=True)[1]]  # each group's head, once
    merged = merge_measurements(fields, g, first, mult, weight=groups["weight"][need])
    values = np.stack(fit_arrays(tuple(merged[k] for k in FIT_FIELDS)))
    hc, hl = chunk[need][first], local[need][first]
    for c in np.unique(hc):
        sel = np.flatnonzero(hc == c)
        sel = sel[np.argsort(hl[sel])]
        replace[int(c)] = (hl[sel], values[:, sel])
    return drops, replace, counts


def replace_in_sample(sample, replace):
    """Put the merged values of ``replace`` (from :func:`merge_across`) into the sample's rows."""
    if not replace or sample is None:
        return
    for c, (pos, values) in replace.items():
        rows = np.flatnonzero(sample["chunk"] == c)
        at = np.searchsorted(pos, sample["local"][rows])
        hit = at < pos.size
        hit[hit] = pos[at[hit]] == sample["local"][rows][hit]
        sample["data"][:, rows[hit]] = values[:, at[hit]]


def drop_from_sample(sample, drops):
    """Remove dropped tracers from the sample and renumber the rest among their chunk's tracers."""
    if not drops or sample is None:
        return
    keep = np.ones(sample["key"].size, dtype=bool)
    local = sample["local"].copy()
    for i, d in drops.items():
        inchunk = sample["chunk"] == i
        keep[inchunk] &= ~np.isin(sample["local"][inchunk], d)
        local[inchunk] -= np.searchsorted(d, sample["local"][inchunk])
    sample["local"] = local
    for name in list(sample):
        sample[name] = sample[name][..., keep]
