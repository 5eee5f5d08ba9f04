"""Reading a catalogue in row chunks for the out-of-core builds (:mod:`dustkit.scale`), in the computation layer of the readers.

Each chunk is read into an astropy Table and checked by the in-memory reader's own code
(``dustkit.tracers.assemble.build_tracers``), so a chunked build applies every reading rule of
:func:`dustkit.tracers.read_tracers`. Duplicates in different chunks are found from two 64-bit
keys of each chunk's tracers, kept sorted: a hash of the input row's values (exact copies) and a
hash of the name of each named row (the same name; rows of one name are linked only within
``SAME_NAME_SEPARATION_ARCMIN`` of each other, as in memory); the tracers they link are joined
into groups by connected components and merged by the reader's inverse-variance means
(:func:`cross_chunk_groups`).
"""

from dataclasses import dataclass

import numpy as np

from ..exceptions import CatalogError
from .._lib.units import as_unit
from .arrow import arrow_to_table
from .assemble import build_tracers
from .duplicates import close_pairs_by_key, group_scale_factors, keys_apart, merge_measurements, scale_factor
from .rules import SAME_NAME_SEPARATION_ARCMIN, floor_errors

__all__ = ["Chunk", "ChunkCache", "read_chunk", "chunk_tracers", "row_hash_of", "fit_arrays", "raw_arrays",
           "sorted_keys", "name_of_entry", "cross_chunk_groups", "merge_across", "replace_in_sample", "drop_from_sample", "FIT_FIELDS"]

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
                out[c.name] = vals
                if c.unit:
                    try:  # read as the in-memory reader reads it (dustkit._lib.units.as_unit)
                        out[c.name].unit = as_unit(c.unit)
                    except (ValueError, TypeError):
                        pass
            # the header's frame of equatorial columns, as the in-memory read keeps it (values.equatorial_frame)
            out.meta.update({k: h.header[k] for k in ("RADESYS", "RADECSYS", "EQUINOX") if k in h.header})
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
        :func:`sorted_keys` of a 64-bit hash of the name of each named row (None without a name column;
        rows with an empty name, named ``row <i>`` by the reader, are left out), in the order of
        :func:`_name_entries`: the tracers that stand for one row, then the rows merged within the chunk
        (each with the position of its tracer among the chunk's tracers);
    ``name_lb``
        ``(n_single, l, b)``: the number of entries of the first kind and the positions of the rows of
        the second kind (the others' positions are their tracers');
    ``heads``
        for the tracers that stand for a group of rows merged within the chunk: their positions,
        the number of rows, the length of the sum of the unit vectors their position is the
        mean of (``position_weight`` of ``merge_groups``) and a (7, k) array :func:`_head_parts`.
    """
    table = read_chunk(chunk)
    extras = {}
    f, notes = build_tracers(table, source_desc=f"{chunk.path!r} rows {chunk.start}..{chunk.stop - 1}",
                             file_sha="", extras=extras, **reading)  # no content hash of a chunk's arrays
    if not keys:
        return f, notes, None
    used = list(dict.fromkeys(f["meta"]["columns"].values()))
    rows = np.asarray(f["row"], np.int64)
    out = {"row": sorted_keys(row_hash_of(table, used, rows)), "name": None, "name_lb": None}
    name_col = f["meta"]["columns"].get("name")
    if name_col is not None and f.get("name") is not None:
        names, local, n_single, lm, bm = _name_entries(f, extras)
        out["name"] = sorted_keys(_hash_strings(names), local)
        out["name_lb"] = (n_single, lm, bm)
    dup = f["duplicates"]
    if len(dup):
        heads, n_rows = np.unique(np.asarray(dup["merged_into"], np.int64), return_counts=True)
        at = np.searchsorted(rows, heads)
        out["heads"] = (at, n_rows, np.asarray(extras["position_weight"], float)[at],
                        _head_parts(extras["scatter"], at))
    else:
        out["heads"] = (np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0), np.zeros((7, 0)))
    return f, notes, out


def _head_parts(scatter, at):
    """Per merged tracer at positions ``at``: the unscaled error, chi2 and number of measurements
    of its distance and of its A_V (``scatter`` of ``merge_groups``), then its largest scale
    factor (over distance, A_V and the excess): what a merge across chunks needs to give the
    in-memory errors, and to count the groups whose errors were scaled up."""
    rows = [np.asarray(a, float)[at] for q in ("distance", "av") for a in scatter[q]]
    return np.stack(rows + [np.asarray(group_scale_factors(scatter), float)[at]])


def _name_entries(f, extras):
    """The named rows of a chunk read by ``build_tracers`` (``f`` its fields, ``extras`` its extras):
    ``(names, local, n_single, l, b)``. First the tracers that stand for one row (``local``: their
    positions among the chunk's tracers), then every row of a group merged within the chunk (``local``:
    the position of its group's tracer; ``l``, ``b``: the row's own position, as read). A row is named
    unless the reader named it ``row <i>`` (an empty name)."""
    rows = np.asarray(f["row"], np.int64)
    names = np.asarray(f["name"]).astype(str)
    dup = f["duplicates"]
    merged = np.zeros(rows.size, bool)
    if len(dup):
        merged[np.searchsorted(rows, np.unique(np.asarray(dup["merged_into"], np.int64)))] = True
    single = np.flatnonzero(~merged & (names != np.char.add("row ", rows.astype(str))))
    mrow = np.asarray(dup["row"], np.int64) if len(dup) else np.zeros(0, np.int64)
    mname = np.asarray(dup["name"]).astype(str) if len(dup) else np.zeros(0, str)
    keep = mname != np.char.add("row ", mrow.astype(str))
    mrow, mname = mrow[keep], mname[keep]
    mlocal = np.searchsorted(rows, np.asarray(dup["merged_into"], np.int64)[keep]) if len(dup) else mrow
    if mrow.size:
        all_rows, l, b = extras["row_lb"]
        at = np.searchsorted(all_rows, mrow)
        lm, bm = np.asarray(l, float)[at], np.asarray(b, float)[at]
    else:
        lm = bm = np.zeros(0)
    return (np.concatenate([names[single], mname]), np.concatenate([single, mlocal]).astype(np.int64),
            int(single.size), lm, bm)


def name_of_entry(chunk, reading, entry):
    """The name of entry ``entry`` of a chunk's name keys (see :func:`chunk_tracers`): the chunk read again."""
    extras = {}
    f, _ = build_tracers(read_chunk(chunk), source_desc=f"{chunk.path!r} rows {chunk.start}..{chunk.stop - 1}",
                         file_sha="", extras=extras, **reading)
    return str(_name_entries(f, extras)[0][entry])


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


def _repeated(parts, within=False):
    """``(key, chunk, position, entry)`` of every entry whose key (from :func:`sorted_keys`, per chunk in
    ``parts``) occurs more than once among all chunks (``within``: also twice in one chunk): one merge
    of the sorted runs. ``position`` is among the chunk's tracers, ``entry`` the index of the key."""
    cids = sorted(c for c in parts if parts[c] is not None and parts[c][0].size)
    empty = (np.zeros(0, np.uint64), np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0, np.int64))
    if len(cids) < (1 if within else 2):
        return empty
    s = np.sort(np.concatenate([parts[c][0] for c in cids]), kind="stable")  # merges sorted runs
    rep = np.unique(s[np.flatnonzero(s[1:] == s[:-1])])
    del s
    if rep.size == 0:
        return empty
    keys, cid, local, entry = [], [], [], []
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
        entry.append(pos)
    return np.concatenate(keys), np.concatenate(cid), np.concatenate(local), np.concatenate(entry)


