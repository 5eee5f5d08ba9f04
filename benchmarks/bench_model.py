"""Speed and memory of model builds and answers, with baselines measured in the same run.

Cases (each runs in its own Python process so its peak resident memory is its own):

* ``clusters``  10^4 simulated clusters, full uncertainties (Monte Carlo scheme), NSIDE 32 x 40 bins.
* ``field``     10^6 and 10^7 synthetic field-star tracers (bin-scatter scheme), NSIDE 32 x 40 bins.
* ``floor``     the bare numpy floor on the same tracers: pixel index (healpy.ang2pix) + distance
                bin (np.searchsorted) + np.bincount of A_V (sum and count per pixel x bin).
* ``pandas``    what a user would write by hand: the same pixel and bin indices, then a pandas
                groupby over (pixel, bin) with mean, std and count of A_V.
* ``answers``   10^6 answers (model.av at random positions) from the 10^4-cluster model.

Targets (issue 4, on a 2-core machine): the 10^4-cluster build under 5 s; the 10^7-tracer
build within 3x of the numpy floor and faster than the pandas groupby; 10^6 answers under 1 s.

Usage::

    python benchmarks/bench_model.py            # full sizes (10^6 and 10^7 tracers)
    python benchmarks/bench_model.py --quick    # 10^5 and 10^6 tracers, a few minutes
    python benchmarks/bench_model.py --profile  # also cProfile the largest field build

Synthetic catalogues are cached in ``--workdir`` (default /tmp/dustkit_bench), outside the
repository. Times are wall-clock seconds of the step alone (catalogue generation, loading
and imports excluded); "step" is the peak resident memory the step added (the kernel's
high-water mark, reset just before the step) and "peak RSS" the whole process's peak
(ru_maxrss: data, imports, ingestion included).
"""

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

NSIDE = 32
EDGES = np.arange(41) * 150.0  # 0 .. 6000 pc: 40 distance bins
LAYER = dict(a0=1.0, h=120.0, z_sun=20.0)  # invented dust layer of the synthetic catalogues


# ----------------------------------------------------------------------------- synthetic data

def field_catalogue(n, workdir, seed=11):
    """Synthetic field-star tracers (cached as .npy): l, b, distance, distance_err, av, av_err."""
    path = Path(workdir) / f"field_{n}_{seed}.npy"
    if path.exists():
        return np.load(path, mmap_mode=None)
    from dustkit.layer import layer_av_pc as _layer_av_pc

    rng = np.random.default_rng(seed)
    out = np.empty((6, n))
    step = 2_000_000
    for s in range(0, n, step):
        m = min(step, n - s)
        l = rng.uniform(0.0, 360.0, m)
        b = np.rad2deg(np.arcsin(rng.uniform(-0.5, 0.5, m)))  # |b| < 30 deg, uniform on the sphere
        d_true = 6000.0 * np.sqrt(rng.uniform(0.0007, 1.0, m))  # 160 pc - 6 kpc, more stars far away
        frac = rng.uniform(0.05, 0.2, m)
        d = d_true * np.exp(rng.normal(0.0, frac))
        av_true = _layer_av_pc(b, d_true, LAYER["a0"], LAYER["h"], LAYER["z_sun"])
        av_err = rng.uniform(0.05, 0.2, m)
        av = av_true + rng.normal(0.0, av_err)
        out[:, s:s + m] = (l, b, d, frac * d, av, av_err)
    Path(workdir).mkdir(parents=True, exist_ok=True)
    np.save(path, out)
    return out


def cluster_catalogue(n, seed=5):
    """Simulated clusters in an invented region (dustkit.simulate), as a TracerSet."""
    from dustkit.simulate import DustField, random_clouds, simulate_tracers
    from dustkit.tracers import read_tracers

    rng = np.random.default_rng(seed)
    field = DustField(**LAYER, clouds=tuple(random_clouds(40, (0, 360), (-15, 15), (200, 5000), rng)))
    t = simulate_tracers(field, n, l_range=(0, 360), b_range=(-25, 25), distance_max=6000, rng=rng)
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return read_tracers(t)


def as_tracers(arr):
    import warnings

    from dustkit.tracers import TracerSet

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return TracerSet.from_arrays(*arr)


# ----------------------------------------------------------------------------- measured steps

def _rss_mb():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux: KiB


def _current_rss_mb():
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2**20


_PROCESS_PEAK = [0.0]  # MiB: the process's peak before any reset


def _peak_reset():
    """Reset the kernel's record of this process's peak resident memory (Linux >= 4.0)."""
    try:
        with open("/proc/self/clear_refs", "w") as f:
            f.write("5")
        return True
    except OSError:
        return False


def _peak_mb():
    """Peak resident memory since the last reset (VmHWM of /proc/self/status), MiB."""
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmHWM"):
                return int(line.split()[1]) / 1024.0
    return float("nan")


