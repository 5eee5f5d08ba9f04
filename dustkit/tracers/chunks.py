"""Reading a catalogue in row chunks for the out-of-core builds (:mod:`dustkit.scale`), in the computation layer of the readers.

Each chunk is read into an astropy Table and checked by the in-memory reader's own code
(``dustkit.tracers.assemble.build_tracers``), so a chunked build applies every reading rule of
:func:`dustkit.tracers.read_tracers`; exact copies in different chunks are found by a 64-bit
hash of their input rows.
"""

from dataclasses import dataclass

import numpy as np
from astropy import units as u

from ..exceptions import CatalogError
from .assemble import build_tracers
from .rules import floor_errors

__all__ = ["Chunk", "ChunkCache", "read_chunk", "chunk_tracers", "row_hash_of", "fit_arrays", "cross_chunk_copies",
           "drop_from_sample"]


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
    from astropy.table import MaskedColumn, Table

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
        out = Table()
        for name in tab.column_names:
            col = tab.column(name)
            if pa.types.is_string(col.type) or pa.types.is_large_string(col.type):
                vals = np.asarray(col.fill_null("").to_numpy(zero_copy_only=False)).astype(str)
            else:
                vals = col.to_numpy(zero_copy_only=False)
            if col.null_count:
                out[name] = MaskedColumn(vals, mask=np.asarray(col.is_null().to_numpy(zero_copy_only=False), bool))
            else:
                out[name] = vals
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


def chunk_tracers(chunk, reading, hashes=False):
    """One chunk read and checked by the in-memory reader's rules (``build_tracers``: column recognition,
    units, moduli, parallax prior, correlations, rejections, default errors, duplicates within the
    chunk). Returns the fields of a TracerSet, the notes (warnings) the reader would give and, with
    ``hashes``, a 64-bit hash of each tracer's input row (its values in every column used)."""
    table = read_chunk(chunk)
    f, notes = build_tracers(table, source_desc=f"{chunk.path!r} rows {chunk.start}..{chunk.stop - 1}",
                             file_sha=None, **reading)
    if not hashes:
        return f, notes, None
    return f, notes, row_hash_of(table, list(dict.fromkeys(f["meta"]["columns"].values())), f["row"])


def row_hash_of(table, names, rows):
    """A 64-bit hash of the values of columns ``names`` in rows ``rows`` (exact copies share it)."""
    from pandas.util import hash_array

    h = np.zeros(np.size(rows), dtype=np.uint64)
    with np.errstate(over="ignore"):
        for k, name in enumerate(names):
            col = table[name]
            data = np.asarray(col.filled(np.nan) if hasattr(col, "filled") and col.dtype.kind == "f" else col)[rows]
            if data.dtype.kind in "fiub":
                x = np.ascontiguousarray(data, dtype=float).view(np.uint64)
            else:
                x = hash_array(data.astype(str).astype(object))
            h ^= (x + np.uint64(k + 1)) * np.uint64(0x9E3779B97F4A7C15)
            h = (h << np.uint64(13)) | (h >> np.uint64(51))
    return h


def fit_arrays(f):
    """The six arrays a fit uses, errors floored as every fit floors them (rules.floor_errors)."""
    de, ae = floor_errors(f["distance"], f["distance_err"], f["av_err"], warn=False)
    return (np.asarray(f["l"], float), np.asarray(f["b"], float), np.asarray(f["distance"], float),
            np.asarray(de, float), np.asarray(f["av"], float), np.asarray(ae, float))


class ChunkCache:
    """Pass 1's checked arrays per chunk (keyed by its first catalogue row), shared by local threads.
    (An object, not a dict, so that dask passes it as it is.)"""

    def __init__(self):
        self.arrays = {}


def cross_chunk_copies(hashes, n_chunks):
    """Positions (per chunk) of tracers whose 64-bit value hash repeats one of an earlier chunk."""
    if n_chunks < 2:
        return {}
    h = np.concatenate([hashes[i] for i in range(n_chunks)])
    cid = np.concatenate([np.full(hashes[i].size, i, dtype=np.int64) for i in range(n_chunks)])
    local = np.concatenate([np.arange(hashes[i].size, dtype=np.int64) for i in range(n_chunks)])
    o = np.argsort(h)  # one sort of all hashes; only the (few) repeated ones are ordered further
    ho = h[o]
    rep = np.flatnonzero(ho[1:] == ho[:-1])
    if rep.size == 0:
        return {}
    members = o[np.unique(np.concatenate([rep, rep + 1]))]
    order = members[np.lexsort((local[members], cid[members], h[members]))]
    hs, cs = h[order], cid[order]
    later = np.flatnonzero(hs[1:] == hs[:-1]) + 1
    # a copy of an earlier chunk's tracer (copies within one chunk were merged by its own rules)
    first = np.maximum.accumulate(np.where(np.r_[True, hs[1:] != hs[:-1]], np.arange(hs.size), 0))
    later = later[cs[later] != cs[first[later]]]
    out = {}
    for i in np.unique(cid[order[later]]):
        sel = order[later][cid[order[later]] == i]
        out[int(i)] = np.sort(local[sel])
    return out


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
