"""Honesty of the smooth layer's parameter errors in invented galaxies (a report, not a test).

For each invented cluster galaxy of ``galaxies.py`` and each draw, fits the layer as the 3-D
density model does (distances shifted to where the tracers most likely lie, errors from the
estimating equations summed over sky blocks, plus the clouds' pull; ``--bootstrap``: a block
bootstrap of 30 resamples instead, as before stop 36) and prints, per parameter, the fitted
value against the invented one in units of the quoted error, with and without the pull:

    python benchmarks/layer_errors.py [--galaxies smooth,near,clumpy,sparse,tiny] [--draws 8] [--bootstrap]

For honest Gaussian errors about 68% of |error / sigma| lie within 1 and 95% within 2
(common practice for checking error bars by Monte Carlo). In the clumpy galaxy the
invented a0 is the mean of a log-normal field, which one draw of it does not average to
(see README, "Limitations"): its figures there say how far that draw is, not only how good
the fit is. All galaxies are invented.
"""

import argparse
import os
import sys
import warnings

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

from dustkit.density.solver import sample_distance_shift  # noqa: E402
from dustkit.layer import BOOTSTRAP_RESAMPLES, fit_layer  # noqa: E402
from galaxies import make_galaxy, read_catalogue  # noqa: E402

PARAMS = ("a0", "h", "z_sun")


def layer_z(kind, seed, bootstrap=False):
    """(|error| / quoted error with the pull, the same without it, fitted layer) for one draw."""
    field, _, t, _ = make_galaxy(kind, seed=seed)
    tracers = read_catalogue(t)
    d, de = (np.asarray(getattr(tracers, k), float) for k in ("distance", "distance_err"))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        errors = {"n_boot": BOOTSTRAP_RESAMPLES} if bootstrap else {"block_errors": True}
        layer = fit_layer(tracers, random_state=0, **errors,
                          distance_shift=sample_distance_shift(d, de, np.ones(d.size)))
    err = np.array([getattr(layer, p) - getattr(field, p) for p in PARAMS])
    quoted = np.array([getattr(layer, p + "_err") for p in PARAMS])
    statistical = np.sqrt(np.diag(np.asarray(layer.covariance, float)))
    return np.abs(err) / quoted, np.abs(err) / statistical, layer, field


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--galaxies", default="smooth,near,clumpy,sparse,tiny")
    ap.add_argument("--draws", type=int, default=8, help="draws (seeds 1..N) of each galaxy")
    ap.add_argument("--bootstrap", action="store_true", help="block bootstrap errors instead of the block sandwich")
    args = ap.parse_args()
    print(f"{'galaxy':8} {'param':6} {'within 1 sigma':>15} {'within 2 sigma':>15} {'largest |z|':>12}"
          "   (with the pull / statistical alone)")
    for kind in args.galaxies.split(","):
        z, z_stat = [], []
        for seed in range(1, args.draws + 1):
            a, s, layer, field = layer_z(kind, seed, args.bootstrap)
            z.append(a)
            z_stat.append(s)
            print(f"  {kind} draw {seed}: a0 {layer.a0:.3f} +- {layer.a0_err:.3f} (invented {field.a0}), "
                  f"h {layer.h:.0f} +- {layer.h_err:.0f} ({field.h}), z_sun {layer.z_sun:.1f} +- "
                  f"{layer.z_sun_err:.1f} ({field.z_sun}); pull {np.round(layer.pull, 3).tolist()}", flush=True)
        z, z_stat = np.asarray(z), np.asarray(z_stat)
        for j, p in enumerate(PARAMS):
            print(f"{kind:8} {p:6} {np.mean(z[:, j] <= 1):7.2f} / {np.mean(z_stat[:, j] <= 1):4.2f} "
                  f"{np.mean(z[:, j] <= 2):7.2f} / {np.mean(z_stat[:, j] <= 2):4.2f} "
                  f"{z[:, j].max():5.1f} / {z_stat[:, j].max():4.1f}", flush=True)


if __name__ == "__main__":
    main()