def _measure(fn):
    """Run ``fn``; return its result, wall time (s) and the peak memory it added (MiB).

    The peak is the kernel's high-water mark of resident memory while ``fn`` runs (reset
    just before it through /proc/self/clear_refs), minus the resident memory when it
    started; nothing runs beside ``fn``, so the timing is undisturbed. Where the reset is
    not allowed, memory is sampled every 5 ms in a thread instead.
    """
    import threading

    start = _current_rss_mb()
    _PROCESS_PEAK[0] = max(_PROCESS_PEAK[0], _peak_mb())  # the reset below forgets it
    if _peak_reset():
        t0 = time.perf_counter()
        out = fn()
        dt = time.perf_counter() - t0
        return out, dt, max(_peak_mb(), _current_rss_mb()) - start
    peak = [start]
    done = threading.Event()

    def sample():
        while not done.wait(0.005):
            peak[0] = max(peak[0], _current_rss_mb())

    th = threading.Thread(target=sample, daemon=True)
    th.start()
    t0 = time.perf_counter()
    try:
        out = fn()
    finally:
        dt = time.perf_counter() - t0
        done.set()
        th.join()
    peak[0] = max(peak[0], _current_rss_mb())
    return out, dt, peak[0] - start


def floor(l, b, d, av):
    """Pixel + bin index + np.bincount: sum and count of A_V per pixel x bin."""
    import healpy as hp

    pix = hp.ang2pix(NSIDE, l, b, lonlat=True)
    k = np.clip(np.searchsorted(EDGES, d, side="right") - 1, 0, EDGES.size - 2)
    idx = pix * (EDGES.size - 1) + k
    size = hp.nside2npix(NSIDE) * (EDGES.size - 1)
    return np.bincount(idx, av, size), np.bincount(idx, minlength=size)


def by_hand(l, b, d, av):
    """The pandas groupby a user would write: mean, std and count of A_V per pixel and bin."""
    import healpy as hp
    import pandas as pd

    pix = hp.ang2pix(NSIDE, l, b, lonlat=True)
    k = np.digitize(d, EDGES) - 1
    df = pd.DataFrame({"pixel": pix, "bin": k, "av": av})
    return df.groupby(["pixel", "bin"])["av"].agg(["mean", "std", "count"])


def run_case(case, n, workdir, profile=False):
    """One measurement in this process; returns a dict."""
    import astropy.units as u
    import healpy  # noqa: F401  (imports are not part of any measured step)
    import pandas  # noqa: F401

    from dustkit.model import ExtinctionModel

    res = {"case": case, "n": n}
    grid = dict(nside=NSIDE, distance_max=6000 * u.pc, distance_step=150 * u.pc, quiet=True)
    if case == "clusters":
        tracers = cluster_catalogue(n)
        res["rss_before_mb"] = _rss_mb()
        m, dt, step = _measure(lambda: ExtinctionModel(uncertainty="monte-carlo", **grid).fit(tracers))
        res.update(time=dt, step_mb=step, scheme=m.uncertainty_scheme_, n_draws=m.n_draws_)
        import pickle

        from dustkit.model import model_state

        with open(Path(workdir) / "clusters_model.pkl", "wb") as f:
            pickle.dump(model_state(m), f)
    elif case == "field":
        arr = field_catalogue(n, workdir)
        tracers, dt_in, _ = _measure(lambda: as_tracers(arr))
        del arr
        res["ingest_time"] = dt_in
        res["rss_before_mb"] = _rss_mb()
        model = ExtinctionModel(uncertainty="bin-scatter", **grid)
        if profile:
            import cProfile
            import io
            import pstats

            pr = cProfile.Profile()
            t0 = time.perf_counter()
            pr.enable()
            model.fit(tracers)
            pr.disable()
            res.update(time=time.perf_counter() - t0, step_mb=float("nan"))
            s = io.StringIO()
            pstats.Stats(pr, stream=s).sort_stats("cumulative").print_stats(30)
            res["profile"] = s.getvalue()
        else:
            m, dt, step = _measure(lambda: model.fit(tracers))
            res.update(time=dt, step_mb=step, scheme=m.uncertainty_scheme_)
    elif case in ("floor", "pandas"):
        arr = field_catalogue(n, workdir)
        l, b, d, av = arr[0].copy(), arr[1].copy(), arr[2].copy(), arr[4].copy()
        del arr
        res["rss_before_mb"] = _rss_mb()
        fn = floor if case == "floor" else by_hand
        _, dt, step = _measure(lambda: fn(l, b, d, av))
        res.update(time=dt, step_mb=step)
    elif case == "answers":
        import pickle

        from dustkit.model import model_from_state

        with open(Path(workdir) / "clusters_model.pkl", "rb") as f:
            m = model_from_state(pickle.load(f))
        rng = np.random.default_rng(3)
        lq = rng.uniform(0, 360, n) * u.deg
        bq = np.rad2deg(np.arcsin(rng.uniform(-0.4, 0.4, n))) * u.deg
        dq = rng.uniform(50, 6000, n) * u.pc
        res["rss_before_mb"] = _rss_mb()
        _, dt, step = _measure(lambda: m.av(lq, bq, dq))
        res.update(time=dt, step_mb=step)
    else:
        raise SystemExit(f"unknown case {case!r}")
    res["peak_rss_mb"] = max(_rss_mb(), _PROCESS_PEAK[0], _peak_mb())
    return res


