"""Out-of-core build of a catalogue larger than memory (issue 8), against the numpy floor.

1. Writes ``--n`` synthetic field-star tracers (default 10^8) as a folder of Parquet files
   OUTSIDE the repository (``--workdir``, default /tmp/dustkit_bench), unless already there.
   Columns l, b (deg), distance, distance_err (pc), av, av_err (mag), float32, 10^6-row row
   groups, 10^7 rows per file. Refuses to start if the disk has too little room.
2. Measures the bare numpy floor (healpy.ang2pix + np.searchsorted + np.bincount) on an
   in-memory subset of ``--floor-n`` rows (default 10^7), in its own process.
3. Builds the model with :func:`dustkit.scale.build_from_parquet` at NSIDE 64 x 50 distance
   bins in its own process, and reports wall time, peak resident memory of that process
   (target: under 4 GiB whatever the catalogue size) and throughput in tracers/s next to
   the floor's.

Usage::

    python benchmarks/bench_scale.py                 # 10^8 tracers (about 2.4 GB of Parquet)
    python benchmarks/bench_scale.py --n 10000000    # a smaller run
    python benchmarks/bench_scale.py --address tcp://scheduler:8786   # on a dask cluster

With ``--address`` the build runs on that cluster and the memory reported is the client's
only (each worker holds one statistics array and one chunk at a time).
"""

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from bench_model import LAYER, machine_info  # noqa: E402

NSIDE = 64
EDGES = np.arange(51) * 120.0  # 0 .. 6000 pc: 50 distance bins
ROWS_PER_FILE = 10_000_000
ROW_GROUP = 1_000_000
BYTES_PER_ROW = 6 * 4  # float32 columns (Parquet of random floats hardly compresses)


def _rss_gib():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20  # Linux: KiB


def _batch(n, seed):
    from dustkit.layer import layer_av_pc as _layer_av_pc

    rng = np.random.default_rng(seed)
    l = rng.uniform(0.0, 360.0, n)
    b = np.rad2deg(np.arcsin(rng.uniform(-0.5, 0.5, n)))
    d_true = 6000.0 * np.sqrt(rng.uniform(0.0007, 1.0, n))
    frac = rng.uniform(0.05, 0.2, n)
    d = d_true * np.exp(rng.normal(0.0, frac))
    av_err = rng.uniform(0.05, 0.2, n)
    av = _layer_av_pc(b, d_true, LAYER["a0"], LAYER["h"], LAYER["z_sun"]) + rng.normal(0.0, av_err)
    return {"l": l, "b": b, "distance": d, "distance_err": frac * d, "av": av, "av_err": av_err}


def generate(n, folder):
    """Write the catalogue (resumable per file; a marker file says it is complete)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    marker = folder / "complete.json"
    if marker.exists() and json.loads(marker.read_text()).get("n") == n:
        return False
    folder.mkdir(parents=True, exist_ok=True)
    for f in folder.glob("*.parquet"):
        f.unlink()
    t0 = time.perf_counter()
    for i, start in enumerate(range(0, n, ROWS_PER_FILE)):
        rows = min(ROWS_PER_FILE, n - start)
        tmp = folder / f".part-{i:04d}.parquet.tmp"
        writer = None
        for j, s in enumerate(range(0, rows, ROW_GROUP)):
            m = min(ROW_GROUP, rows - s)
            cols = _batch(m, (11, i, j))
            table = pa.table({k: pa.array(v.astype(np.float32)) for k, v in cols.items()})
            if writer is None:
                writer = pq.ParquetWriter(tmp, table.schema, compression="snappy")
            writer.write_table(table, row_group_size=ROW_GROUP)
        writer.close()
        os.replace(tmp, folder / f"part-{i:04d}.parquet")
        print(f"  wrote part {i} ({start + rows:,} of {n:,} rows, {time.perf_counter() - t0:.0f} s)", flush=True)
    marker.write_text(json.dumps({"n": n}))
    return True


def run_floor(folder, n_floor):
    """Child: read ``n_floor`` rows into memory and time the numpy floor on them."""
    import healpy as hp
    import pyarrow.parquet as pq

    parts, got = [], 0
    for f in sorted(folder.glob("*.parquet")):
        t = pq.read_table(f, columns=["l", "b", "distance", "av"])
        parts.append(t.slice(0, n_floor - got))
        got += parts[-1].num_rows
        if got >= n_floor:
            break
    l, b, d, av = (np.concatenate([np.asarray(p.column(c).to_numpy(), float) for p in parts])
                   for c in ("l", "b", "distance", "av"))
    size = hp.nside2npix(NSIDE) * (EDGES.size - 1)
    t0 = time.perf_counter()
    pix = hp.ang2pix(NSIDE, l, b, lonlat=True)
    k = np.clip(np.searchsorted(EDGES, d, side="right") - 1, 0, EDGES.size - 2)
    idx = pix * (EDGES.size - 1) + k
    s = np.bincount(idx, av, size)
    c = np.bincount(idx, minlength=size)
    dt = time.perf_counter() - t0
    assert c.sum() == l.size and np.isfinite(s).all()
    return {"n": int(l.size), "time": dt, "peak_rss_gib": _rss_gib()}


def run_build(folder, chunk_size, address):
    """Child: the out-of-core build; wall time and this process's peak RSS."""
    import astropy.units as u

    from dustkit.scale import build_from_parquet

    client = None
    if address:
        from distributed import Client

        client = Client(address)
    t0 = time.perf_counter()
    m = build_from_parquet(folder, chunk_size=chunk_size, client=client, nside=NSIDE,
                           distance_edges=EDGES * u.pc, quiet=None)
    dt = time.perf_counter() - t0
    info = {k: v for k, v in m.build_info_.items() if k not in ("rejected_examples", "heldout_rows", "files")}
    return {"time": dt, "peak_rss_gib": _rss_gib(), "info": info, "sky_passes": m.sky_passes_,
            "informed_pixels": int(m.informed_pixels().size)}


