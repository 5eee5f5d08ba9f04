"""Whole-process ``dustkit build`` from one Parquet file against a bare read-and-bin process.

For each size (default 10^6 and 10^7 tracers) a catalogue of simulated A_V tracers is written
to a temporary folder (``/tmp`` by default, never the repository); then, in the same run and
each in its own process, the wall time and peak memory (the child's ``ru_maxrss`` from
``os.wait4``) are measured of

* the floor: a process that reads the six columns with pyarrow and bins them into HEALPix
  pixels x distance bins with ``np.bincount`` (what any build must at least do), and
* ``dustkit build CATALOG -o MODEL.fits`` with default options (the path, in memory or out
  of core, is chosen by dustkit from the row count in the Parquet metadata).

Targets: at most 2x the floor's time and 2x its peak memory at both sizes. Both processes run
with compiled bytecode (as an installed package has), cached in the temporary folder by a warm-up
import before anything is timed. With ``--repeat N`` the floor and the build run alternately N
times and the medians are compared (on a shared machine single runs vary by a factor of two).

Run: ``PYTHONPATH=. python benchmarks/bench_reading.py [--sizes 1000000 10000000] [--repeat 3] [--tmp /tmp]``
"""

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time

import numpy as np

__all__ = ["write_catalogue", "measure", "main"]

_FLOOR = r"""
import sys, numpy as np, pyarrow.parquet as pq, healpy as hp
t = pq.read_table(sys.argv[1], columns=["l", "b", "distance", "distance_err", "av", "av_err"])
l, b, d, de, av, ae = (t.column(k).to_numpy() for k in ("l", "b", "distance", "distance_err", "av", "av_err"))
pix = hp.ang2pix(64, l, b, lonlat=True)
k = np.clip((d // 100).astype(np.int64), 0, 49)
idx = pix * 50 + k
w = 1.0 / (ae * ae)
s = np.bincount(idx, w * av, minlength=12 * 64 * 64 * 50)
sw = np.bincount(idx, w, minlength=s.size)
print(float(s.sum() / sw.sum()))
"""


def write_catalogue(path, n, seed=0):
    """A Parquet file of ``n`` simulated A_V tracers (deg, pc, mag) at ``path``."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    rng = np.random.default_rng(seed)
    d = rng.uniform(100.0, 5000.0, n)
    b = np.degrees(np.arcsin(rng.uniform(-0.3, 0.3, n)))
    av = 1.0e-3 * d * np.exp(-np.abs(d * np.sin(np.radians(b))) / 125.0) + rng.normal(0, 0.1, n)
    table = pa.table({"l": rng.uniform(0, 360, n), "b": b, "distance": d, "distance_err": 0.1 * d,
                      "av": av, "av_err": np.full(n, 0.1)})
    pq.write_table(table, path, row_group_size=1_000_000)


def measure(cmd, env=None, cwd=None):
    """Wall time (s) and peak resident memory (GiB) of one child process."""
    start = time.perf_counter()
    proc = subprocess.Popen(cmd, env=env, cwd=cwd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(proc.pid, 0)
    elapsed = time.perf_counter() - start
    err = proc.stderr.read().decode(errors="replace")
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} failed:\n{err}")
    return elapsed, usage.ru_maxrss / 2**20  # ru_maxrss is in KiB on Linux


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--sizes", type=int, nargs="+", default=[1_000_000, 10_000_000])
    p.add_argument("--tmp", default=tempfile.gettempdir(), help="folder for the catalogues (default /tmp)")
    p.add_argument("--repeat", type=int, default=1, help="runs of each process per size; medians compared (default 1)")
    args = p.parse_args(argv)
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    work = tempfile.mkdtemp(prefix="dustkit_bench_reading_", dir=args.tmp)
    # both processes run with compiled bytecode, as an installed package does (cached in the temporary
    # folder, not the repository, and made once by a warm-up import before anything is timed)
    env = dict(os.environ, PYTHONPATH=root, PYTHONPYCACHEPREFIX=os.path.join(work, "pycache"))
    env.pop("PYTHONDONTWRITEBYTECODE", None)
    subprocess.run([sys.executable, "-c", "import dustkit.cli, dustkit.scale, dustkit.io, pyarrow.parquet, healpy"],
                   env=env, check=True)
    rows = []
    try:
        for n in args.sizes:
            cat = os.path.join(work, f"tracers_{n}.parquet")
            write_catalogue(cat, n)
            runs = []
            for _ in range(max(args.repeat, 1)):  # alternately, so that both see the same load
                floor_t, floor_m = measure([sys.executable, "-c", _FLOOR, cat], env, cwd=root)
                # run in the repository: `python -m` puts the working folder first on the path
                build_t, build_m = measure([sys.executable, "-m", "dustkit", "--quiet", "build", cat, "-o",
                                            os.path.join(work, f"model_{n}.fits"), "--overwrite"], env, cwd=root)
                runs.append((floor_t, floor_m, build_t, build_m))
                if args.repeat > 1:
                    print(f"{n:>10,d} tracers, run {len(runs)}: floor {floor_t:6.1f} s {floor_m:5.2f} GiB | build "
                          f"{build_t:6.1f} s {build_m:5.2f} GiB | {build_t / floor_t:4.1f}x time", flush=True)
            floor_t, floor_m, build_t, build_m = (float(np.median(c)) for c in zip(*runs))
            rows.append((n, floor_t, floor_m, build_t, build_m))
            print(f"{n:>10,d} tracers: floor {floor_t:6.1f} s {floor_m:5.2f} GiB | dustkit build {build_t:6.1f} s "
                  f"{build_m:5.2f} GiB | ratio {build_t / floor_t:4.1f}x time, {build_m / floor_m:4.1f}x memory"
                  + (f" (medians of {len(runs)})" if len(runs) > 1 else ""), flush=True)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    return rows


if __name__ == "__main__":
    main()
