"""Accuracy of the model against the truth in an invented region (not a test; a report).

Builds the same invented region as tests/test_model.py (an exponential layer plus six
clouds, 3000 tracers with 8-15% distance errors and 0.02-0.05 mag E(B-V) errors), scores
the model at 5000 held-out positions against the true A_V for several random seeds, prints
RMS, median absolute error and 1-sigma coverage next to the smooth layer alone, and writes
two figures: model vs truth, and a sight line through a cloud with the true profile.

    python benchmarks/accuracy.py [--seeds 3] [--out accuracy_figures]
"""

import argparse
import os
import time

import numpy as np
from astropy import units as u

from dustkit import ExtinctionModel, read_tracers
from dustkit.simulate import Cloud, DustField, simulate_tracers

CLOUDS = (
    Cloud(30, 1, 600, 3.0, 30, 1.2), Cloud(45, -2, 1500, 2.0, 40, 0.8), Cloud(60, 3, 900, 5.0, 30, 0.6),
    Cloud(70, -1, 2500, 1.5, 50, 1.5), Cloud(38, 4, 2000, 4.0, 40, 1.0), Cloud(52, 0, 350, 1.0, 20, 0.7),
)
FIELD = DustField(a0=1.0, h=120.0, z_sun=20.0, clouds=CLOUDS)
REGION = dict(l_range=(20, 80), b_range=(-10, 10), distance_max=5000)


def run(seed, nside=32):
    rng = np.random.default_rng(seed)
    t = simulate_tracers(FIELD, 3000, rng=rng, **REGION)
    h = simulate_tracers(FIELD, 5000, rng=rng, **REGION)
    t0 = time.perf_counter()
    m = ExtinctionModel(nside=nside, quiet=True).fit(read_tracers(t))
    fit_s = time.perf_counter() - t0
    l, b, d = (np.asarray(h[k]) for k in ("l", "b", "true_distance"))
    truth = FIELD.av(l, b, d)
    a, e = (x.to_value(u.mag) for x in m.av(l * u.deg, b * u.deg, d * u.pc))
    lay = m.layer_av(l * u.deg, b * u.deg, d * u.pc).to_value(u.mag)
    return m, truth, a, e, lay, fit_s


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=3)
    ap.add_argument("--nside", type=int, default=32)
    ap.add_argument("--out", default=None, help="folder for the figures (none if omitted)")
    args = ap.parse_args()
    print(f"{'seed':>4} {'fit [s]':>8} {'RMS':>7} {'layer RMS':>10} {'ratio':>6} {'median|err|':>12} {'coverage':>9}")
    for seed in range(args.seeds):
        m, truth, a, e, lay, fit_s = run(seed, args.nside)
        rms, rms_l = np.sqrt(np.mean((a - truth) ** 2)), np.sqrt(np.mean((lay - truth) ** 2))
        print(f"{seed:>4} {fit_s:8.2f} {rms:7.3f} {rms_l:10.3f} {rms / rms_l:6.3f} "
              f"{np.median(np.abs(a - truth)):12.3f} {np.mean(np.abs(a - truth) <= e):9.3f}")
    if args.out:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt

        from dustkit.plotting import plot_profile, save_figure

        os.makedirs(args.out, exist_ok=True)
        fig, ax = plt.subplots(figsize=(5, 5), layout="constrained")
        ax.errorbar(truth[::10], a[::10], yerr=e[::10], fmt="o", ms=2, alpha=0.5, lw=0.5, label="model (1 in 10 shown)")
        ax.plot(truth[::10], lay[::10], ".", ms=2, color="0.5", label="smooth layer alone")
        top = float(np.max(truth)) * 1.05
        ax.plot([0, top], [0, top], "k--", lw=1)
        ax.set_xlabel("true $A_V$ [mag]")
        ax.set_ylabel("estimated $A_V$ [mag]")
        ax.legend(loc="upper left")
        save_figure(fig, os.path.join(args.out, "model_vs_truth.png"), overwrite=True)
        fig, ax = plt.subplots(figsize=(6, 4), layout="constrained")
        plot_profile(m, 30 * u.deg, 1 * u.deg, radius=0.5 * u.deg, ax=ax)
        dd = np.linspace(0, 5000, 300)
        ax.plot(dd / 1000 if ax.get_xlabel().endswith("[kpc]") else dd, FIELD.av(np.full_like(dd, 30), np.full_like(dd, 1), dd), "r:", lw=2, label="truth")
        ax.legend(loc="lower right")
        save_figure(fig, os.path.join(args.out, "sightline_cloud.png"), overwrite=True)
        print(f"figures in {args.out}/")


if __name__ == "__main__":
    main()
