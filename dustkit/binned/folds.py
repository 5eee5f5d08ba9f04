"""Folds and held-out rows: which tracers validate the smoothing and calibrate the errors.

The bottom of :mod:`dustkit.binned`: plain numpy, nothing imported from the rest of the
model. The in-memory fit and the chunked builds of :mod:`dustkit.scale` both take their
folds from here, so the same tracers give the same model whichever way they are read.
"""

from dataclasses import dataclass

import numpy as np

from .._lib import healpix
from .._lib.validation import check_int, check_seed

__all__ = ["HELDOUT_MAX", "SPLIT_MIN", "HeldOut", "mix64", "row_hash", "seed_of", "fold_of_rows",
           "fold_of_positions", "heldout_rows", "calibration_half"]

#: Above this many tracers, one held-out set of at most this size instead of K folds.
HELDOUT_MAX = 50_000
#: From this many held-out tracers on, one half chooses the smoothing and the other calibrates the errors
#: (the calibration uses at most 5 000 of them: from here on the split costs it nothing).
SPLIT_MIN = 10_000


@dataclass(frozen=True)
class HeldOut:
    """The held-out tracers: plain arrays in deg, pc and mag, and the fold of each.

    Fold ``f`` is predicted from the statistics of all tracers minus those of fold ``f``.
    """

    l: np.ndarray
    b: np.ndarray
    distance: np.ndarray
    distance_err: np.ndarray
    av: np.ndarray
    av_err: np.ndarray
    fold: np.ndarray

    @classmethod
    def of_rows(cls, arrays, rows, fold):
        """The rows ``rows`` of the six tracer arrays (l, b, d, d_err, A_V, A_V_err), in ``fold``."""
        return cls(*(a[rows] for a in arrays), fold=np.asarray(fold, dtype=np.int64))

    def subset(self, keep):
        """The held-out tracers where ``keep`` (boolean or row numbers), with their folds."""
        return HeldOut(*(np.asarray(getattr(self, k))[keep] for k in
                         ("l", "b", "distance", "distance_err", "av", "av_err", "fold")))


_GOLDEN = np.uint64(0x9E3779B97F4A7C15)


def mix64(z):
    """SplitMix64 finaliser (a bijection of uint64; Steele, Lea & Flood 2014, OOPSLA)."""
    z = z ^ (z >> np.uint64(30))
    z = z * np.uint64(0xBF58476D1CE4E5B9)
    z = z ^ (z >> np.uint64(27))
    z = z * np.uint64(0x94D049BB133111EB)
    return z ^ (z >> np.uint64(31))


def row_hash(index, seed, stream):
    """64-bit hash of row numbers, seeded; ``stream`` separates independent uses."""
    idx = np.asarray(index, dtype=np.int64).astype(np.uint64)
    base = mix64(np.array([np.uint64(int(seed) & 0xFFFFFFFF) * np.uint64(4) + np.uint64(stream)]))[0]
    with np.errstate(over="ignore"):
        return mix64(base + (idx + np.uint64(1)) * _GOLDEN)


def fold_of_rows(index, n_folds, random_state=0):
    """Cross-validation fold of tracers from their row numbers (deterministic hash).

    Parameters
    ----------
    index : array_like of int
        Position of each tracer among the accepted rows of the catalogue (0, 1, 2, ...).
    n_folds : int
        Number of folds.
    random_state : int
        Seed (``ExtinctionModel.random_state``).

    Returns
    -------
    ndarray of int
        Fold of each row, uniform in ``0 .. n_folds - 1``. The same row gets the same fold
        whichever chunk, file or worker it is read by, which is what lets a chunked build
        equal the in-memory one.
    """
    n_folds = check_int("n_folds", n_folds, 1, 10_000)
    h = row_hash(index, seed_of(random_state), 0)
    return ((h >> np.uint64(32)) % np.uint64(n_folds)).astype(np.int64)


def seed_of(random_state):
    """``random_state`` checked as the in-memory build checks it (``check_seed``): an integer >= 0.

    None is refused, not read as 0: folds, samples and draws must come from the one seed the
    model records, so that the same seed gives the same model however it is built.
    """
    return check_seed(random_state)


def heldout_rows(n, n_folds, random_state=0):
    """Rows held out to choose the smoothing and calibrate the errors, or None for K-fold.

    Up to ``HELDOUT_MAX`` tracers every tracer is held out once (K-fold cross-validation,
    folds from :func:`fold_of_rows`). Larger catalogues hold out one random
    set of ``min(HELDOUT_MAX, n // n_folds)`` rows (sorted) and train on all the others:
    tens of thousands of held-out tracers pin down a handful of smoothing and error
    parameters, and the finishing cost no longer grows with the number of folds.
    """
    if n <= HELDOUT_MAX:
        return None
    m = min(HELDOUT_MAX, n // n_folds)
    return np.sort(np.random.default_rng([int(random_state) & 0xFFFFFFFF, 0x4E1D]).choice(n, m, replace=False))


def fold_of_positions(l_deg, b_deg, distance_pc, n_folds, random_state=0):
    """Spatially blocked cross-validation folds: one fold per block of space, from a hash.

    Blocks are HEALPix NSIDE 16 cells (3.7 deg) x shells 25% deep in distance; every tracer
    of a block gets the block's fold, so duplicated and neighbouring tracers (which share
    their dust) are never on both sides of a fold and cannot make held-out errors look
    smaller than they are. Deterministic in the positions alone, so any chunk, file or
    worker gives a tracer the same fold.
    """
    n_folds = check_int("n_folds", n_folds, 1, 10_000)
    pix = healpix.ang2pix(16, np.asarray(l_deg, float), np.asarray(b_deg, float)).astype(np.int64)
    shell = np.floor(np.log(np.maximum(np.asarray(distance_pc, float), 1.0)) / 0.25).astype(np.int64)
    key = pix * 4096 + np.clip(shell, 0, 4095)
    return (row_hash(key, random_state, 3) % np.uint64(n_folds)).astype(np.int64)


def calibration_half(heldout, random_state=0):
    """Which held-out tracers calibrate the errors (True) rather than choose the smoothing (False).

    From :data:`SPLIT_MIN` held-out tracers on, a hash of each tracer's position (its l, b
    and distance as float64 bits) puts it in one half or the other, so the errors are
    calibrated on tracers that did not also pick the smoothing (which would make the
    residuals look smaller than they are); both halves cover every fold. Smaller sets use
    every tracer for both: the calibration's likelihood is shallow, and halving a few
    thousand held-out tracers moved its optimum more than the choice of three smoothing
    numbers biases it (1-sigma coverage 0.47 with the split, 0.55 without, in a test
    region of 2 500 noisy tracers). The
    hash depends on the positions only, so in-memory and chunked builds split alike.
    """
    n = np.asarray(heldout.l).size
    if n < SPLIT_MIN:
        return np.ones(n, dtype=bool)
    key = np.zeros(n, dtype=np.uint64)
    with np.errstate(over="ignore"):
        for a in (heldout.l, heldout.b, heldout.distance):
            key = mix64(key ^ np.ascontiguousarray(np.asarray(a, dtype=np.float64)).view(np.uint64))
    return (row_hash(key.view(np.int64), random_state, 2) & np.uint64(1)).astype(bool)