def _entry_positions(keys, cid, local, entry, raw_of):
    """l and b of name entries (see :func:`chunk_tracers`): a merged row's own position, else its
    tracer's (``raw_of(chunk)``, once per chunk)."""
    l, b = np.empty(cid.size), np.empty(cid.size)
    for c in np.unique(cid):
        sel = np.flatnonzero(cid == c)
        n_single, lm, bm = keys[int(c)]["name_lb"]
        member = entry[sel] >= n_single
        at = sel[member]
        l[at], b[at] = lm[entry[at] - n_single], bm[entry[at] - n_single]
        at = sel[~member]
        if at.size:
            raw = raw_of(int(c))
            l[at], b[at] = raw[0][local[at]], raw[1][local[at]]
    return l, b


def _name_links(keys, found, raw_of):
    """Node pairs (``chunk << 32 | position``) linked by the same name within the same-name limit, among
    the entries ``found`` of names held by two or more chunks (:func:`_repeated` with ``within``)."""
    key, cid, local, entry = found
    order = np.lexsort((cid, key))
    k, c = key[order], cid[order]
    new = np.r_[True, (k[1:] != k[:-1]) | (c[1:] != c[:-1])]  # first entry of each (name, chunk)
    first_of_key = np.r_[True, k[1:] != k[:-1]]
    n_chunks = np.add.reduceat(new.astype(np.int64), np.flatnonzero(first_of_key)) if k.size else k
    across = np.zeros(k.size, bool)
    across[order] = np.repeat(n_chunks, np.diff(np.r_[np.flatnonzero(first_of_key), k.size])) > 1
    sel = np.flatnonzero(across)
    if sel.size < 2:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    l, b = _entry_positions(keys, cid[sel], local[sel], entry[sel], raw_of)
    i, j = close_pairs_by_key(key[sel], l, b, SAME_NAME_SEPARATION_ARCMIN / 60.0,
                              shown=lambda h: f"(64-bit hash {int(h)}) held by several chunks")
    node = cid[sel] * (1 << 32) + local[sel]
    i, j = node[i], node[j]
    return i[i != j], j[i != j]


