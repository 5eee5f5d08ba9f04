"""Out-of-core and distributed builds for catalogues larger than memory (dask).

:func:`build_from_parquet` builds the same :class:`~dustkit.model.ExtinctionModel` as
``ExtinctionModel(uncertainty="bin-scatter").fit(tracers)`` from a Parquet file, a folder
of Parquet files, or a large FITS table, reading it in row chunks so that peak memory does
not grow with the catalogue.

How the build runs
------------------
Pass 1 (sample)
    Every chunk is read by the code of :func:`dustkit.tracers.read_tracers`
    (``dustkit.tracers.assemble.build_tracers``: column recognition, units and the kpc check,
    true/apparent moduli, parallax prior distances, correlations, error floors, rejections,
    duplicates merged within the chunk); rows rejected and merged are counted by reason and
    the reader's warnings said once for the whole catalogue (counts summed). Duplicates in
    different chunks are found from two 64-bit hashes of each tracer kept sorted per chunk
    (its input row's values, and the name of each of its rows): exact copies are counted once
    and tracers with rows of the same name within ``SAME_NAME_SEPARATION_ARCMIN`` of each other
    (the positions of chunks holding a name another chunk holds are read from the cache, or the
    chunk again) merged into the first by the reader's inverse-variance means, so the counts,
    values and rows of one name kept apart equal the in-memory read's (an exact copy that its
    own chunk merged with other rows keeps them, the repeated row taken out once). Not found
    across chunks: near-duplicates
    by position alone; and when the repeated row was itself merged in its chunk, the copy's
    group is dropped with it. Local builds of at most
    ``CACHE_ROWS`` rows keep each chunk's checked arrays for pass 2. A deterministic uniform
    random sample is kept: the rows with the smallest values of a 64-bit hash of their row
    number (a "bottom-k" sample, which merges exactly across chunks and workers). The
    smooth dust layer is fitted to the sample (``layer_sample`` rows). Catalogues of at
    most ``heldout_sample`` rows are cross-validated K-fold over all rows (each row's fold
    a hash of its position among the accepted rows); larger ones hold out the first
    ``min(heldout_sample, n / n_folds)`` rows of the sample as one held-out set.
Pass 2 (sufficient statistics)
    Every chunk adds its tracers to the sums of weights and weighted residuals from the
    layer per (pixel, distance edge), and its held-out rows to the held-out sums, with the
    model's own per-tracer step (:func:`dustkit.binned.statistics.nominal_statistics`, as in
    :meth:`ExtinctionModel.fit`). Neither depends on the chunking or on which worker reads
    a chunk. Chunks are processed by dask: one
    task per chunk, in as many parallel chains as there are threads (each chain adds its
    chunks into one array), then the chains' arrays are summed pairwise. With a
    ``dask.distributed`` client the tasks run on the cluster; otherwise on dask's local
    threaded scheduler.
Finish
    Exactly as in memory, through the model's public seam
    (:meth:`ExtinctionModel.fit_statistics`): cross-validation over sky and
    distance smoothing and random-walk strength, calibration of the unresolved scatter,
    and isotonic regression.

How the large path differs from the per-tracer Monte Carlo scheme
-----------------------------------------------------------------
The in-memory build of a small catalogue (up to 300 000 tracers by default) draws Monte
Carlo realisations of each tracer's distance and A_V, so a tracer spreads over the distance
bins its uncertainty allows. The large path uses the ``'bin-scatter'`` scheme: each tracer
enters once at its nominal distance and in its own sky pixel (the sky kernel chosen by
cross-validation does the spreading), and the uncertainty of a node comes from the
weighted scatter of the tracers around it (distance errors show up as that scatter). The
unresolved-scatter calibration still integrates over each held-out tracer's distance
uncertainty. For the same tracers, the same layer and the same held-out rows, the
statistics, the tracer counts and the final model equal the in-memory ``'bin-scatter'``
build to floating-point summation tolerance. (In memory, catalogues above 50 000 tracers
hold out a random set drawn from the row numbers; here the held-out rows come from the
hashed sample, so the two pick different, equally random, held-out sets.)

Memory
------
Peak memory is set by the grid and the chunk size, not by the catalogue: each parallel
chain holds statistics arrays of ``5 x (1 + n_folds) x npix x n_edges`` float64 at most
(NSIDE 64, 51 edges, K-fold: 0.6 GB; one held-out set: 0.2 GB) and one chunk of rows
(about 0.3 GB per million rows while it is being added). The number of local chains is capped so that their arrays stay under
2 GiB. The finishing step needs what the in-memory build of the same grid needs.
"""

import functools
import os
import time
import warnings
from pathlib import Path

import numpy as np
from astropy import units as u

from .exceptions import AssumptionWarning, CatalogError, DuplicatesWarning, RowsRejectedWarning
from ._lib.formats import CHUNKED_FORMATS, format_for, parquet_parts
from ._lib.progress import progress
from ._lib.validation import check_int, param_error
from .layer import fit_layer, given_layer
from .tracers.assemble import scaled_text
from .tracers.chunks import (Chunk, ChunkCache, chunk_tracers, cross_chunk_groups, drop_from_sample, fit_arrays,
                              merge_across, name_of_entry, raw_arrays, replace_in_sample)
