"""Speed and memory of the 3-D density model (a report, not a test).

Builds the density model from invented cluster catalogues of 3 000 and 10 000 tracers and
answers 10^6 positions, timing each against the hand-written baseline smoother on the same
catalogue in the same run (the ratio is what to compare between machines), and prints the
process's peak memory. Targets (issue of the 3-D model): 3 000 clusters in under 20 s,
10^4 in under 60 s, 10^6 answers in under 2 s, on a 2-core machine.

    python benchmarks/bench_density.py [--sizes 3000,10000] [--answers 1000000]
    python benchmarks/bench_density.py --field 100000    # also 10^5 field stars (target: < 10 min)
    python benchmarks/bench_density.py --galaxies smooth,near,clumpy   # also the accuracy galaxies' catalogues

``--galaxies`` also times the build of the catalogues of ``galaxies.py`` (2 500-3 000 clusters
each; the clumpy one asks the most of the solver: its prior is the widest and its search
the longest), which is what the 20-s target means for a realistic catalogue.

``--field N`` builds the model from the 'field' galaxy of ``galaxies.py`` grown to N stars
(10-25% distance errors, a 30 x 20 deg region) with progress shown, and prints the build time,
the process's peak memory after the build, and the RMS error and 1-sigma coverage at held-out
true positions (the baseline's RMS for scale, from 20 000 of the stars).
"""

import argparse
import os
import resource
import sys
import time
import warnings

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

import dustkit  # noqa: E402
from dustkit.density import DensityModel  # noqa: E402
from dustkit.simulate import DustField, random_clouds, simulate_tracers  # noqa: E402
from galaxies import baseline_predict, make_galaxy, read_catalogue, score  # noqa: E402


def _peak_gib():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="3000,10000")
    ap.add_argument("--answers", type=int, default=1_000_000)
    ap.add_argument("--field", type=int, default=0, help="also build from N field stars (e.g. 100000)")
    ap.add_argument("--galaxies", default="", help="also time the catalogues of these galaxies of galaxies.py")
    args = ap.parse_args()
    if args.field:
        _field(args.field)
    for kind in filter(None, args.galaxies.split(",")):
        _, t, _, tracers = _galaxy(kind)
        t0 = time.perf_counter()
        model = DensityModel(quiet=True).fit(tracers)
        print(f"build, galaxy '{kind}' ({len(tracers)} clusters): {time.perf_counter() - t0:.1f} s "
              f"(s = {model.amplitude_:.3f}, L = {model.length_:.0f} pc), peak {_peak_gib():.2f} GiB")
    rng = np.random.default_rng(0)
    field = DustField(a0=1.0, h=120.0, z_sun=20.0,
                      clouds=random_clouds(12, (0, 360), (-6, 6), (300, 3500), rng, av_range=(0.5, 2.0)))
    print(f"{'case':44} {'time [s]':>9} {'baseline [s]':>13} {'ratio':>7} {'peak [GiB]':>11}")
    model = None
    for n in (int(x) for x in args.sizes.split(",")):
        t = simulate_tracers(field, n, b_range=(-15, 15), distance_max=4000, rng=rng)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            tracers = dustkit.read_tracers(t)
        l, b, d = (np.asarray(t[k], float) for k in ("l", "b", "distance"))
        t0 = time.perf_counter()
        model = DensityModel(quiet=True).fit(tracers)
        build = time.perf_counter() - t0
        t0 = time.perf_counter()
        baseline_predict(model.layer_.av_pc, t, l[:2000], b[:2000], d[:2000])
        base = time.perf_counter() - t0
        print(f"{f'build, {n} clusters':44} {build:9.1f} {base:13.1f} {build / base:7.1f} {_peak_gib():11.2f}")
    m = args.answers
    ql, qb, qd = rng.uniform(0, 360, m), rng.uniform(-15, 15, m), rng.uniform(10, 5000, m)
    t0 = time.perf_counter()
    model.av_pc(ql, qb, qd)
    ans = time.perf_counter() - t0
    t0 = time.perf_counter()
    model.layer_.av_pc(qb, qd)
    floor = time.perf_counter() - t0
    print(f"{f'{m} answers (vs the layer alone)':44} {ans:9.2f} {floor:13.2f} {ans / floor:7.1f} {_peak_gib():11.2f}")


def _galaxy(kind, scale=None):
    """A galaxy of ``galaxies.py`` (seed 1): field, catalogue Table, held-out (l, b, d), and its tracers read."""
    fld, _, t, held_out = make_galaxy(kind, seed=1, scale=scale)
    return fld, t, held_out, read_catalogue(t)


def _field(n):
    fld, t, (l, b, d), tracers = _galaxy("field", scale=n / 20000)
    t0 = time.perf_counter()
    model = DensityModel().fit(tracers)  # progress shown
    build = time.perf_counter() - t0
    peak = _peak_gib()  # before the baseline, whose kernel matrices (positions x tracers) are large
    truth = fld.av(l, b, d)
    a, e = model.av_pc(l, b, d)
    s = score(truth, a, e)
    # the baseline's leave-one-out lists tracer pairs within 12 deg (10^8 and more at 10^5 stars): it
    # smooths a random 20 000 of the stars
    sub = t[np.sort(np.random.default_rng(0).choice(len(t), min(len(t), 20000), replace=False))]
    base = score(truth, baseline_predict(model.layer_.av_pc, sub, l, b, d))
    print(f"build, {len(tracers)} field stars: {build:.1f} s, peak {peak:.2f} GiB; RMS {s['rms']:.3f} mag "
          f"(baseline from 20 000 of them {base['rms']:.3f}), 1-sigma coverage {s['coverage']:.2f}")


if __name__ == "__main__":
    main()