def cross_chunk_groups(keys, raw_of):
    """Tracers of different chunks that are one: exact copies (the same row hash) and the same name.

    ``keys`` maps each chunk's index to the ``keys`` of :func:`chunk_tracers`. Rows of one name are
    linked where they are within ``SAME_NAME_SEPARATION_ARCMIN`` of each other (their positions: a
    row merged within its chunk has its own, kept in the keys; the others are their tracers', from
    ``raw_of(chunk)``, the chunk's :func:`raw_arrays`, asked only of chunks holding a name that another
    chunk holds too). The tracers linked by either key are joined into groups by connected components
    (as in memory, where the name and the copies join rows into one group). Returns a dict with, per
    group member (sorted by group, then chunk and position): ``chunk``, ``local`` (position among the
    chunk's tracers), ``group``, ``copy`` (an exact copy of an earlier member: no new measurement),
    ``source`` (for a copy, the position among the members of the member it repeats; else -1),
    ``head`` (the group's first member, which stands for it), ``n_rows`` (rows the tracer stands for
    after the chunk's own merging) and ``weight`` (the length of the sum of unit vectors its position
    is the mean of; 1 for a single row), ``parts`` (a (7, n) array: :func:`_head_parts` of a tracer
    merged within its chunk, NaN for a single row) and ``head_factors`` (the scale factors of the
    tracers merged within their chunk that are in no group here); and ``apart``:
    ``(rows, names, example)``, the named rows whose
    name is also that of a row of another tracer of the catalogue (kept apart: farther than the limit),
    the number of such names, and ``((chunk, entry), (chunk, entry))`` of a first such row and a row of
    its name elsewhere, with their positions (None without such rows).
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    row_found = _repeated({c: k["row"] for c, k in keys.items()})
    names = _repeated({c: k["name"] for c, k in keys.items() if k["name"] is not None}, within=True)
    ni, nj = _name_links(keys, names, raw_of)
    node = np.concatenate([row_found[1] * (1 << 32) + row_found[2], names[1] * (1 << 32) + names[2]])
    empty = {k: np.zeros(0, np.int64) for k in ("chunk", "local", "group", "n_rows")}
    if node.size == 0:
        return dict(empty, copy=np.zeros(0, bool), head=np.zeros(0, bool), weight=np.zeros(0),
                    source=np.zeros(0, np.int64), apart=(0, 0, None), parts=np.zeros((7, 0)),
                    head_factors=_head_factors(keys, empty["chunk"], empty["local"]))
    uniq, inv = np.unique(node, return_inverse=True)
    copy, source = np.zeros(uniq.size, bool), np.full(uniq.size, -1, np.int64)
    key, cid = row_found[0], row_found[1]
    idx = inv[:key.size]
    order = np.lexsort((idx, key))  # by key, then chunk and position (node ids sort so)
    k, i, c = key[order], idx[order], cid[order]
    link = np.flatnonzero((k[1:] == k[:-1]) & (c[1:] != c[:-1]))
    # every member of a run of equal row hashes after its first is a copy
    run_first = np.maximum.accumulate(np.where(np.r_[True, k[1:] != k[:-1]], np.arange(k.size), 0))
    later = (np.arange(k.size) != run_first) & (c != c[run_first])
    copy[i[later]] = True
    source[i[later]] = i[run_first[later]]
    i = np.concatenate([i[link], np.searchsorted(uniq, ni)])
    j = np.concatenate([idx[order][link + 1], np.searchsorted(uniq, nj)])
    graph = coo_matrix((np.ones(i.size, np.int8), (i, j)), shape=(uniq.size, uniq.size))
    _, group = connected_components(graph, directed=False)
    apart = _apart(keys, names, group[inv[key.size:]], raw_of)
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
    parts = np.full((7, members.size), np.nan)
    for c in np.unique(chunk):
        hpos, hrows, hweight, hparts = keys[int(c)]["heads"]
        sel = np.flatnonzero(chunk == c)
        at = np.searchsorted(hpos, local[sel])
        hit = at < hpos.size
        hit[hit] = hpos[at[hit]] == local[sel][hit]
        n_rows[sel[hit]] = hrows[at[hit]]
        weight[sel[hit]] = hweight[at[hit]]
        parts[:, sel[hit]] = hparts[:, at[hit]]
    return {"chunk": chunk, "local": local, "group": np.unique(grp, return_inverse=True)[1].astype(np.int64),
            "copy": copy[members] & ~head, "source": np.where(copy[members] & ~head, src, -1), "head": head,
            "n_rows": n_rows, "weight": weight, "apart": apart, "parts": parts,
            "head_factors": _head_factors(keys, chunk, local)}


def _head_factors(keys, chunk, local):
    """The scale factors of the tracers merged within their chunk that are not among the members
    (``chunk``, ``local``) of the groups across chunks: those tracers stay as their chunk merged them."""
    out = []
    for c, k in keys.items():
        hpos, hparts = k["heads"][0], k["heads"][3]
        out.append(hparts[6][~np.isin(hpos, local[chunk == c])])
    return np.concatenate(out) if out else np.zeros(0)


def _apart(keys, names, group, raw_of):
    """``(rows, names, example)`` of :func:`cross_chunk_groups` from the entries ``names`` of repeated
    names and the final group of each entry's tracer."""
    key, cid, local, entry = names
    if key.size < 2:
        return 0, 0, None
    apart, example = keys_apart(key, group)
    if example is None:
        return 0, 0, None
    two = np.array(example)
    l, b = _entry_positions(keys, cid[two], local[two], entry[two], raw_of)
    where = tuple((int(cid[x]), int(entry[x]), float(l[n]), float(b[n])) for n, x in enumerate(two))
    return int(apart.sum()), int(np.unique(key[apart]).size), where