from .tracers.rules import (DEFAULT_DISTANCE_FRAC_ERR, DEFAULT_EXCESS_ERR, DUPLICATE_SEPARATION_ARCSEC,
                            PARALLAX_ERR_FLOOR, PARALLAX_LENGTH_SCALE, check_duplicates, check_law,
                            same_name_apart_notes)
from .binned.folds import HeldOut, fold_of_positions, fold_of_rows, row_hash, seed_of
from .binned.statistics import Statistics, nominal_statistics
from .model import ExtinctionModel

__all__ = ["build_from_parquet", "build_from_fits", "fold_of_rows", "DEFAULT_COLUMNS", "OUT_OF_CORE_ROWS",
           "build_path"]

#: The plain A_V catalogue's column names (recognised like any other by the reader's rules).
DEFAULT_COLUMNS = {
    "l": "l",
    "b": "b",
    "distance": "distance",
    "distance_err": "distance_err",
    "av": "av",
    "av_err": "av_err",
}
#: Local (threaded) builds of at most this many rows keep each chunk's checked arrays from pass 1
#: for pass 2 (48 bytes a row: 0.5 GB for 10^7 rows) instead of reading and checking it twice.
CACHE_ROWS = 20_000_000
_LOCAL_STATS_BUDGET = 2 * 2**30  # bytes of statistics arrays held by local parallel chains

# every chunk is read by the in-memory reader's own code (dustkit.tracers.assemble.build_tracers):
# the same recognition, units, moduli, parallax prior, rejections, default errors and duplicates


# ----------------------------------------------------------------------------- row hashing

# row hashing and folds: dustkit.binned.folds (row_hash, fold_of_rows), shared with ExtinctionModel.fit


# ----------------------------------------------------------------------------- reading chunks

def _find_files(source):
    """Sorted list of (kind, path) for a file or a folder of Parquet files."""
    p = Path(os.fspath(source)).expanduser()
    if not p.exists():
        raise CatalogError(f"No such file or folder: {str(p)!r}. Hint: check the path.")
    if p.is_dir():
        files = parquet_parts(p)
        if not files:
            parquet = ", ".join(f"*{s}" for s, f in sorted(CHUNKED_FORMATS.items()) if f == "parquet")
            raise CatalogError(
                f"The folder {str(p)!r} holds no Parquet files ({parquet}). "
                "Hint: point to the folder that holds the catalogue's parts, or to one file."
            )
        return [("parquet", str(q)) for q in files]
    return [(format_for(p, "chunked"), str(p))]


def _plan(files, chunk_size, hdu):
    """Chunks of every file and the total row count."""
    import pyarrow.parquet as pq

    chunks = []
    row0 = 0
    for kind, path in files:
        if kind == "parquet":
            try:
                pf = pq.ParquetFile(path)
            except Exception as exc:  # pyarrow raises several types for a bad file
                raise CatalogError(f"Cannot read the Parquet file {path!r}: {exc}. Hint: check the file.") from None
            md = pf.metadata
            sizes = np.array([md.row_group(i).num_rows for i in range(md.num_row_groups)], dtype=np.int64)
            starts = np.concatenate([[0], np.cumsum(sizes)])
            n = int(starts[-1])
            for s in range(0, n, chunk_size):
                e = min(s + chunk_size, n)
                first = int(np.searchsorted(starts, s, side="right") - 1)
                last = int(np.searchsorted(starts, e, side="left") - 1)
                chunks.append(Chunk("parquet", path, s, e, row0 + s, row_groups=tuple(range(first, last + 1)),
                                     group_start=int(starts[first])))
        else:
            from astropy.io import fits

            with fits.open(path, memmap=True) as hl:
                index = hdu
                if index is None:
                    index = next((i for i, h in enumerate(hl) if isinstance(h, fits.BinTableHDU)), None)
                    if index is None:
                        raise CatalogError(f"The FITS file {path!r} has no binary table. Hint: pass hdu=<index>.")
                h = hl[index]
                if not isinstance(h, (fits.BinTableHDU, fits.TableHDU)):
                    raise CatalogError(f"HDU {index} of {path!r} is not a table. Hint: pass hdu=<index of the table>.")
                n = int(h.header.get("NAXIS2", 0))
            for s in range(0, n, chunk_size):
                chunks.append(Chunk("fits", path, s, min(s + chunk_size, n), row0 + s, hdu=int(index)))
        row0 += n
    return chunks, row0


# ----------------------------------------------------------------------------- validation

_NOTES_DROPPED = (RowsRejectedWarning, DuplicatesWarning)  # said once for the whole catalogue instead