def spawn(*args):
    cmd = [sys.executable, os.path.abspath(__file__), *map(str, args)]
    out = subprocess.run(cmd, stdout=subprocess.PIPE, text=True)
    if out.returncode != 0:
        raise SystemExit(f"child {args[:2]} failed")
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--n", type=float, default=1e8, help="tracers to generate and build from (default 1e8)")
    p.add_argument("--workdir", default="/tmp/dustkit_bench", help="folder for the Parquet catalogue (outside the repo)")
    p.add_argument("--chunk-size", type=int, default=1_000_000, help="rows per chunk (default 10^6)")
    p.add_argument("--floor-n", type=float, default=1e7, help="rows of the in-memory floor subset (default 1e7)")
    p.add_argument("--address", default=None, help="dask scheduler address (default: local threads)")
    p.add_argument("--remove", action="store_true", help="delete the generated catalogue at the end")
    p.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    a = p.parse_args(argv)
    n = int(a.n)
    folder = Path(a.workdir).expanduser().resolve() / f"scale_{n}"
    if a.child:
        kind = a.child[0]
        if kind == "floor":
            print(json.dumps(run_floor(folder, int(float(a.child[1])))))
        else:
            print(json.dumps(run_build(folder, int(a.child[1]), a.child[2] if len(a.child) > 2 else None)))
        return

    repo = Path(__file__).resolve().parents[1]
    if repo in folder.parents:
        raise SystemExit(f"--workdir must be outside the repository ({repo}); got {folder}")
    print("dustkit out-of-core benchmark")
    print(machine_info())
    Path(a.workdir).mkdir(parents=True, exist_ok=True)
    need = n * BYTES_PER_ROW * 1.1
    free = shutil.disk_usage(a.workdir).free
    print(f"catalogue: {n:,} tracers in {folder} (about {need / 2**30:.1f} GiB; {free / 2**30:.0f} GiB free)")
    have = (folder / "complete.json").exists()
    if not have and free < 2 * need:
        raise SystemExit("Not enough free disk for the catalogue (want twice its size free). Use --n or --workdir.")
    if generate(n, folder):
        print("  catalogue written")
    size = sum(f.stat().st_size for f in folder.glob("*.parquet"))
    print(f"  {len(list(folder.glob('*.parquet')))} files, {size / 2**30:.2f} GiB on disk")
    print(f"grid: NSIDE {NSIDE} x {EDGES.size - 1} distance bins (0-6 kpc); chunks of {a.chunk_size:,} rows")

    fl = spawn("--n", n, "--workdir", a.workdir, "--child", "floor", min(int(a.floor_n), n))
    floor_rate = fl["n"] / fl["time"]
    print(f"\nnumpy floor on {fl['n']:,} in-memory tracers: {fl['time']:.2f} s = {floor_rate:.3g} tracers/s")
    args = ["--n", n, "--workdir", a.workdir, "--child", "build", a.chunk_size] + ([a.address] if a.address else [])
    b = spawn(*args)
    rate = n / b["time"]
    info = b["info"]
    print(f"out-of-core build of {n:,} tracers: {b['time']:.1f} s wall = {rate:.3g} tracers/s "
          f"({info['n_chunks']} chunks, {info['n_parallel']} in parallel, scheduler {info['scheduler']})")
    print(f"  peak resident memory of the build process: {b['peak_rss_gib']:.2f} GiB "
          f"(target < 4 GiB: {'met' if b['peak_rss_gib'] < 4 else 'NOT met'})")
    print(f"  throughput / numpy floor throughput: {rate / floor_rate:.3f} (the floor does no model: "
          f"no layer, no folds, no smoothing, no cross-validation)")
    print("  steps: " + ", ".join(f"{k} {v:.1f} s" for k, v in info["seconds"].items()))
    print(f"  rows used {info['n_used']:,}, rejected {info['n_rejected']:,}; sky passes chosen {b['sky_passes']}; "
          f"informed pixels {b['informed_pixels']}")
    if a.remove:
        shutil.rmtree(folder)
        print(f"removed {folder}")


if __name__ == "__main__":
    main()
