"""Invented member photometry of a cluster, drawn from the intrinsic sequence.

For demos and tests: the truth is known (E(B-V), mu0, which stars are members, which are
binaries), so a fit can be checked against it. Nothing here describes a real cluster.
"""

import numpy as np
from astropy.table import Table

from .._lib.validation import check_real, param_error
from .fit import reddening_curve
from .sequence import default_sequence

__all__ = ["simulate_members"]


def _combine(m1, m2):
    return -2.5 * np.log10(10 ** (-0.4 * m1) + np.where(np.isfinite(m2), 10 ** (-0.4 * np.where(np.isfinite(m2), m2, 99)), 0.0))


def simulate_members(n_members, ebv, distance_modulus, *, bands=("U", "B", "V"), law="ccm89", rv=3.1,
                     binary_fraction=0.3, field_fraction=0.3, magnitude_limit=19.0, absolute_range=(-3.0, 9.0),
                     intrinsic_scatter=0.02, error_floor=0.01, error_at_limit=0.05, n_evolved=0,
                     parallax_error=None, sequence=None, l=None, b=None, rng=None):
    """Draw an invented cluster's members (and field stars) from the intrinsic sequence.

    Parameters
    ----------
    n_members : int
        Cluster members drawn before the magnitude limit is applied.
    ebv, distance_modulus : float
        True E(B-V) and true distance modulus mu0 (mag).
    bands : sequence of str
        Bands to give (sequence band names: U, B, V, R, I, G, BP, RP, J, H, Ks).
    binary_fraction : float
        Fraction of members that are unresolved binaries; the companion lies further down
        the sequence by a uniform 0-5 mag in M_V (0 = equal masses) and the fluxes add.
    field_fraction : float
        Fraction of field stars in the output: sequence stars at other distances
        (mu0 - 3 ... mu0 + 3) and reddenings (0 ... 2 E(B-V) + 0.3).
    magnitude_limit : float
        Stars fainter than this in the first band of ``bands`` that is a V, G or J... (the
        reddest optical band given) are dropped.
    absolute_range : (float, float)
        Range of the members' absolute V magnitude (uniform).
    intrinsic_scatter : float
        Gaussian scatter of every band around the sequence (mag).
    error_floor, error_at_limit : float
        Photometric errors: ``hypot(error_floor, error_at_limit * 10**(0.4 (m - limit)))``.
    n_evolved : int
        Members made into evolved stars: brighter than the turn-off and redder (by
        0.3-1.0 mag in every colour, 0.5-2 mag brighter).
    parallax_error : float, optional
        If given, add ``parallax`` and ``parallax_error`` columns (mas) with this error
        per star (no zero-point offset).
    l, b : float, optional
        Centre (deg) for ``l``/``b`` columns (members within 0.1 deg).
    rng : int or Generator, optional

    Returns
    -------
    `~astropy.table.Table`
        Columns: each band and ``e_<band>`` (mag), ``true_member`` (bool), ``true_binary``
        (bool), ``true_evolved`` (bool), optional parallaxes and positions. ``meta`` holds
        the truth.
    """
    rng = np.random.default_rng(rng)
    seq = default_sequence() if sequence is None else sequence
    check_real("ebv", ebv, -0.1, 10.0)
    check_real("distance_modulus", distance_modulus, 0.0, 30.0)
    bands = tuple(bands)
    for bd in bands:
        if bd not in seq.bands:
            raise param_error("bands", f"bands of the sequence ({', '.join(seq.bands)})", bd)
    lo, hi = seq.parameter_range(bands)
    a_lo, a_hi = max(absolute_range[0], lo), min(absolute_range[1], hi)
    eg, tab = reddening_curve(bands, law, rv)

    def draw(n, e, mu):
        p = rng.uniform(a_lo, a_hi, n)
        mags = np.column_stack([seq.absolute(bd, p) for bd in bands])
        a = np.array([np.interp(e, eg, tab[:, j]) for j in range(len(bands))]).T
        return p, mags, a

    p, mags, a = draw(n_members, ebv, distance_modulus)
    is_bin = rng.random(n_members) < binary_fraction
    p2 = p + rng.uniform(0.0, 5.0, n_members)
    m2 = np.column_stack([seq.absolute(bd, p2) for bd in bands])
    m2 = np.where(np.isfinite(m2), m2, np.inf)
    mags = np.where(is_bin[:, None], _combine(mags, m2), mags)
    evolved = np.zeros(n_members, bool)
    if n_evolved:
        idx = np.argsort(p)[:n_evolved]
        evolved[idx] = True
        shift_c = rng.uniform(0.3, 1.0, n_evolved)
        shift_m = rng.uniform(0.5, 2.0, n_evolved)
        order = np.arange(len(bands))
        # redder: bluer bands fainter relative to redder ones, and the whole star brighter
        mags[idx] = mags[idx] - shift_m[:, None] + shift_c[:, None] * (len(bands) - 1 - order)[None, :] / max(len(bands) - 1, 1)
    app = mags + a + distance_modulus
    n_field = int(round(field_fraction / max(1 - field_fraction, 1e-9) * n_members))
    fe = rng.uniform(0.0, 2 * ebv + 0.3, n_field)
    fmu = rng.uniform(distance_modulus - 3.0, distance_modulus + 3.0, n_field)
    pf = rng.uniform(lo, hi, n_field)
    fm = np.column_stack([seq.absolute(bd, pf) for bd in bands])
    fa = np.column_stack([np.interp(fe, eg, tab[:, j]) for j in range(len(bands))])
    fapp = fm + fa + fmu[:, None]
    allm = np.vstack([app, fapp])
    allm = allm + rng.normal(0.0, intrinsic_scatter, allm.shape)
    member = np.concatenate([np.ones(n_members, bool), np.zeros(n_field, bool)])
    binary = np.concatenate([is_bin, np.zeros(n_field, bool)])
    evol = np.concatenate([evolved, np.zeros(n_field, bool)])
    true_mu = np.concatenate([np.full(n_members, distance_modulus), fmu])
    ref = next((bands.index(x) for x in ("V", "G", "J", "Ks", "RP", "B") if x in bands), len(bands) - 1)
    keep = np.isfinite(allm).all(axis=1) & (allm[:, ref] < magnitude_limit)
    err = np.hypot(error_floor, error_at_limit * 10 ** (0.4 * (allm - magnitude_limit)))
    obs = allm + rng.normal(0.0, 1.0, allm.shape) * err
    order = rng.permutation(np.flatnonzero(keep))
    t = Table()
    for j, bd in enumerate(bands):
        t[bd] = np.round(obs[order, j], 4)
        t[f"e_{bd}"] = np.round(err[order, j], 4)
    t["true_member"] = member[order]
    t["true_binary"] = binary[order]
    t["true_evolved"] = evol[order]
    if parallax_error is not None:
        plx = 1000.0 / 10 ** (true_mu[order] / 5 + 1)
        t["parallax"] = np.round(plx + rng.normal(0.0, parallax_error, order.size), 4)
        t["parallax_error"] = np.full(order.size, float(parallax_error))
    if l is not None and b is not None:
        t["l"] = np.round(l + rng.normal(0, 0.05, order.size), 5)
        t["b"] = np.round(b + rng.normal(0, 0.05, order.size), 5)
    t.meta.update({"ebv": float(ebv), "distance_modulus": float(distance_modulus), "law": str(law), "rv": float(rv),
                   "invented": "simulated members of an invented cluster (dustkit.clusters.simulate_members)"})
    return t