def _pass1_link(acc, cid, chunk, reading, k, seed, cache=None):
    """Read and check one chunk; merge its bottom-k rows (by row hash) into the running sample.

    With a ``cache`` (a dict shared by the local threads) the chunk's fit arrays are kept for
    pass 2, which then neither reads nor checks the chunk again."""
    f, notes, keys = chunk_tracers(chunk, reading, keys=reading["duplicates"] == "merge")
    file_row = chunk.row0 + np.asarray(f["row"], np.int64)  # catalogue row number of each tracer
    key = row_hash(file_row, seed, 1)
    sel = np.argpartition(key, k - 1)[:k] if key.size > k else np.arange(key.size)
    raw = raw_arrays(f)
    arrays = fit_arrays(raw)
    if cache is not None:
        cache.arrays[chunk.row0] = raw  # as read: merges across chunks need the errors before the floors
    part = {
        "key": key[sel],
        "file_row": file_row[sel],
        "chunk": np.full(sel.size, cid, dtype=np.int64),
        "local": sel.astype(np.int64),  # position among the chunk's tracers
        "data": np.stack([c[sel] for c in arrays]),
    }
    if acc is None:
        acc = {"sample": None, "valid": {}, "rows": 0, "counts": {}, "examples": [], "notes": [],
               "assumptions": [], "keys": {}, "merged": 0, "dup_rows": 0, "dup_groups": 0, "meta": None}
    meta = f["meta"]
    acc["valid"][cid] = int(key.size)
    if keys is not None:
        acc["keys"][cid] = keys
    acc["rows"] += chunk.stop - chunk.start
    acc["merged"] += int(meta.get("n_merged", 0))
    dup = f["duplicates"]
    acc["dup_rows"] += len(dup)
    acc["dup_groups"] += int(np.unique(np.asarray(dup["group"])).size) if len(dup) else 0
    for r, c in meta["rejected_by_reason"].items():
        acc["counts"][r] = acc["counts"].get(r, 0) + int(c)
    rej = f["rejected"]
    room = 50 - len(acc["examples"])
    if room > 0 and len(rej):
        acc["examples"].extend((chunk.path, int(chunk.start + r["row"]), str(r["reason"]), str(r["column"]),
                                str(r["value"])) for r in rej[:room])
    acc["notes"].extend((cid, cls, msg) for cls, msg in notes if not issubclass(cls, _NOTES_DROPPED))
    acc["assumptions"].extend(a for a in meta["assumptions"] if a not in acc["assumptions"])
    if acc["meta"] is None:
        acc["meta"] = {key_: meta[key_] for key_ in ("columns",) if key_ in meta}
        acc["kind"] = (f["excess_kind"], f["distance_kind"], f["law"], f["rv"])
    acc["sample"] = _merge_samples(acc["sample"], part, k)
    return acc


def _merge_samples(s1, s2, k):
    if s1 is None:
        return s2
    if s2 is None:
        return s1
    m = {f: np.concatenate([s1[f], s2[f]], axis=-1) for f in s1}
    if m["key"].size > k:
        sel = np.argpartition(m["key"], k - 1)[:k]
        m = {f: v[..., sel] for f, v in m.items()}
    return m


def _combine(accs, merge):
    """Merge chain accumulators (skipping empty chains) into the first with ``merge(out, other)``."""
    out = None
    for a in accs:
        if a is None:
            continue
        if out is None:
            out = a
        else:
            merge(out, a)
    return out


def _pass1_merge(k, out, a):
    out["valid"].update(a["valid"])
    out["keys"].update(a["keys"])
    for name in ("rows", "merged", "dup_rows", "dup_groups"):
        out[name] += a[name]
    for r, c in a["counts"].items():
        out["counts"][r] = out["counts"].get(r, 0) + c
    out["examples"] = (out["examples"] + a["examples"])[:50]
    out["notes"] = out["notes"] + a["notes"]
    out["assumptions"].extend(x for x in a["assumptions"] if x not in out["assumptions"])
    out["sample"] = _merge_samples(out["sample"], a["sample"], k)


def _pass1_combine(k, *accs):
    return _combine(accs, functools.partial(_pass1_merge, k))


# ----------------------------------------------------------------------------- pass 2: sums

def _pass2_link(acc, chunk, reading, offset, grid, layer, n_folds, seed, held, drop, cached=None, replace=None):
    """Add one chunk's tracers to the statistics (all tracers, held-out folds) and the counts.

    The chunk is read and checked exactly as in pass 1; ``replace`` (positions among its tracers
    and their values) are tracers merged with tracers of other chunks, ``drop`` (positions) the
    tracers merged into tracers of other chunks. ``held`` is None for K-fold cross-validation
    (every row in a fold from its position), else the sorted positions of the held-out rows
    among the accepted rows of the catalogue.
    """
    if cached is not None and chunk.row0 in cached.arrays:
        l, b, d, de, av, ae = fit_arrays(cached.arrays.pop(chunk.row0))  # pass 1's arrays of this chunk
    else:
        f, _, _ = chunk_tracers(chunk, reading)
        l, b, d, de, av, ae = fit_arrays(f)
        del f
    if replace is not None:
        for arr, values in zip((l, b, d, de, av, ae), replace[1]):
            arr[replace[0]] = values
    if drop is not None and drop.size:
        keep = np.ones(l.size, dtype=bool)
        keep[drop] = False
        l, b, d, de, av, ae = (x[keep] for x in (l, b, d, de, av, ae))
    if acc is None:
        shape = (grid.npix, grid.n_edges)
        acc = (np.zeros((5,) + shape), np.zeros((5, n_folds if held is None else 1) + shape),
               np.zeros(grid.npix * grid.n_bins, dtype=np.int64), np.zeros(1, dtype=np.int64))
    if l.size == 0:
        return acc
    if held is None:
        fold, local = fold_of_positions(l, b, d, n_folds, seed), None
    else:
        fold = None
        local = held[np.searchsorted(held, offset):np.searchsorted(held, offset + l.size)] - offset
    stats = nominal_statistics(grid, layer, l, b, d, av, ae, fold=fold, n_folds=n_folds, held=local, threads=1)
    _pass2_merge(acc, (stats.total, stats.fold_stats, stats.counts, np.array([stats.n_beyond], dtype=np.int64)))
    return acc