# ----------------------------------------------------------------------------- driver

def machine_info():
    cpu = platform.processor() or "?"
    try:
        for line in open("/proc/cpuinfo"):
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    mem = "?"
    try:
        for line in open("/proc/meminfo"):
            if line.startswith("MemTotal"):
                mem = f"{int(line.split()[1]) / 2**20:.1f} GiB"
    except OSError:
        pass
    import healpy
    import numpy
    import pandas

    return (f"{time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())} | {platform.platform()} | {cpu} | "
            f"{os.cpu_count()} cores | {mem} RAM | Python {platform.python_version()}, numpy {numpy.__version__}, "
            f"healpy {healpy.__version__}, pandas {pandas.__version__}")


def spawn(case, n, workdir, profile=False):
    cmd = [sys.executable, os.path.abspath(__file__), "--case", case, "--n", str(n), "--workdir", str(workdir)]
    if profile:
        cmd.append("--profile")
    out = subprocess.run(cmd, capture_output=True, text=True)
    if out.returncode != 0:
        print(out.stderr[-3000:], file=sys.stderr)
        raise SystemExit(f"case {case} n={n} failed")
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--quick", action="store_true", help="10^5 and 10^6 field tracers instead of 10^6 and 10^7")
    p.add_argument("--profile", action="store_true", help="cProfile the largest field build and print the top entries")
    p.add_argument("--workdir", default="/tmp/dustkit_bench", help="where synthetic catalogues are cached")
    p.add_argument("--case", help=argparse.SUPPRESS)
    p.add_argument("--n", type=int, help=argparse.SUPPRESS)
    a = p.parse_args(argv)
    Path(a.workdir).mkdir(parents=True, exist_ok=True)
    if a.case:
        print(json.dumps(run_case(a.case, a.n, a.workdir, a.profile)))
        return

    sizes = (100_000, 1_000_000) if a.quick else (1_000_000, 10_000_000)
    print("dustkit model benchmark")
    print(machine_info())
    print(f"grid: NSIDE {NSIDE} x {EDGES.size - 1} distance bins (0-6 kpc)")
    for n in sizes:  # generate once, outside the measured processes
        spawn_gen = [sys.executable, "-c",
                     f"import sys; sys.path.insert(0, {os.path.dirname(os.path.abspath(__file__))!r}); "
                     f"import bench_model as b; b.field_catalogue({n}, {a.workdir!r})"]
        subprocess.run(spawn_gen, check=True)
    rows = []

    def show(r, label):
        extra = f"  ingest {r['ingest_time']:.2f} s" if "ingest_time" in r else ""
        print(f"{label:<44s} {r['time']:9.3f} s   step {r['step_mb']:8.0f} MiB   peak RSS {r['peak_rss_mb']:7.0f} MiB{extra}",
              flush=True)
        rows.append((label, r))

    print(f"\n{'case':<44s} {'time':>11s}   {'step memory':>13s}   {'process peak':>16s}")
    c = spawn("clusters", 10_000, a.workdir)
    show(c, f"build 10^4 clusters ({c['scheme']}, {c['n_draws']} draws)")
    q = spawn("answers", 1_000_000, a.workdir)
    show(q, "10^6 answers (model.av)")
    res = {}
    for n in sizes:
        e = int(round(np.log10(n)))
        res[n] = {k: spawn(k, n, a.workdir) for k in ("floor", "pandas", "field")}
        show(res[n]["floor"], f"numpy floor, 10^{e} tracers")
        show(res[n]["pandas"], f"pandas groupby, 10^{e} tracers")
        show(res[n]["field"], f"build 10^{e} field tracers (bin-scatter)")

    big = sizes[-1]
    e = int(round(np.log10(big)))
    r = res[big]
    print("\nratios and targets")
    print(f"  10^4-cluster build: {c['time']:.2f} s (target < 5 s): {'met' if c['time'] < 5 else 'NOT met'}")
    for n in sizes:
        ee = int(round(np.log10(n)))
        x = res[n]
        print(f"  10^{ee} build / numpy floor: {x['field']['time'] / x['floor']['time']:.1f}x"
              f"   build / pandas groupby: {x['field']['time'] / x['pandas']['time']:.2f}x"
              f"   (throughput {n / x['field']['time']:.3g} tracers/s vs floor {n / x['floor']['time']:.3g})")
    ratio = r["field"]["time"] / r["floor"]["time"]
    print(f"  10^{e} build within 3x of the floor: {'met' if ratio <= 3 else 'NOT met'} ({ratio:.1f}x);"
          f" faster than pandas: {'met' if r['field']['time'] < r['pandas']['time'] else 'NOT met'}"
          + ("  [quick sizes: the targets are for 10^7]" if a.quick else ""))
    print(f"  10^6 answers: {q['time']:.3f} s (target < 1 s): {'met' if q['time'] < 1 else 'NOT met'}")
    if a.profile:
        prof = spawn("field", big, a.workdir, profile=True)
        print(f"\ncProfile of the 10^{e} field build ({prof['time']:.1f} s under the profiler):")
        print(prof["profile"])


if __name__ == "__main__":
    main()