def merge_across(groups, raw_of):
    """What the groups of :func:`cross_chunk_groups` change: one tracer (the first) per group.

    ``raw_of(chunk)`` gives a chunk's :func:`raw_arrays`. Returns ``drops`` (chunk -> sorted
    positions of the members that are merged away), ``replace`` (chunk -> (positions of the
    groups' first members, their merged :func:`fit_arrays` as a (6, k) array)) for the groups of
    two or more distinct measurements, and the counts ``merged`` (tracers merged away),
    ``copies`` (exact copies among them), ``rows`` and ``groups`` (to add to the chunks' own
    duplicate rows and groups), ``scaled`` (the groups of the whole catalogue, within and across
    chunks, whose errors were scaled up) and ``largest_factor``. The merged values are the reader's
    inverse-variance means of the members' values (each member already the mean of its chunk's
    group, weighted by its unscaled inverse variance, so the sums equal the in-memory ones); the
    errors are scaled by S = sqrt(chi2 / (N - 1)) from the members' own chi2 and N plus their
    scatter about the mean, which is the in-memory chi2 of all the rows (see ``merge_measurements``;
    a group merged across chunks is counted as scaled by its distance and A_V, the values read
    here, or by the excess of a group merged within one chunk); positions are the mean of the
    members' unit vectors each weighted by the length of the sum it is the direction of, which is
    the in-memory sum of all the rows' vectors.
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
    # scale factors: a group not merged again keeps its head's (1 for a single row)
    final = np.nan_to_num(groups["parts"][6][head], nan=1.0)
    _count_scaled(counts, groups["head_factors"], final)
    if sel.size == 0:
        return drops, replace, counts
    need, mult = member[sel], mult[sel]
    fields = {k: np.empty(need.size) for k in FIT_FIELDS}
    for c in np.unique(chunk[need]):
        at = np.flatnonzero(chunk[need] == c)
        raw = raw_of(int(c))
        for k, arr in zip(FIT_FIELDS, raw):
            fields[k][at] = arr[local[need][at]]
    ids, g = np.unique(group[need], return_inverse=True)
    first = np.flatnonzero(head[need] & (mult > 0))
    first = first[np.unique(g[first], return_index=True)[1]]  # each group's head, once
    merged = merge_measurements(fields, g, first, mult, weight=groups["weight"][need],
                                parts=_member_parts(groups["parts"][:, need], fields))
    final[ids] = np.max([scale_factor(chi2, n) for _, chi2, n in merged["scatter"].values()], axis=0)
    _count_scaled(counts, groups["head_factors"], final)
    values = np.stack(fit_arrays(tuple(merged[k] for k in FIT_FIELDS)))
    hc, hl = chunk[need][first], local[need][first]
    for c in np.unique(hc):
        sel = np.flatnonzero(hc == c)
        sel = sel[np.argsort(hl[sel])]
        replace[int(c)] = (hl[sel], values[:, sel])
    return drops, replace, counts


def _member_parts(parts, fields):
    """``parts`` of ``merge_measurements`` for the members of groups across chunks: a tracer merged
    within its chunk has its :func:`_head_parts`; a single row is one measurement (its error, chi2 = 0)."""
    out = {}
    for q, err, r in (("distance", "distance_err", 0), ("av", "av_err", 3)):
        single = np.isnan(parts[r])
        out[q] = (np.where(single, fields[err], parts[r]), np.where(single, 0.0, parts[r + 1]),
                  np.where(single, 1.0, parts[r + 2]))
    return out


def _count_scaled(counts, head_factors, final):
    """The groups of the whole catalogue whose errors were scaled up, and the largest factor, into ``counts``:
    the chunks' own groups not merged again (``head_factors``) and the groups across chunks (``final``)."""
    factors = np.concatenate([np.asarray(head_factors, float), final])
    counts["scaled"] = int(np.sum(factors > 1.0))
    counts["largest_factor"] = float(factors.max()) if factors.size else 1.0


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