def _pass2_merge(out, a):
    for mine, part in zip(out, a):
        mine += part


def _pass2_combine(*accs):
    return _combine(accs, _pass2_merge)


# ----------------------------------------------------------------------------- scheduling

def _run_chains(link, combine, chunks, args_of, n_chains, client, desc, quiet, tag):
    """Run ``link(acc, *args_of(i, chunk))`` over chunks in ``n_chains`` chains, then ``combine``.

    One dask task per chunk; chunk ``i`` joins chain ``i % n_chains``, so at most
    ``n_chains`` accumulators exist at once; the chains' accumulators are then summed in a
    binary tree. Progress advances per chunk.
    """
    import dask

    token = dask.base.tokenize(tag, os.getpid(), id(chunks), np.random.SeedSequence().entropy)
    bar = progress(total=len(chunks), desc=desc, quiet=quiet)
    try:
        if client is not None:
            from distributed import as_completed

            last = [None] * n_chains
            futures = []
            for i, ch in enumerate(chunks):
                j = i % n_chains
                last[j] = client.submit(link, last[j], *args_of(i, ch), key=f"dustkit-{tag}-{i}-{token}", pure=False)
                futures.append(last[j])
            # hold each link only until it is done, so finished accumulators can be freed
            done = as_completed(futures)
            del futures
            for fut in done:
                if fut.status == "error":
                    fut.result()  # raises the task's exception here
                bar.update(1)
                del fut
            total = _tree(lambda i, a, b: client.submit(combine, a, b, key=f"dustkit-{tag}-sum-{i}-{token}", pure=False),
                          [f for f in last if f is not None])
            del last
            return total.result()

        from dask.callbacks import Callback

        class _Progress(Callback):
            def _posttask(self, key, result, dsk, state, worker_id):
                if isinstance(key, str) and key.startswith(f"dustkit-{tag}-") and not key.startswith(f"dustkit-{tag}-sum"):
                    bar.update(1)

        last = [None] * n_chains
        for i, ch in enumerate(chunks):
            j = i % n_chains
            last[j] = dask.delayed(link, pure=False)(last[j], *args_of(i, ch), dask_key_name=f"dustkit-{tag}-{i}-{token}")
        total = _tree(lambda i, a, b: dask.delayed(combine, pure=False)(a, b, dask_key_name=f"dustkit-{tag}-sum-{i}-{token}"),
                      [x for x in last if x is not None])
        with _Progress():
            return dask.compute(total, scheduler="threads", num_workers=n_chains)[0]
    finally:
        bar.close()


def _tree(pair, items):
    """Sum ``items`` pairwise, level by level (a binary tree), with ``pair(i, a, b)``.

    Each summing task holds two accumulators, however many chains there are.
    """
    count = 0
    while len(items) > 1:
        nxt = []
        for j in range(0, len(items) - 1, 2):
            nxt.append(pair(count, items[j], items[j + 1]))
            count += 1
        if len(items) % 2:
            nxt.append(items[-1])
        items = nxt
    return items[0]


def _n_chains(client, stats_bytes, n_chunks):
    if client is not None:
        threads = sum(client.nthreads().values()) if hasattr(client, "nthreads") else 1
        n = max(1, int(threads))
    else:
        import dask

        threads = dask.config.get("num_workers", None) or os.cpu_count() or 1
        n = max(1, min(int(threads), int(_LOCAL_STATS_BUDGET // max(stats_bytes, 1))))
    return max(1, min(n, n_chunks))


# ----------------------------------------------------------------------------- public API

# the model parameters a chunked build takes: the constructor's, less the Monte Carlo draws (a
# chunked build is bin-scatter), quiet and layer (arguments of their own here)
_MODEL_PARAMS = tuple(p for p in ExtinctionModel.param_names() if p not in ("n_draws", "quiet", "layer"))


def build_from_parquet(
    path_or_folder,
    *,
    columns=None,
    chunk_size=1_000_000,
    client=None,
    layer=None,
    layer_sample=50_000,
    heldout_sample=50_000,
    law="ccm89",
    rv=3.1,
    hdu=None,
    quiet=None,
    distance_unit=None,
    distance_modulus_kind=None,
    parallax_zero_point=0 * u.mas,
    parallax_err_floor=PARALLAX_ERR_FLOOR * u.mas,
    parallax_length_scale=PARALLAX_LENGTH_SCALE * u.kpc,
    default_distance_frac_err=DEFAULT_DISTANCE_FRAC_ERR,
    default_excess_err=DEFAULT_EXCESS_ERR,
    reject_limits=None,
    excess_color=None,
    duplicates="merge",
    duplicate_separation=DUPLICATE_SEPARATION_ARCSEC * u.arcsec,
    **model_params,
):
    """Build an extinction model from a catalogue larger than memory, chunk by chunk.

    Parameters
    ----------
    path_or_folder : str or path-like
        A Parquet file, a folder of Parquet files (read recursively, in sorted path order),
        or a FITS table (read through a memory map).
    columns : dict, optional
        Explicit role -> column mapping, as for :func:`dustkit.tracers.read_tracers` (whose
        column recognition, units, moduli, parallaxes and rejection rules every chunk goes
        through). Parquet columns carry no units (a bare distance is taken as pc unless its
        median says kpc, which stops the build); FITS columns with a ``TUNIT`` are converted.
    chunk_size : int
        Rows read and processed at a time (memory per parallel task grows with it).
    client : distributed.Client, optional
        Run the tasks on this dask cluster (files must be readable by its workers at the
        same path). Without one, dask's local threaded scheduler is used.
    layer : DustLayer or dict, optional
        Use this smooth layer instead of fitting one to the sample (e.g. to reproduce
        another build exactly; a dict as :meth:`dustkit.layer.DustLayer.from_dict` reads).
    layer_sample : int
        Rows of the deterministic random sample the layer is fitted to.
    heldout_sample : int
        Catalogues up to this many rows are cross-validated K-fold over all rows; larger
        ones hold out ``min(heldout_sample, n / n_folds)`` rows of the sample.
    law, rv
        Extinction law and R_V the catalogue's A_V refers to (kept with the model; they
        set the conversion to other bands and the A_V rejection limits).
    hdu : int, optional
        FITS HDU of the table (default: the first binary table).
    quiet : bool, optional
        Hide progress bars (default: shown on a terminal only).
    distance_unit, distance_modulus_kind, parallax_zero_point, parallax_err_floor, parallax_length_scale, \
default_distance_frac_err, default_excess_err, reject_limits, excess_color, duplicates, duplicate_separation
        As for :func:`dustkit.tracers.read_tracers`. Duplicates are merged within a chunk by
        the reader's rules; across chunks, exact copies (a 64-bit hash of their values) are
        counted once and tracers of the same name (within 30 arcmin) merged as in memory.
    **model_params
        :class:`~dustkit.model.ExtinctionModel` parameters: ``nside``, ``distance_max``,
        ``distance_step``, ``distance_edges``, ``ordering``, ``n_folds``, ``sky_passes``,
        ``random_state``. ``uncertainty`` may only be ``'bin-scatter'`` (or ``'auto'``).
        ``random_state`` is checked as in memory, before any row is read: an integer >= 0,
        default 0 (the folds, the samples, the layer fit and the finishing draws all follow
        from it, so the same seed gives the same model); None is refused.

    Returns
    -------
    ExtinctionModel
        Fitted, with ``uncertainty_scheme_ == 'bin-scatter'``. ``tracers_`` holds the
        sample (not the whole catalogue); ``build_info_`` records the source, rows read,
        used and rejected (by reason, with examples), the chunking, the samples and the
        held-out rows (``heldout_rows``: positions among the accepted rows) and the
        wall time of each step (``seconds``).

    Notes
    -----
    See the module docstring for the two passes and how the result relates to the
    in-memory build. Rows are numbered in file order across the sorted files; rejected
    rows are reported with a :class:`~dustkit.exceptions.RowsRejectedWarning`.
    """
    _check_model_params(model_params)
    chunk_size = check_int("chunk_size", chunk_size, 1, 2**40)
    layer_sample = check_int("layer_sample", layer_sample, 10, 2**40)
    heldout_sample = check_int("heldout_sample", heldout_sample, 10, 2**40)
    layer = given_layer(layer)
    law, rv = check_law(law, float(rv))
    reading = _reading(columns, law, rv, duplicates, distance_unit=distance_unit,
                       parallax_zero_point=parallax_zero_point, default_distance_frac_err=default_distance_frac_err,
                       default_excess_err=default_excess_err, reject_limits=reject_limits, excess_color=excess_color,
                       distance_modulus_kind=distance_modulus_kind, parallax_err_floor=parallax_err_floor,
                       parallax_length_scale=parallax_length_scale, duplicate_separation=duplicate_separation)

    model = ExtinctionModel(uncertainty="bin-scatter", quiet=quiet, layer=layer, **model_params)
    grid = model.make_grid()
    seed = seed_of(model.random_state)
    n_folds = check_int("n_folds", model.n_folds, 2, 50)

    files = _find_files(path_or_folder)
    chunks, n_rows = _plan(files, chunk_size, hdu)
    if not chunks:
        raise CatalogError(f"{os.fspath(path_or_folder)!r} has no rows; nothing to build from.")
    stats_bytes = 5 * (1 + n_folds) * grid.npix * grid.n_edges * 8
    n_chains = _n_chains(client, stats_bytes, len(chunks))

    # pass 1: read and check (the reader's rules), count, sample
    lap = _Clock()
    k = max(layer_sample, heldout_sample)
    # local builds of up to CACHE_ROWS rows keep pass 1's arrays for pass 2 (48 bytes a row)
    cache = ChunkCache() if client is None and n_rows <= CACHE_ROWS else None
    p1 = _run_chains(
        _pass1_link, functools.partial(_pass1_combine, k), chunks,
        lambda i, ch: (i, ch, reading, k, seed, cache),
        n_chains, client, "reading and sampling (pass 1 of 2)", quiet, "sample",
    )
    lap("pass 1 (read, validate, sample)")
    p1["assumptions"] = _once_each(p1["assumptions"])
    cached = cache
    drops, replace, n_copies, offsets = _accepted(p1, chunks, reading, cache)
    n_used = int(offsets[-1])
    n_rejected = int(sum(p1["counts"].values()))
    n_merged = int(p1["merged"]) + n_copies
    if n_used < 10:
        raise CatalogError(
            f"A model needs at least 10 tracers; {os.fspath(path_or_folder)!r} has {n_used} usable rows of {n_rows}"
            + (f" (rejected: {_reason_text(p1['counts'])})" if n_rejected else "")
            + ". Hint: check the columns (columns={...}) and their units."
        )
    filled = _announce(p1, n_rejected, n_rows, n_merged, n_copies, duplicates)
    k_fold = n_used <= heldout_sample
    layer_rows, held_rows, gidx_sorted, data, file_row = _sample_rows(
        p1["sample"], offsets, layer_sample, n_used if k_fold else min(heldout_sample, n_used // n_folds))

    layer_set = _sample_set(layer_rows, gidx_sorted, data, file_row, law, rv)
    layer_given = layer is not None
    if layer is None:
        layer = fit_layer(layer_set, random_state=model.random_state)
    lap("layer fit")

    # pass 2: sufficient statistics, chunk by chunk
    sums = _run_chains(
        _pass2_link, _pass2_combine, chunks,
        lambda i, ch: (ch, reading, int(offsets[i]), grid, layer, n_folds, seed, None if k_fold else held_rows,
                       drops.get(i), cached, replace.get(i)),
        n_chains, client, "accumulating tracers (pass 2 of 2)", quiet, "stats",
    )
    lap("pass 2 (sufficient statistics)")

    # finish exactly as in memory, on the held-out rows
    _finish(model, sums, layer, data[:, np.searchsorted(gidx_sorted, held_rows)], k_fold, n_folds, seed, n_used,
            layer_set)
    lap("finish (cross-validation, calibration, isotonic)")
    if isinstance(getattr(layer_set, "meta", None), dict):  # the catalogue's read, as model files record it
        layer_set.meta.update(_catalogue_record(p1, reading, os.fspath(path_or_folder), n_rows, n_used, n_merged))
    model.build_info_ = {
        "source": os.fspath(path_or_folder), "files": [p for _, p in files], "n_rows": int(n_rows),
        "n_used": n_used, "n_rejected": int(n_rejected), "n_merged": n_merged, "cross_chunk_copies": n_copies,
        **_reading_info(p1, filled),
        "chunk_size": chunk_size, "n_chunks": len(chunks), "n_parallel": n_chains,
        "layer_sample": int(layer_rows.size), "heldout_sample": int(held_rows.size), "heldout_rows": held_rows,
        "layer_given": layer_given, "scheduler": "distributed" if client is not None else "threads",
        "seconds": lap.seconds,
    }
    return model


def _finish(model, sums, layer, held_data, k_fold, n_folds, seed, n_used, layer_set):
    """Finish exactly as in memory (the model's public seam), on the held-out rows ``held_data``."""
    held_fold = (fold_of_positions(held_data[0], held_data[1], held_data[2], n_folds, seed) if k_fold
                 else np.zeros(held_data.shape[1], dtype=np.int64))
    rng = np.random.default_rng(model.random_state)
    total, fold_stats, counts, n_beyond = sums
    model.fit_statistics(Statistics(total, fold_stats, counts, int(n_beyond[0])), layer, HeldOut(*held_data, held_fold),
                         model.fit_plan(n_used), rng=rng, tracers=layer_set)


def _accepted(p1, chunks, reading, cache):
    """Duplicates across chunks (exact copies and the same name, merged into their first member as in
    memory; the sample updated), and each chunk's first position among the accepted rows.

    Returns the drops and replacements per chunk (see ``merge_across``), the number of exact
    copies among the rows merged away, and the offsets. The chunks' own duplicate counts in
    ``p1`` are raised by the groups found across chunks."""
    n_chunks = len(chunks)
    drops, replace, n_copies = {}, {}, 0
    if reading["duplicates"] == "merge" and p1["keys"]:
        def raw_of(c):  # pass 1's arrays, or the chunk read again (no cache)
            if cache is not None and chunks[c].row0 in cache.arrays:
                return cache.arrays[chunks[c].row0]
            return raw_arrays(chunk_tracers(chunks[c], reading)[0])

        groups = cross_chunk_groups(p1["keys"], raw_of)
        drops, replace, counts = merge_across(groups, raw_of)
        p1["apart"] = _apart_report(groups["apart"], chunks, reading)
        p1["keys"] = {}
        n_copies = counts["copies"]
        p1["merged"] += counts["merged"] - n_copies  # the copies are counted on their own (n_copies)
        p1["dup_rows"] += counts["rows"]
        p1["dup_groups"] += counts["groups"]
        p1["scaled"] = (counts["scaled"], counts["largest_factor"])
        replace_in_sample(p1["sample"], replace)
    drop_from_sample(p1["sample"], drops)
    valid = np.array([p1["valid"][i] - (drops[i].size if i in drops else 0) for i in range(n_chunks)], dtype=np.int64)
    return drops, replace, n_copies, np.concatenate([[0], np.cumsum(valid)])


def _apart_report(apart, chunks, reading):
    """``(rows, warning text)`` of the named rows kept apart from rows of their name (see
    ``cross_chunk_groups``); the assumption is added to the read's (the in-memory read's words)."""
    n_rows, n_names, where = apart
    if not n_rows:
        return 0, None
    (c, entry, l1, b1), (_, _, l2, b2) = where
    example = (name_of_entry(chunks[c], reading, entry), l1, b1, l2, b2)
    return n_rows, same_name_apart_notes(n_rows, n_names, example)


def _reading_info(p1, filled):
    """What the reading of the chunks found, for ``build_info_``."""
    return {
        "rejected_by_reason": dict(p1["counts"]),
        "duplicate_rows": int(p1["dup_rows"]),
        "duplicate_groups": int(p1["dup_groups"]),
        "n_scaled_groups": int(p1.get("scaled", (0,))[0]),
        "same_name_apart": int(p1.get("apart", (0, None))[0]),
        "assumptions": list(p1["assumptions"]),
        "columns": dict((p1.get("meta") or {}).get("columns", {})),
        "default_errors": filled,
        "rejected_examples": _examples_table(p1["examples"]),
    }


def _catalogue_record(p1, reading, source, n_rows, n_used, n_merged):
    """The sample's ``meta`` (kept in model files): the whole catalogue's read, not the sample's.

    The sample is made from arrays already checked, so its own record would say that A_V was
    given, no row was rejected and duplicates were kept; a model file would then say so too.
    """
    sep = reading.get("duplicate_separation")
    sep = float(sep.to_value(u.arcsec)) if hasattr(sep, "to_value") else (
        float(DUPLICATE_SEPARATION_ARCSEC) if sep is None else float(sep))
    return {
        "source": source, "n_input": int(n_rows), "sample_of": int(n_used),
        "columns": dict((p1.get("meta") or {}).get("columns", {})),
        "assumptions": list(p1["assumptions"]),
        "rejected_by_reason": {str(r): int(c) for r, c in p1["counts"].items()},
        "n_merged": int(n_merged), "same_name_apart": int(p1.get("apart", (0, None))[0]),
        "n_scaled_groups": int(p1.get("scaled", (0,))[0]),
        "duplicates": reading["duplicates"], "duplicate_separation_arcsec": sep,
    }


def _without_numbers(text):
    """``text`` with each number replaced by '#': the chunks' messages that differ only in a number are one."""
    import re

    return re.sub(r"[-+]?\d[\d.e+-]*", "#", text)


def _once_each(texts):
    """Each assumption once: texts that differ only in their numbers (a chunk's median distance) are one,
    said with the first chunk's numbers, as the chunks' warnings are (``_announce``)."""
    seen, out = set(), []
    for text in texts:
        key = _without_numbers(text)
        if key not in seen:
            seen.add(key)
            out.append(text)
    return out


def _reading(columns, law, rv, duplicates, **options):
    """The keyword arguments of ``build_tracers`` for every chunk (checked)."""
    return dict(columns=columns, law=law, rv=rv, duplicates=check_duplicates(duplicates), **options)


class _Clock:
    """Wall time of each step: ``lap(name)`` records the time since the previous lap."""

    def __init__(self):
        self.seconds = {}
        self._last = time.perf_counter()

    def __call__(self, name):
        now = time.perf_counter()
        self.seconds[name] = now - self._last
        self._last = now


def _sample_set(rows, gidx_sorted, data, file_row, law, rv):
    """The sample's rows ``rows`` (positions among the accepted rows) as a TracerSet named by file row."""
    from .tracers import TracerSet

    pos = np.searchsorted(gidx_sorted, rows)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # rows were validated above; defaults already applied
        ts = TracerSet.from_arrays(*data[:, pos], name=np.char.add("row ", file_row[pos].astype(str)), law=law, rv=rv)
    if len(ts) != rows.size:
        raise RuntimeError("internal error: the sample changed on re-validation")  # pragma: no cover
    return ts


def _check_model_params(model_params):
    """Refuse parameters the model does not take, and a scheme other than bin-scatter (removed from the dict)."""
    unknown = sorted(set(model_params) - set(_MODEL_PARAMS))
    if unknown:
        raise param_error(unknown[0], f"one of the model parameters {', '.join(_MODEL_PARAMS)}", model_params[unknown[0]])
    scheme = model_params.pop("uncertainty", "bin-scatter")
    if scheme not in ("bin-scatter", "auto"):
        raise param_error(
            "uncertainty",
            "'bin-scatter' for out-of-core builds (per-tracer Monte Carlo draws are for in-memory "
            "catalogues: use ExtinctionModel.fit)",
            scheme,
        )


def _announce(p1, n_rejected, n_rows, n_merged, n_copies, duplicates):
    """Say once what the chunks' reads said (assumptions summed over chunks), the rejected rows and the
    duplicates; return the rows that took a default error, by column."""
    import re

    if n_rejected:
        warnings.warn(
            f"{n_rejected} of {n_rows} rows rejected: {_reason_text(p1['counts'])}. "
            "See model.build_info_['rejected_examples'] for examples.",
            RowsRejectedWarning,
            stacklevel=3,
        )
    n_apart, notes = p1.get("apart", (0, None))
    if n_apart:  # said for the whole catalogue (the chunks' reads do not)
        warnings.warn(notes[0], AssumptionWarning, stacklevel=3)
        p1["assumptions"].append(notes[1])
    if n_merged:
        warnings.warn(
            f"{p1['dup_rows']} rows are duplicates in {p1['dup_groups']} groups ({n_copies} of them exact copies "
            f"of rows of earlier chunks): {n_merged} rows merged away (duplicates='merge'; within a chunk by the "
            "reader's rules, across chunks the same name within the same-name limit or the same values, found by "
            f"64-bit hashes); {scaled_text(*p1.get('scaled', (0, 1.0)))}.",
            DuplicatesWarning,
            stacklevel=3,
        )
    # the chunks' notes: the same message once; messages starting with a count, summed
    # (other numbers, such as a chunk's median distance, are the first chunk's)
    summed, first, order = {}, {}, []
    for _, cls, msg in p1["notes"]:
        m = re.match(r"(\d+) (.*)", msg, re.S)
        rest = m.group(2) if m else msg
        key = (cls, bool(m), _without_numbers(rest))
        if key not in summed:
            summed[key], first[key] = 0, rest
            order.append(key)
        if m:
            summed[key] += int(m.group(1))
    filled = {}
    for key in order:
        cls, counted, rest = key[0], key[1], first[key]
        count = summed[key] if counted else None
        warnings.warn(rest if count is None else f"{count} {rest}", cls, stacklevel=3)
        m = re.match(r"rows have an empty or zero error in '(.+?)'", rest)
        if count is not None and m:
            filled[m.group(1)] = filled.get(m.group(1), 0) + count
    return filled


def _sample_rows(s, offsets, layer_sample, n_held):
    """The sample in catalogue order: the layer's rows, the held-out rows and the sample's arrays.

    Both row sets are positions among the accepted rows: the ``layer_sample`` and the
    ``n_held`` rows of the sample with the smallest hash keys, sorted. Every row is held out
    (K-fold) when the catalogue fits in the held-out sample; otherwise one held-out set of
    the first rows of the sample (at most a fold's worth).
    """
    gidx = offsets[s["chunk"]] + s["local"]
    by_key = np.argsort(s["key"], kind="stable")
    layer_rows = np.sort(gidx[by_key[:layer_sample]])
    held_rows = np.sort(gidx[by_key[:n_held]])
    order = np.argsort(gidx)
    return layer_rows, held_rows, gidx[order], s["data"][:, order], s["file_row"][order]


def build_from_fits(path, *, hdu=None, **kwargs):
    """Build a model from a large FITS table read through a memory map, chunk by chunk.

    The same as :func:`build_from_parquet` (all its keyword arguments apply) for one FITS
    file; ``hdu`` selects the table (default: the first binary table).
    """
    return build_from_parquet(path, hdu=hdu, **kwargs)


def _reason_text(counts):
    return "; ".join(f"{c} {r}" for r, c in sorted(counts.items(), key=lambda x: -x[1]))


def _examples_table(examples):
    from astropy.table import Table

    t = Table(names=("file", "row", "reason", "column", "value"), dtype=(str, np.int64, str, str, str))
    for e in examples:
        t.add_row(e)
    return t


#: Catalogues with more rows than this (from Parquet or FITS metadata) are built out of core by
#: default. It is above ``dustkit.model.MC_LIMIT``, so both paths pick the same uncertainty
#: scheme ('bin-scatter') for such a catalogue, and a smaller one is read into memory however
#: it is stored (one file or a folder of parts).
OUT_OF_CORE_ROWS = 2_000_000


def build_path(source, chunk_size=None, scheduler=None):
    """``'chunked'`` or ``'memory'``: how ``dustkit build`` reads ``source``.

    Chunked when asked for (``chunk_size`` or a dask ``scheduler``), or when the catalogue's
    metadata (Parquet footer, FITS header; :func:`dustkit.tracers.reader.catalogue_rows`)
    says it has more than ``OUT_OF_CORE_ROWS`` rows; in memory otherwise (also for formats
    without a row count, e.g. CSV).
    """
    if chunk_size is not None or scheduler:
        return "chunked"
    from .tracers.reader import catalogue_rows

    n = catalogue_rows(source)
    return "chunked" if n is not None and n > OUT_OF_CORE_ROWS else "memory"
