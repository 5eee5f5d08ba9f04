"""Main-sequence fitting of one cluster: E(B-V) and the true distance modulus from its members.

The model of each star is a mixture:

* a cluster member on the intrinsic sequence (at an unknown point along it, marginalised
  over a fine grid), reddened by E(B-V) along the chosen law's reddening vector and moved
  by the true distance modulus mu0, with its photometric errors plus the intrinsic width of
  the sequence (at least ``sequence_scatter``; fitted, and marginalised in the errors);
* or an unresolved binary: the same, brighter by between 0 and 0.753 mag (equal masses)
  in every magnitude, most by little (:data:`BINARY_SHARE_WEIGHTS`: a flat distribution of
  mass ratios), marginalised analytically;
* or a field star: half from a broad Gaussian in every observable (and in parallax), half a
  sequence star at another reddening and distance (uniform over broad ranges).

Membership probabilities, when given, are the prior odds of the first two against the
third. All systems the table has (UBV, Gaia, 2MASS, ...) enter one likelihood. Member
parallaxes, when given, enter with a global zero point and a systematic floor (a shared
offset with a Gaussian prior). The maximum a posteriori point is found by a coarse grid
search and a local optimisation; the covariance is the inverse Hessian (Laplace
approximation) with the nuisance parameters (fractions, width, parallax offset) marginalised.
It holds for the chosen law and R_V: ``ClusterFit.rv_slope`` says how far the result moves
per unit of R_V, a fit that a plausible R_V error would move by more than its error is
flagged ``"rv_sensitive"``, and ``rv_err`` carries an R_V error into the covariance.

In a single colour-magnitude diagram (V vs B-V alone, G vs BP-RP alone, J vs J-Ks alone)
reddening and distance trade off along the reddening vector, and only the curvature of the
sequence separates them; that curvature is exactly what metallicity and age change. There
the reported covariance includes a systematic offset of the sequence's colour (default
0.05 mag), the fit is flagged ``"ebv_mu0_degenerate"`` and a warning names what would break
the degeneracy (U-B, a second colour with a long baseline, or parallaxes).

Notes
-----
Intrinsic sequence: Pecaut & Mamajek 2013, ApJS 208, 9 (E. Mamajek's updated table).
Main-sequence fitting and the colour-colour method: Johnson & Morgan 1953, ApJ 117, 313;
the equal-mass binary sequence lies 2.5 log10 2 = 0.753 mag above the single-star one.
"""

import math
import warnings
from dataclasses import dataclass, field

import numpy as np
from astropy import units as u
from scipy.optimize import minimize
from scipy.special import log_ndtr

from ..exceptions import CatalogError, DustkitWarning
from .._lib.validation import check_real, param_error
from ..bands import av_to_band, av_to_excess
from ..laws import get_law
from .members import read_photometry
from .sequence import MainSequence, default_sequence

__all__ = [
    "ClusterFit",
    "fit_cluster",
    "fit_colour_colour",
    "reddening_curve",
    "shifted_sequence",
    "colour_residuals",
    "DegeneracyWarning",
    "CAUTION",
    "BINARY_OFFSET",
    "PARALLAX_ZERO_POINT",
    "PARALLAX_FLOOR",
]

#: Equal-mass binaries lie 2.5 log10(2) = 0.753 mag above the single-star sequence.
BINARY_OFFSET = 2.5 * math.log10(2.0)
#: Gaia EDR3 parallax zero point (mas, added to the catalogue value's bias: the catalogue
#: parallaxes are too small by about 0.017 mas on average; from memory, Lindegren et al. 2021).
PARALLAX_ZERO_POINT = -0.017
#: Systematic floor of a cluster's mean parallax (mas); from memory, Gaia EDR3 validation
#: (angular covariance of parallax systematics of order 0.01 mas on cluster scales).
PARALLAX_FLOOR = 0.010
#: How much brighter an unresolved binary is than its primary, as shares of the largest
#: brightening (``binary_max``, 0.753 mag for equal masses): piecewise uniform, with the
#: weights of a flat distribution of mass ratios q (from memory: roughly flat for solar-type
#: binaries, Raghavan et al. 2010, ApJS 190, 1) and luminosity ~ mass^4 (common practice), for
#: which P(brightening < d) = (10^(0.4 d) - 1)^(1/4). Most companions add little light; a
#: uniform brightening (the earlier model) let bright-scattered single stars pass as binaries
#: and moved mu0 fainter by 2-3 times its error when the sequence was wider than assumed.
BINARY_SHARE_EDGES = np.array([0.0, 0.05, 0.15, 0.3, 0.5, BINARY_OFFSET]) / BINARY_OFFSET
BINARY_SHARE_WEIGHTS = np.diff((10 ** (0.4 * BINARY_SHARE_EDGES * BINARY_OFFSET) - 1.0) ** 0.25)
#: Field stars modelled as sequence stars at other reddenings and distances: the E(B-V) step of
#: that uniform grid, and the width (mag) that smooths it (about the step's colour change).
FIELD_SEQUENCE_STEP = 0.1
FIELD_SEQUENCE_WIDTH = 0.08
#: Systematic offset of the mean sequence's colour (mag) used when one diagram cannot
#: separate E(B-V) from mu0 (metallicity and age shift colours by a few hundredths).
SEQUENCE_COLOUR_SYSTEMATIC = 0.05
#: Spread of R_V between sight lines (from memory: about 0.2 in the Galactic plane, Schlafly et
#: al. 2016, ApJ 821, 78); a fit that moves by more than its error over this spread is flagged
#: ``"rv_sensitive"`` (the errors include R_V only when ``rv_err`` is given).
RV_SPREAD = 0.2
#: Floor added in quadrature to E(B-V)'s error (mag). The mixture models an unresolved binary
#: as brighter at the same colour, while real companions are redder; with the reddening
#: vector taken through the passbands at :data:`SEQUENCE_TEMPERATURE` the simulated clusters
#: of tests/test_clusters.py (30% binaries) are covered as expected without a floor, so it is
#: zero; raise it for member lists with many red companions.
EBV_FLOOR = 0.0

CAUTION = (
    "Main-sequence fits are estimates to check, not measurements: the mean dwarf sequence is for "
    "roughly solar metallicity; metallicity and age shift the main sequence (of order 0.1-0.3 mag in "
    "the distance modulus); young clusters may hold pre-main-sequence stars above it; differential "
    "reddening across a cluster widens its sequence. The errors hold for the chosen law and R_V: an R_V off "
    "by 1 moves mu0 by about E(B-V) mag (flag rv_sensitive; rv_err= carries an R_V error into them). "
    "Extinction estimates are statistical; check them against local data before using them for science or "
    "instrument time."
)


class DegeneracyWarning(DustkitWarning):
    """One diagram alone cannot separate E(B-V) from the distance modulus."""


@dataclass
class ClusterFit:
    """Result of a main-sequence fit of one cluster.

    Attributes
    ----------
    ebv, ebv_err : float
        Colour excess E(B-V) and its 1-sigma error (mag).
    distance_modulus, distance_modulus_err : float
        TRUE (extinction-corrected) distance modulus mu0 and its error (mag); NaN for a
        colour-colour fit.
    covariance : ndarray, shape (2, 2)
        Covariance of (E(B-V), mu0) in mag^2.
    correlation : float
        Correlation coefficient of E(B-V) and mu0.
    distance, distance_err : Quantity['length']
        10^(mu0/5 + 1) pc and its first-order error.
    n_members_used : int
        Stars that entered the fit with a posterior membership of at least 0.5.
    n_stars : int
        Rows of the members table.
    weights : ndarray
        Posterior membership probability of every input row (0 for rows not used).
    used : ndarray of bool
        Rows that entered the fit (finite photometry, not cut as evolved).
    evolved : ndarray of bool
        Rows left out as evolved stars above the turn-off.
    flags : tuple of str
        ``"ebv_mu0_degenerate"``, ``"colour_colour_only"``, ``"parallax_prior"``,
        ``"evolved_cut"``, ``"few_members"``, ``"at_bound"``, ``"covariance_unreliable"``,
        ``"rv_sensitive"`` (an R_V off by 0.2 would move E(B-V) or mu0 by more than its error,
        which does not include that unless ``rv_err`` was given).
    observables : tuple of str
        Magnitudes and colours used.
    field_fraction, binary_fraction : float
        Fitted fraction of field stars among the used rows (on top of given membership
        probabilities) and of binaries among members.
    evolved_limit : float or None
        Apparent magnitude (in ``reference_band``) brighter than which stars were cut.
    reference_band : str or None
    sequence_source, sequence_version : str
    law : str
    rv : float
    sequence_scatter : float
        Width of the sequence used (mag): the given floor, or the fitted width where the
        members scatter more.
    parallax : dict or None
        Zero point, floor and the fitted shared offset (mas), when parallaxes were used.
    notes : list of str
        Assumptions and decisions, in words.
    caution : str
    statistical_covariance : ndarray or None
        The covariance before the systematic terms (sequence colour, R_V).
    rv_slope : tuple of float or None
        First-order change of (E(B-V), mu0) per unit of R_V at the best fit (None for a law
        of one R_V); E(B-V) alone for a colour-colour fit.
    """

    ebv: float
    ebv_err: float
    distance_modulus: float
    distance_modulus_err: float
    covariance: np.ndarray
    correlation: float
    distance: u.Quantity
    distance_err: u.Quantity
    n_members_used: int
    n_stars: int
    weights: np.ndarray
    used: np.ndarray
    evolved: np.ndarray
    flags: tuple
    observables: tuple
    field_fraction: float
    binary_fraction: float
    evolved_limit: object
    reference_band: object
    sequence_source: str
    sequence_version: object
    law: str
    rv: float
    sequence_scatter: float
    parallax: object = None
    notes: list = field(default_factory=list)
    caution: str = CAUTION
    statistical_covariance: object = None
    rv_slope: object = None

    @property
    def mu0(self):
        """Alias of :attr:`distance_modulus` (the true modulus)."""
        return self.distance_modulus

    @property
    def degenerate(self):
        """True when one diagram alone could not separate E(B-V) from mu0."""
        return "ebv_mu0_degenerate" in self.flags

    def summary(self):
        """A few lines for people."""
        lines = [f"E(B-V) = {self.ebv:.3f} +- {self.ebv_err:.3f} mag"]
        if np.isfinite(self.distance_modulus):
            lines.append(
                f"mu0 = {self.distance_modulus:.3f} +- {self.distance_modulus_err:.3f} mag "
                f"(distance {self.distance.to_value(u.pc):.0f} +- {self.distance_err.to_value(u.pc):.0f} pc), "
                f"correlation {self.correlation:+.2f}")
        lines.append(f"{self.n_members_used} members used of {self.n_stars} rows; observables {', '.join(self.observables)}; "
                     f"law {self.law}, R_V = {self.rv:g}")
        if self.flags:
            lines.append("flags: " + ", ".join(self.flags))
        lines.append(f"sequence: {self.sequence_source}" + (f" (version {self.sequence_version})" if self.sequence_version else ""))
        lines.append("Caution: " + self.caution)
        return "\n".join(lines)


# =============================================================================
# Reddening
# =============================================================================
_RED_CACHE = {}


#: Blackbody temperature (K) at which the passband coefficients of the reddening vector are
#: taken: a late-B / early-A star, typical of the upper main sequence that carries U-B and the
#: colour-magnitude fit of young clusters (cooler members' coefficients differ by a few per cent).
SEQUENCE_TEMPERATURE = 10_000.0


def reddening_curve(bands, law="ccm89", rv=3.1):
    """Extinction in each band as a function of E(B-V), through :func:`dustkit.bands.av_to_band`.

    The coefficients are integrated over each band's passband for a star of
    :data:`SEQUENCE_TEMPERATURE`. E(B-V) is dustkit's nominal one, A_V / R_V (see
    :mod:`dustkit.bands.conversions`), so a fitted E(B-V) read back by
    :func:`dustkit.read_tracers` (A_V = R_V E(B-V)) gives the A_V the fit found. The B-V
    passband excess of a 10 000 K star is a few per cent smaller (at R_V = 3.1 under
    CCM89, A_V / (A_B - A_V) is 3.19 at A_V = 1 and 3.39 at A_V = 5): reporting that
    excess made every A_V downstream that much too small.

    Whatever the band coefficients do with the amount of extinction (passband-integrated
    coefficients grow or shrink with A_V), this curve follows, because it is tabulated from
    the bands module on a grid of A_V.

    Parameters
    ----------
    bands : sequence of str
    law : str or Law
    rv : float

    Returns
    -------
    ebv : ndarray, shape (n,)
        Nominal E(B-V) = A_V / R_V on the grid (mag).
    a_band : ndarray, shape (n, n_bands)
        A in each band at those E(B-V) (mag).
    """
    law_obj = get_law(law)
    key = (law_obj.name, float(rv), tuple(bands))
    if key not in _RED_CACHE:
        av = np.linspace(0.0, 40.0, 801)  # up to embedded clusters seen in the infrared
        need = list(dict.fromkeys(bands))
        # in kelvin, as a Quantity: the bands module announces a bare number as an assumption,
        # which a user of fit_cluster did not make
        a = {b: np.asarray(av_to_band(av, 0.0, b, law_obj, rv, temperature=SEQUENCE_TEMPERATURE * u.K)[0], dtype=float)
             for b in need}
        ebv = np.asarray(av_to_excess(av, 0.0, "B", "V", law_obj, rv)[0], dtype=float)
        table = np.column_stack([a[b] for b in bands]) if bands else np.zeros((av.size, 0))
        # a little room below zero (negative E(B-V) from noise), extrapolated linearly
        slope = (table[1] - table[0]) / (ebv[1] - ebv[0])
        lo = -0.3
        ebv = np.concatenate([[lo], ebv])
        table = np.vstack([table[0] + slope * (lo - ebv[1]), table])
        _RED_CACHE[key] = (ebv, table)
    return _RED_CACHE[key]


def _a_at(ebv_grid, table, ebv):
    return np.array([np.interp(ebv, ebv_grid, table[:, j]) for j in range(table.shape[1])])


def shifted_sequence(ebv, distance_modulus, blue, red, magnitude=None, *, law="ccm89", rv=3.1,
                     sequence=None, binary=False):
    """The intrinsic sequence reddened by E(B-V) and moved by mu0, in one diagram.

    Parameters
    ----------
    ebv, distance_modulus : float
        E(B-V) and the true distance modulus (mag); the modulus is ignored when
        ``magnitude`` is None.
    blue, red : str
        Bands of the x colour.
    magnitude : str or tuple of str, optional
        The y band (a colour-magnitude diagram) or a pair of bands (a colour-colour
        diagram, e.g. ``("U", "B")``).
    binary : bool
        The equal-mass binary sequence (0.753 mag brighter; colour-magnitude only).

    Returns
    -------
    x, y : ndarray
        Apparent colour and magnitude (or second colour) along the sequence.
    """
    seq = default_sequence() if sequence is None else sequence
    if magnitude is None:
        raise param_error("magnitude", "a band or a pair of bands", magnitude)
    ybands = (magnitude,) if isinstance(magnitude, str) else tuple(magnitude)
    bands = tuple(dict.fromkeys((blue, red) + ybands))
    p, m = seq.grid(bands, step=0.02)
    eg, tab = reddening_curve(bands, law, rv)
    a = _a_at(eg, tab, ebv)
    app = m + a[None, :]
    i = {b: k for k, b in enumerate(bands)}
    x = app[:, i[blue]] - app[:, i[red]]
    if len(ybands) == 1:
        y = app[:, i[ybands[0]]] + distance_modulus - (BINARY_OFFSET if binary else 0.0)
    else:
        y = app[:, i[ybands[0]]] - app[:, i[ybands[1]]]
    return x, y


def colour_residuals(members, ebv, distance_modulus, blue="B", red="V", magnitude="V", *, law="ccm89", rv=3.1,
                     sequence=None):
    """Each star's colour minus the shifted sequence's colour at the star's magnitude (mag).

    Parameters
    ----------
    members : table-like
    ebv, distance_modulus : float
    blue, red, magnitude : str
        The colour-magnitude diagram.
    law, rv, sequence
        As in :func:`fit_cluster`.

    Returns
    -------
    ndarray
        One value per row; NaN where the star lacks the photometry or lies outside the
        sequence's magnitude range. Positive = redder than the sequence.
    """
    from .members import read_photometry

    phot, _ = read_photometry(members)
    x, _ = phot.quantity((blue, red))
    y, _ = phot.quantity(magnitude)
    sx, sy = shifted_sequence(ebv, distance_modulus, blue, red, magnitude, law=law, rv=rv, sequence=sequence)
    order = np.argsort(sy)
    sy, sx = sy[order], sx[order]
    inside = np.isfinite(y) & (y >= sy[0]) & (y <= sy[-1])
    out = np.full(x.shape, np.nan)
    out[inside] = x[inside] - np.interp(y[inside], sy, sx)
    return out


# =============================================================================
# Likelihood
# =============================================================================
def _lse(x, axis):
    m = np.max(x, axis=axis, keepdims=True)
    m = np.where(np.isfinite(m), m, 0.0)
    return np.log(np.sum(np.exp(x - m), axis=axis)) + np.squeeze(m, axis=axis)


def _log_diff_ndtr(a, b):
    """log(Phi(a) - Phi(b)) for a > b, stable in both tails."""
    a, b = np.broadcast_arrays(a, b)
    out = np.empty(a.shape)
    upper = b > 0
    # upper tail: Phi(a) - Phi(b) = Phi(-b) - Phi(-a)
    x1 = np.where(upper, -b, a)
    x2 = np.where(upper, -a, b)
    l1 = log_ndtr(x1)
    l2 = log_ndtr(x2)
    diff = np.clip(l2 - l1, -np.inf, -1e-300)
    out = l1 + np.log(-np.expm1(diff))
    return out


class _Model:
    """Log posterior of the mixture for one cluster (vectorised over stars and sequence points)."""

    def __init__(self, values, errors, is_mag, coef, bands, seq, law, rv, scatter, binary_max,
                 prior, plx, plx_err, plx_zp, plx_floor, step=0.025, param_range=None):
        self.values = values
        self.mask = np.isfinite(values) & np.isfinite(errors)
        self.obs = np.where(self.mask, values, 0.0)
        self.err2 = np.where(self.mask, errors, 0.0) ** 2
        self.scatter = None
        self.set_scatter(scatter)
        self.is_mag = is_mag.astype(float)
        self.has_mag = bool(np.any(is_mag))
        self.coef = coef
        self.bands = bands
        p, m = seq.grid(bands, step=step)
        if param_range is not None:
            keep = (p >= param_range[0]) & (p <= param_range[1])
            if np.count_nonzero(keep) >= 8:
                p, m = p[keep], m[keep]
        self.grid_param = p
        self.pred0 = m @ coef.T  # (G, K)
        self.logw = np.full(p.size, -np.log(p.size))
        self.n_grid = p.size
        self.window = None
        if self.has_mag:
            self.kref = int(np.argmax(is_mag))
            ref_abs = self.pred0[:, self.kref]
            self.ref_order = np.argsort(ref_abs, kind="stable")
            self.ref_sorted = ref_abs[self.ref_order]
            self.ref_obs = np.where(self.mask[:, self.kref], values[:, self.kref],
                                    np.nanmedian(values[:, self.kref]))
            self.window = (0.8, 1.6)
            span = self.window[0] + self.window[1]
            # the widest window in grid points (reference magnitudes are not evenly spaced)
            counts = np.searchsorted(self.ref_sorted, self.ref_sorted + span) - np.arange(self.n_grid)
            self.width = int(min(max(counts.max(), 8), self.n_grid))
        self.red_ebv, self.red_tab = reddening_curve(bands, law, rv)
        self.binary_max = binary_max
        self.prior = prior  # prior membership probability per star (or None)
        self.plx = plx
        self.plx_err = plx_err
        self.plx_zp = plx_zp
        self.plx_floor = plx_floor
        # the broad field distribution: per observable, the spread of all stars
        mu = np.array([np.nanmean(values[:, k]) if np.any(self.mask[:, k]) else 0.0 for k in range(values.shape[1])])
        sd = np.array([np.nanstd(values[:, k]) if np.any(self.mask[:, k]) else 1.0 for k in range(values.shape[1])])
        sd = np.maximum(sd, 0.3)
        fvar = sd[None, :] ** 2 + errors**2
        self.log_field = -0.5 * np.sum(np.where(self.mask, (self.obs - mu) ** 2 / np.where(self.mask, fvar, 1.0)
                                                + np.log(2 * np.pi * np.where(self.mask, fvar, 1.0)), 0.0), axis=1)
        if plx is not None:
            self.plx_ok = np.isfinite(plx) & np.isfinite(plx_err) & (plx_err > 0)
            pm = np.nanmedian(plx[self.plx_ok]) if np.any(self.plx_ok) else 0.0
            psd = max(1.4826 * np.nanmedian(np.abs(plx[self.plx_ok] - pm)) * 3, 0.3) if np.any(self.plx_ok) else 1.0
            fv = psd**2 + np.where(self.plx_ok, plx_err, 1.0) ** 2
            self.log_field = self.log_field + np.where(
                self.plx_ok, -0.5 * ((np.where(self.plx_ok, plx, 0) - pm) ** 2 / fv + np.log(2 * np.pi * fv)), 0.0)

    def field_sequence(self, ebv_max, mu_grid):
        """Per star, the log density of sequence stars at other reddenings (0 to ``ebv_max``) and
        distances (``mu_grid``), uniformly: half of the field component (:meth:`add_field`).

        Field stars are mostly dwarfs themselves: they lie on copies of the sequence moved along
        the reddening vector and in magnitude, close to the cluster's, where a broad Gaussian alone
        puts far too few of them and the fit took them for members (E(B-V) off by 3-5 errors with
        20-30% of such stars in a deep member list).
        """
        keep = self.scatter
        self.set_scatter(max(keep, FIELD_SEQUENCE_WIDTH))
        mu_grid = np.asarray(mu_grid, dtype=float)
        grid = np.arange(0.0, max(ebv_max, 0.2) + 1e-9, FIELD_SEQUENCE_STEP)
        logs = [self.star_logs(e, mu_grid, 0.0, 0.0)[0] for e in grid]  # each (M, N)
        self.set_scatter(keep)
        return _lse(np.concatenate(logs, axis=0), axis=0) - math.log(grid.size * mu_grid.size)

    def add_field(self, seq_field):
        """The field component: half the broad distribution, half ``seq_field`` (per star)."""
        self.log_field = np.logaddexp(self.log_field, seq_field) - math.log(2.0)

    def set_scatter(self, scatter):
        """Width of the sequence (mag, added in quadrature to every observable's error)."""
        scatter = float(scatter)
        if scatter == self.scatter:
            return
        self.scatter = scatter
        var = np.where(self.mask, self.err2 + scatter**2, 1.0)
        self.ivar = np.where(self.mask, 1.0 / var, 0.0)
        self.lognorm = -0.5 * np.sum(np.where(self.mask, np.log(2 * np.pi * var), 0.0), axis=1)

    def _window(self, pred_ref_shift):
        """Per star, the indices of the sequence points that can match it (a window in the
        reference magnitude: 0.8 mag brighter to 1.6 mag fainter than the star, which covers
        binaries and several sigma of error); all points for colour-only fits."""
        if self.window is None:
            return None
        lo = self.ref_obs - self.window[0] - pred_ref_shift
        start = np.searchsorted(self.ref_sorted, lo)
        start = np.clip(start, 0, max(self.n_grid - self.width, 0))
        return self.ref_order[start[..., None] + np.arange(min(self.width, self.n_grid))]

    def star_logs(self, ebv, mu0, f_field, f_bin, dplx=0.0, scatter=None):
        """(log L cluster, log L field) per star; ``mu0`` may be an array (rows of the result);
        ``scatter`` sets the sequence's width first (see :meth:`set_scatter`)."""
        if scatter is not None:
            self.set_scatter(scatter)
        a = _a_at(self.red_ebv, self.red_tab, ebv)
        red = self.coef @ a
        mu0 = np.asarray(mu0, dtype=float)
        scalar = mu0.ndim == 0
        mu = np.atleast_1d(mu0)[:, None]  # (M, 1)
        if self.window is not None:
            idx = self._window(mu + red[self.kref])  # (M, N, W)
            base = self.pred0[idx] + red  # (M, N, W, K)
            logw = self.logw[idx]
        else:
            base = np.broadcast_to(self.pred0 + red, (1, 1) + self.pred0.shape)
            logw = self.logw[None, None, :]
        pred = base + (mu[:, :, None, None] * self.is_mag)
        r = self.obs[None, :, None, :] - pred
        r *= self.mask[None, :, None, :]
        rw = r * self.ivar[None, :, None, :]
        chi2 = np.einsum("mngk,mngk->mng", r, rw)
        log_single = _lse(-0.5 * chi2 + logw, axis=2)
        if self.has_mag and f_bin > 0:
            P = self.ivar @ self.is_mag  # (N,)
            Pc = np.where(P > 0, P, 1.0)[None, :, None]
            B = rw @ self.is_mag  # (M, N, G)
            dhat = -B / Pc
            sq = np.sqrt(Pc)
            edges = BINARY_SHARE_EDGES * self.binary_max
            pieces = [_log_diff_ndtr(sq * (hi - dhat), sq * (lo - dhat)) + math.log(w / (hi - lo))
                      for lo, hi, w in zip(edges[:-1], edges[1:], BINARY_SHARE_WEIGHTS)]
            lint = np.logaddexp.reduce(pieces, axis=0) + 0.5 * np.log(2 * np.pi / Pc)
            lb = -0.5 * (chi2 - B**2 / Pc) + lint
            lb = np.where(P[None, :, None] > 0, lb, -0.5 * chi2)
            log_bin = _lse(lb + logw, axis=2)
            log_c = np.logaddexp(np.log1p(-f_bin) + log_single, np.log(f_bin) + log_bin)
        else:
            log_c = log_single
        log_c = log_c + self.lognorm
        if self.plx is not None:
            plx_pred = 10.0 ** (-(mu + 5.0) / 5.0) * 1000.0 + dplx
            v = np.where(self.plx_ok, self.plx_err, 1.0) ** 2
            obs = np.where(self.plx_ok, self.plx, 0.0) - self.plx_zp
            log_c = log_c + np.where(self.plx_ok, -0.5 * ((obs - plx_pred) ** 2 / v + np.log(2 * np.pi * v)), 0.0)
        if scalar:
            log_c = log_c[0]
        return log_c, self.log_field

    def mixture(self, ebv, mu0, f_field, f_bin, dplx=0.0, scatter=None):
        log_c, log_f = self.star_logs(ebv, mu0, f_field, f_bin, dplx, scatter)
        pi = (1.0 - f_field) * (1.0 if self.prior is None else self.prior)
        pi = np.clip(pi, 1e-9, 1 - 1e-9)
        lc = np.log(pi) + log_c
        lf = np.log1p(-pi) + log_f
        tot = np.logaddexp(lc, lf)
        return tot, np.exp(lc - tot)

    def total(self, ebv, mu0, f_field, f_bin, dplx=0.0, scatter=None):
        return float(self.mixture(ebv, mu0, f_field, f_bin, dplx, scatter)[0].sum())


def _logit(f):
    return math.log(f / (1 - f))


def _expit(x):
    return 1.0 / (1.0 + math.exp(-x))


def _hessian(fun, x, steps):
    n = len(x)
    h = np.zeros((n, n))
    f0 = fun(x)
    for i in range(n):
        ei = np.zeros(n)
        ei[i] = steps[i]
        fp, fm = fun(x + ei), fun(x - ei)
        h[i, i] = (fp - 2 * f0 + fm) / steps[i] ** 2
        for j in range(i + 1, n):
            ej = np.zeros(n)
            ej[j] = steps[j]
            h[i, j] = h[j, i] = (fun(x + ei + ej) - fun(x + ei - ej) - fun(x - ei + ej) + fun(x - ei - ej)) / (
                4 * steps[i] * steps[j])
    return h


# =============================================================================
# Public fits
# =============================================================================
def _check_fraction(name, value):
    return check_real(name, value, 0.0, 1.0, low_inclusive=True, high_inclusive=False)


def fit_cluster(members, *, law="ccm89", rv=3.1, sequence=None, columns=None, probability=True,
                parallax=True, parallax_zero_point=PARALLAX_ZERO_POINT, parallax_floor=PARALLAX_FLOOR,
                evolved_cut="auto", sequence_scatter=0.03, binary_max=BINARY_OFFSET,
                sequence_colour_systematic=SEQUENCE_COLOUR_SYSTEMATIC, use=None, warn=True, rv_err=0.0):
    """Fit E(B-V) and the true distance modulus of one cluster from its members' photometry.

    Parameters
    ----------
    members : `~astropy.table.Table` or table-like
        One row per star: magnitudes and/or colours with errors in any of UBV(RI)c,
        Gaia G/BP/RP and 2MASS JHKs (see :func:`dustkit.clusters.members.read_photometry`
        for the spellings), optionally a membership probability and parallaxes (mas).
    law : str or Law
        Extinction law for the reddening vector (see :func:`dustkit.laws.list_laws`).
    rv : float
        R_V = A_V / E(B-V).
    sequence : MainSequence or Table, optional
        Intrinsic sequence; default Pecaut & Mamajek 2013 (:func:`default_sequence`).
    columns : dict, optional
        Explicit column names (band or colour -> column, ``"probability"``, ``"parallax"``,
        ``"parallax_err"``).
    probability, parallax : bool
        Use the membership probabilities / parallaxes when the table has them.
    parallax_zero_point : float
        Added to the catalogue parallaxes' bias: the corrected parallax is
        ``parallax - parallax_zero_point`` (mas). Default -0.017 mas (Gaia EDR3; from memory).
    parallax_floor : float
        Systematic floor of the cluster's mean parallax (mas), a shared offset with this
        Gaussian prior width. Default 0.010 mas (Gaia EDR3 validation; from memory).
    evolved_cut : 'auto', None or float
        ``'auto'``: leave out evolved stars above the turn-off found from a first fit;
        ``None``: keep all stars; a number: leave out stars brighter than this apparent
        magnitude in the reference band (the first of V, G, J, ... that the table has).
    sequence_scatter : float
        Smallest intrinsic width of the sequence added to every observable's error (mag); a
        wider one is fitted where the members scatter more (and marginalised in the errors).
    binary_max : float
        Largest brightening of an unresolved binary (mag); 0.753 for equal masses.
    sequence_colour_systematic : float
        Systematic offset of the sequence's colour (mag) added to the covariance when one
        diagram alone cannot separate E(B-V) from mu0.
    use : sequence of str, optional
        Only these observables (e.g. ``("V", "B-V")``; names as in ``ClusterFit.observables``
        of a fit with all of them, or magnitudes like ``"V"`` and ``"B"``).
    warn : bool
        Emit the :class:`DegeneracyWarning` (the flag is set either way).
    rv_err : float
        Uncertainty of R_V carried into the covariance (first order, through
        ``ClusterFit.rv_slope``). Default 0: the errors hold for the given R_V exactly, and a fit
        that a plausible R_V error would move by more than its error is flagged ``"rv_sensitive"``.

    Returns
    -------
    ClusterFit

    Raises
    ------
    CatalogError
        No usable photometry, fewer than 5 usable stars, or only one band.

    Notes
    -----
    Intrinsic sequence: Pecaut & Mamajek 2013, ApJS 208, 9. The reddening vector comes from
    the law through :func:`dustkit.bands.av_to_band`, tabulated against A_V, so any growth of
    E(U-B)/E(B-V) with the amount of reddening that the band coefficients carry is followed.
    Field stars, binaries and evolved stars are handled as described in the module
    docstring. Results are estimates to check; see :data:`CAUTION`.
    """
    return _fit(members, law=law, rv=rv, sequence=sequence, columns=columns, probability=probability,
                parallax=parallax, parallax_zero_point=parallax_zero_point, parallax_floor=parallax_floor,
                evolved_cut=evolved_cut, sequence_scatter=sequence_scatter, binary_max=binary_max,
                sequence_colour_systematic=sequence_colour_systematic, use=use, warn=warn, colours_only=False,
                rv_err=rv_err)


def fit_colour_colour(members, *, law="ccm89", rv=3.1, sequence=None, columns=None, probability=True,
                      sequence_scatter=0.03):
    """E(B-V) from the U-B against B-V diagram alone, independent of distance.

    The intrinsic sequence is slid along the law's reddening line (slope E(U-B)/E(B-V),
    with whatever growth with E(B-V) the band coefficients carry) until it fits the
    members' colours; field stars are a broad mixture component.

    Parameters
    ----------
    members : table-like
        Needs U-B and B-V (as colours, or U, B, V magnitudes). Colours formed from
        magnitudes share the B error; they are treated as independent (a slight
        overestimate of the information).
    law, rv, sequence, columns, probability, sequence_scatter
        As in :func:`fit_cluster`.

    Returns
    -------
    ClusterFit
        ``distance_modulus`` is NaN; flag ``"colour_colour_only"``.

    Notes
    -----
    The colour-colour method of Johnson & Morgan 1953 (ApJ 117, 313), with the mean
    sequence of Pecaut & Mamajek 2013 (ApJS 208, 9) in place of a hand-drawn one. The
    fit is sure only where the sequence bends (B and A stars, the Balmer jump); for F-K
    stars alone the solution can be ambiguous.
    """
    return _fit(members, law=law, rv=rv, sequence=sequence, columns=columns, probability=probability,
                parallax=False, parallax_zero_point=0.0, parallax_floor=PARALLAX_FLOOR, evolved_cut=None,
                sequence_scatter=sequence_scatter, binary_max=BINARY_OFFSET,
                sequence_colour_systematic=0.0, use=None, warn=False, colours_only=True, rv_err=0.0)


def _colour_colour_photometry(phot):
    """B-V and U-B observables from whatever the photometry holds."""
    names = []
    vals = []
    errs = []
    for blue, red in (("B", "V"), ("U", "B")):
        cname = f"{blue}-{red}"
        if cname in phot.names:
            k = phot.names.index(cname)
            vals.append(phot.values[:, k])
            errs.append(phot.errors[:, k])
        elif blue in phot.names and red in phot.names:
            kb, kr = phot.names.index(blue), phot.names.index(red)
            vals.append(phot.values[:, kb] - phot.values[:, kr])
            errs.append(np.hypot(phot.errors[:, kb], phot.errors[:, kr]))
        elif cname == "U-B" and "U-V" in phot.names and "B-V" in phot.names:
            vals.append(phot.values[:, phot.names.index("U-V")] - phot.values[:, phot.names.index("B-V")])
            errs.append(np.hypot(phot.errors[:, phot.names.index("U-V")], phot.errors[:, phot.names.index("B-V")]))
        else:
            raise CatalogError(
                f"A colour-colour fit needs {cname} (as a colour column or as {blue} and {red} magnitudes). "
                f"Found: {', '.join(phot.names)}.")
        names.append(cname)
    coef = np.array([[0.0, 1.0, -1.0], [1.0, -1.0, 0.0]])  # bands U, B, V
    return names, np.column_stack(vals), np.column_stack(errs), coef, ("U", "B", "V")


def _breaks_degeneracy(bands, names, has_plx):
    if has_plx:
        return True
    if "U" in bands and "B" in bands:
        return True
    optical = {"U", "B", "V", "R", "I", "G", "BP", "RP"} & set(bands)
    infrared = {"J", "H", "Ks"} & set(bands)
    return bool(optical) and bool(infrared)


def _fit(members, *, law, rv, sequence, columns, probability, parallax, parallax_zero_point, parallax_floor,
         evolved_cut, sequence_scatter, binary_max, sequence_colour_systematic, use, warn, colours_only, rv_err):
    law_obj = get_law(law)
    rv = check_real("rv", rv, 0.0, 20.0, low_inclusive=False)
    sequence_scatter = check_real("sequence_scatter", sequence_scatter, 0.0, 1.0)
    binary_max = check_real("binary_max", binary_max, 0.0, 3.0, low_inclusive=False)
    parallax_floor = check_real("parallax_floor", parallax_floor, 0.0, 10.0)
    parallax_zero_point = check_real("parallax_zero_point", parallax_zero_point, -1.0, 1.0)
    sequence_colour_systematic = check_real("sequence_colour_systematic", sequence_colour_systematic, 0.0, 1.0)
    rv_err = check_real("rv_err", rv_err, 0.0, 3.0)
    if not (evolved_cut is None or evolved_cut == "auto"):
        evolved_cut = check_real("evolved_cut", evolved_cut, -10.0, 40.0)
    if sequence is None:
        seq = default_sequence()
    elif isinstance(sequence, MainSequence):
        seq = sequence
    else:
        seq = MainSequence(sequence)
    phot, notes = read_photometry(members, columns=columns)
    n_rows = phot.values.shape[0]
    if colours_only:
        names, values, errors, coef, bands = _colour_colour_photometry(phot)
        is_mag = np.zeros(2, bool)
    else:
        empty = [n for k, n in enumerate(phot.names) if not np.any(np.isfinite(phot.values[:, k]))]
        if empty and len(empty) < len(phot.names):
            phot = phot.subset([n for n in phot.names if n not in empty])
            notes.append(f"no values in {', '.join(empty)}: not used")
        if use is not None:
            use = tuple(use)
            bad = [n for n in use if n not in phot.names]
            if bad:
                raise param_error("use", f"observables the table has ({', '.join(phot.names)})", bad[0])
            phot = phot.subset(use)
        names, values, errors, coef, bands = list(phot.names), phot.values, phot.errors, phot.coefficients, phot.bands
        is_mag = phot.is_magnitude
        if len(bands) < 2:
            raise CatalogError(
                f"A main-sequence fit needs at least two bands (a colour); the table has only {', '.join(bands)}. "
                "Hint: add a colour (e.g. B-V or BP-RP) or a second magnitude.")
        if not np.any(is_mag):
            raise CatalogError(
                f"A colour-magnitude fit needs at least one magnitude; the table has only colours ({', '.join(names)}). "
                "Hint: use fit_colour_colour for E(B-V) alone, or add a magnitude column (e.g. V).")
    missing = [b for b in bands if b not in seq.bands]
    if missing:
        raise CatalogError(f"The sequence ({seq.describe()}) has no {', '.join(missing)}; it has {', '.join(seq.bands)}.")
    finite = np.isfinite(values)
    n_obs = finite.sum(axis=1)
    # a star needs a colour: at least two observables, or one colour observable
    has_colour = (n_obs >= 2) | np.any(finite & ~is_mag[None, :], axis=1)
    if not colours_only:
        has_colour &= np.any(finite & is_mag[None, :], axis=1)
    ok = has_colour
    n_dropped = int(n_rows - np.count_nonzero(ok))
    if n_dropped:
        notes.append(f"{n_dropped} row(s) without a usable magnitude and colour left out")
    if np.count_nonzero(ok) < 5:
        raise CatalogError(
            f"Only {int(np.count_nonzero(ok))} star(s) have usable photometry ({', '.join(names)}); a "
            "main-sequence fit needs at least 5. Hint: check the magnitude columns for empty values.")
    prior = None
    if probability and phot.probability is not None:
        prior = np.where(np.isfinite(phot.probability), phot.probability, 0.5)
        notes.append(f"membership probabilities from {phot.columns['probability']!r} used as prior odds")
        n_unknown = int(np.count_nonzero(ok & ~np.isfinite(phot.probability)))
        if n_unknown:
            notes.append(f"{n_unknown} of {int(np.count_nonzero(ok))} stars have no membership probability in "
                         f"{phot.columns['probability']!r}; 0.5 (even odds) assumed for them")
    plx = plx_err = None
    if parallax and phot.parallax is not None and not colours_only:
        if np.any(np.isfinite(phot.parallax) & np.isfinite(phot.parallax_err) & (phot.parallax_err > 0)):
            plx, plx_err = phot.parallax, phot.parallax_err
            notes.append(f"parallaxes from {phot.columns['parallax'][0]!r} used as a prior on mu0 "
                         f"(zero point {parallax_zero_point:+.3f} mas, systematic floor {parallax_floor:.3f} mas)")
    ref_k = None
    if np.any(is_mag):
        counts = np.where(is_mag, np.isfinite(values).sum(axis=0), -1)
        pref = [names.index(b) for b in ("V", "G", "J", "Ks", "B", "RP", "I", "R", "H", "BP", "U") if b in names]
        ref_k = max(pref, key=lambda k: (counts[k], -pref.index(k)))
        if ref_k != int(np.argmax(is_mag)):  # the model's reference is its first magnitude: put it first
            perm = [ref_k] + [k for k in range(len(names)) if k != ref_k]
            names = [names[k] for k in perm]
            values, errors, coef, is_mag = values[:, perm], errors[:, perm], coef[perm], is_mag[perm]
            ref_k = 0
    ref_band = names[ref_k] if ref_k is not None else None

    evolved = np.zeros(n_rows, bool)
    if isinstance(evolved_cut, float):
        evolved = np.isfinite(values[:, ref_k]) & (values[:, ref_k] < evolved_cut)
        notes.append(f"{int(evolved.sum())} star(s) brighter than {ref_band} = {evolved_cut:g} left out (user cut)")
    used = ok & ~evolved

    def run(used_mask, start=None):
        sel = np.flatnonzero(used_mask)
        args = dict(values=values[sel], errors=errors[sel], is_mag=is_mag, coef=coef, bands=bands, seq=seq,
                    law=law_obj, rv=rv, scatter=sequence_scatter, binary_max=binary_max,
                    prior=None if prior is None else prior[sel],
                    plx=None if plx is None else plx[sel], plx_err=None if plx_err is None else plx_err[sel],
                    plx_zp=parallax_zero_point, plx_floor=parallax_floor)
        return sel, _optimise(args, colours_only, plx is not None, start)

    sel, res = run(used)
    if evolved_cut == "auto" and not colours_only:
        cut = _auto_evolved(res, values[sel], ref_k)
        if cut is not None:
            evolved = ok & np.isfinite(values[:, ref_k]) & (values[:, ref_k] <= cut)
            notes.append(f"{int(evolved.sum())} star(s) at {ref_band} <= {cut:.2f} left out as evolved "
                         "stars above the turn-off (automatic; pass evolved_cut=None to keep them or a "
                         "magnitude to choose the cut)")
            used = ok & ~evolved
            sel, res = run(used, start=(res["ebv"], res["mu0"]))
            evolved_cut_value = float(cut)
        else:
            evolved_cut_value = None
    else:
        evolved_cut_value = evolved_cut if isinstance(evolved_cut, float) else None

    flags = []
    cov = res["cov"].copy()
    stat_cov = cov.copy()
    cov[0, 0] += EBV_FLOOR**2
    if colours_only:
        flags.append("colour_colour_only")
    else:
        if plx is not None:
            flags.append("parallax_prior")
        if not _breaks_degeneracy(bands, names, plx is not None):
            flags.append("ebv_mu0_degenerate")
            # a shared offset c of the sequence's colour is indistinguishable from moving E(B-V)
            # by c/k and mu0 by -R_m c/k (k = E(colour)/E(B-V), R_m = A_m/E(B-V))
            cb = [b for b in bands]
            mag_band = ref_band
            blue, red = (cb[0], cb[-1]) if len(cb) >= 2 else (cb[0], cb[0])
            eg, tab = reddening_curve((blue, red, mag_band), law_obj, rv)
            a1 = _a_at(eg, tab, res["ebv"] + 0.05)
            a0 = _a_at(eg, tab, max(res["ebv"] - 0.05, -0.25))
            de = (res["ebv"] + 0.05) - max(res["ebv"] - 0.05, -0.25)
            k = ((a1[0] - a1[1]) - (a0[0] - a0[1])) / de
            r_m = (a1[2] - a0[2]) / de
            uvec = np.array([1.0 / k, -r_m / k])
            cov = cov + sequence_colour_systematic**2 * np.outer(uvec, uvec)
            hint = ("U-B photometry (a colour-colour diagram), a second colour with a long baseline "
                    "(e.g. J-Ks with B-V or BP-RP), or member parallaxes")
            notes.append(f"one diagram ({', '.join(names)}) cannot separate E(B-V) from mu0; errors include a "
                         f"{sequence_colour_systematic:g} mag systematic of the sequence's colour")
            if warn:
                warnings.warn(
                    f"E(B-V) and the distance modulus are degenerate in a single colour-magnitude diagram "
                    f"({', '.join(names)}): they trade off along the reddening vector and only the sequence's "
                    f"curvature separates them. The errors include a {sequence_colour_systematic:g} mag systematic of "
                    f"the sequence's colour (ebv_err {math.sqrt(cov[0, 0]):.3f}, mu0_err {math.sqrt(cov[1, 1]):.3f} mag). "
                    f"To break the degeneracy add {hint}.", DegeneracyWarning, stacklevel=3)
    if not colours_only or res["rv_slope"] is not None:
        cov, rv_note, rv_flag = _rv_terms(res["rv_slope"], rv, rv_err, cov, colours_only)
        notes.append(rv_note)
        if rv_flag:
            flags.append("rv_sensitive")
    if res["scatter"] > sequence_scatter + 0.005:
        notes.append(f"the sequence is wider than {sequence_scatter:g} mag: its fitted width, "
                     f"{res['scatter']:.3f} mag, is added to every star's errors")
    if res["at_bound"]:
        flags.append("at_bound")
    if res["unreliable"]:
        flags.append("covariance_unreliable")
        notes.append("the likelihood is not curved like a peak at the best fit: the errors are rough (1 mag "
                     "where undetermined); check the diagrams")
    weights = np.zeros(n_rows)
    weights[sel] = res["resp"]
    n_used = int(np.count_nonzero(weights >= 0.5))
    if n_used < 10:
        flags.append("few_members")
    if evolved.any():
        flags.append("evolved_cut")
    ebv, mu0 = res["ebv"], res["mu0"]
    ebv_err = float(math.sqrt(max(cov[0, 0], 0.0)))
    if colours_only:
        mu0 = mu0_err = corr = math.nan
        cov = np.array([[cov[0, 0], math.nan], [math.nan, math.nan]])
        dist = dist_err = math.nan
    else:
        mu0_err = float(math.sqrt(max(cov[1, 1], 0.0)))
        corr = float(cov[0, 1] / (ebv_err * mu0_err)) if ebv_err > 0 and mu0_err > 0 else 0.0
        dist = 10.0 ** (mu0 / 5.0 + 1.0)
        dist_err = dist * math.log(10.0) / 5.0 * mu0_err
    plx_info = None
    if plx is not None:
        plx_info = {"zero_point": parallax_zero_point, "floor": parallax_floor, "offset": res.get("dplx", 0.0)}
    return ClusterFit(
        ebv=float(ebv), ebv_err=ebv_err, distance_modulus=float(mu0), distance_modulus_err=float(mu0_err),
        covariance=cov, correlation=float(corr), distance=dist * u.pc, distance_err=dist_err * u.pc,
        n_members_used=n_used, n_stars=n_rows, weights=weights, used=used, evolved=evolved, flags=tuple(flags),
        observables=tuple(names), field_fraction=res["f_field"], binary_fraction=res["f_bin"],
        evolved_limit=evolved_cut_value, reference_band=ref_band, sequence_source=seq.source,
        sequence_version=seq.version, law=law_obj.name, rv=rv, sequence_scatter=res["scatter"],
        parallax=plx_info, notes=notes, statistical_covariance=stat_cov,
        rv_slope=None if res["rv_slope"] is None else tuple(float(v) for v in res["rv_slope"]),
    )


def _rv_terms(slope, rv, rv_err, cov, colours_only):
    """The fit's dependence on the assumed R_V: (covariance, note, flag).

    ``slope`` is d(E(B-V), mu0)/dR_V at the best fit (first order). The covariance gains
    ``rv_err**2 slope slope^T``; the flag is raised when an R_V off by :data:`RV_SPREAD`
    would move E(B-V) or mu0 by more than its error without that term.
    """
    if slope is None:
        return cov, f"R_V = {rv:g} is fixed by the law; the errors hold for that R_V only", False
    s = np.zeros(2)
    s[:len(slope)] = slope
    k = 1 if colours_only else 2
    err = np.sqrt(np.maximum(np.diag(cov)[:k], 0.0))
    sensitive = bool(np.any(RV_SPREAD * np.abs(s[:k]) > err))
    moved = f"E(B-V) by {0.1 * s[0]:+.3f}" + ("" if colours_only else f" and mu0 by {0.1 * s[1]:+.3f}")
    note = f"the fit assumes R_V = {rv:g}: +0.1 in R_V moves {moved} mag (first order)"
    if rv_err > 0:
        cov = cov + rv_err**2 * np.outer(s, s)
        if colours_only:
            cov[1, 0] = cov[0, 1] = cov[1, 1] = 0.0
        note += f"; an R_V error of {rv_err:g} is included in the errors"
    elif sensitive:
        note += (f"; an R_V off by {RV_SPREAD:g} (a common spread between sight lines) moves the result by more "
                 "than its quoted error, which does not include it (pass rv_err= to include it)")
    return cov, note, sensitive


def _log_beta22(f):
    # Beta(2, 2) prior on a fraction, expressed in its logit (density f^2 (1-f)^2)
    return 2.0 * math.log(f) + 2.0 * math.log1p(-f)


def _optimise(args, colours_only, has_plx, start=None):
    """MAP point and Laplace covariance of (E(B-V), mu0) for one cluster."""
    e0, m0, model = _start_point(args, colours_only, start)
    use_plx = has_plx and not colours_only and args["plx_floor"] > 0
    names = (["ebv", "lff", "width"] if colours_only else
             ["ebv", "mu0", "lff", "lfb"] + (["dplx"] if use_plx else []) + ["width"])
    s0 = args["scatter"]

    def unpack(x):
        v = dict(zip(names, x))
        return (v["ebv"], v.get("mu0", 0.0), _expit(v["lff"]), _expit(v["lfb"]) if "lfb" in v else 0.0,
                v.get("dplx", 0.0), math.hypot(s0, v["width"]))

    def log_prior(x):
        v = dict(zip(names, x))
        val = _log_beta22(_expit(v["lff"])) + (_log_beta22(_expit(v["lfb"])) if "lfb" in v else 0.0)
        if "dplx" in v:
            val += -0.5 * (v["dplx"] / args["plx_floor"]) ** 2
        return val

    def nlp(x):
        e, m, ff, fb, d, sc = unpack(x)
        return -(model.mixture(e, m, ff, fb, d, sc)[0].sum() + log_prior(x))

    start_x = {"ebv": e0, "mu0": m0, "lff": _logit(0.3), "lfb": _logit(0.3), "dplx": 0.0, "width": 0.0}
    step_of = {"ebv": 0.003, "mu0": 0.006, "lff": 0.05, "lfb": 0.05, "width": 0.005,
               "dplx": max(args["plx_floor"], 1e-4) * 0.1}
    x0 = np.array([start_x[k] for k in names], dtype=float)
    steps = np.array([step_of[k] for k in names])
    x = x0
    for scale in (8, 2):  # a restart from a fresh, smaller simplex: Nelder-Mead can stall early
        x = minimize(nlp, x, method="Nelder-Mead", options={
            "xatol": 1e-3, "fatol": 2e-3, "maxiter": 4000, "initial_simplex": _simplex(x, steps * scale)}).x
    x = x.copy()
    x[names.index("width")] = abs(x[names.index("width")])  # the likelihood is even in it
    hess = _hessian(nlp, x, steps)
    full, unreliable = _invert(hess)
    rv_slope = _rv_slope(nlp, model, x, steps, full, args)
    e, m, ff, fb, d, sc = unpack(x)
    tot, resp = model.mixture(e, m, ff, fb, d, sc)
    k = 1 if colours_only else 2
    cov = full[:k, :k] if not colours_only else np.array([[full[0, 0], 0.0], [0.0, 0.0]])
    out = dict(ebv=float(e), mu0=math.nan if colours_only else float(m), f_field=ff, f_bin=fb, dplx=float(d),
               scatter=float(sc))
    out["cov"] = np.array(cov, dtype=float)
    out["resp"] = resp
    out["model"] = model
    # at the ends of the reddening line the likelihood no longer changes with E(B-V)
    out["at_bound"] = bool(out["ebv"] <= model.red_ebv[0] + 0.01 or out["ebv"] >= model.red_ebv[-1] - 0.05)
    out["unreliable"] = unreliable
    out["rv_slope"] = None if rv_slope is None else rv_slope[:k]
    return out


def _gradient(fun, x, steps):
    g = np.empty(len(x))
    for i in range(len(x)):
        e = np.zeros(len(x))
        e[i] = steps[i]
        g[i] = (fun(x + e) - fun(x - e)) / (2 * steps[i])
    return g


def _rv_slope(nlp, model, x, steps, inv_hess, args):
    """How the fitted parameters move per unit of R_V, to first order: by the implicit function
    theorem dx/dR_V = -H^-1 d(grad)/dR_V at the best fit, the gradient taken with the reddening
    vector of R_V +- 0.02 (inside the law's range; a wider step leaves the quadratic peak of a
    rich cluster, where the binaries take up the shift). None for a law of one R_V."""
    lo, hi = args["law"].rv_range
    r_hi, r_lo = min(args["rv"] + 0.02, hi), max(args["rv"] - 0.02, lo)
    if not r_hi > r_lo:
        return None
    keep = model.red_ebv, model.red_tab
    grads = []
    try:
        for r in (r_hi, r_lo):
            model.red_ebv, model.red_tab = reddening_curve(model.bands, args["law"], r)
            grads.append(_gradient(nlp, x, steps))
    finally:
        model.red_ebv, model.red_tab = keep
    return -inv_hess @ ((grads[0] - grads[1]) / (r_hi - r_lo))


def _invert(hess):
    """Inverse of the curvature; (inverse, unreliable) with a rough 1-mag stand-in where the
    likelihood is not curved like a peak."""
    try:
        full = np.linalg.inv(hess)
        if not np.all(np.isfinite(full)) or np.any(np.diag(full) <= 0):
            raise np.linalg.LinAlgError
        return full, False
    except np.linalg.LinAlgError:
        full = np.linalg.pinv(hess)
        full = np.where(np.isfinite(full), full, 0.0)
        np.fill_diagonal(full, np.maximum(np.abs(np.diag(full)), 1.0))
        return full, True


def _start_point(args, colours_only, start=None):
    """Starting (E(B-V), mu0) from a coarse search on a sample of the stars, and the fine model
    over the stretch of the sequence the members can reach."""
    cargs = {**args, "scatter": max(args["scatter"], 0.06)}
    n = args["values"].shape[0]
    if n > 80:  # the coarse search needs only a sample of the stars
        pick = np.random.default_rng(0).choice(n, 80, replace=False)
        for key in ("values", "errors", "prior", "plx", "plx_err"):
            if cargs[key] is not None:
                cargs[key] = cargs[key][pick]
    if cargs["plx"] is not None:  # the coarse mu0 steps are wide: so are the parallaxes there
        cargs["plx_err"] = np.hypot(cargs["plx_err"], 0.2 * np.abs(np.nan_to_num(cargs["plx"])) + 0.05)
    coarse = _Model(**cargs, step=0.1)
    if colours_only:
        ebv_grid = np.arange(-0.1, 3.01, 0.02)
        ll = [coarse.mixture(e, 0.0, 0.3, 0.0)[0].sum() for e in ebv_grid]
        return float(ebv_grid[int(np.argmax(ll))]), 0.0, _Model(**args, step=0.025)
    # coarse search over (E(B-V), mu0) with fixed fractions
    ebv_grid = np.arange(0.0, 3.01, 0.1)
    kref = int(np.argmax(args["is_mag"]))
    ref = args["values"][:, kref]
    mref = np.nanmedian(ref)
    p = coarse.grid_param
    # mu0 range: where the members' magnitudes can land on the sequence
    mu_lo = max(np.nanmin(ref) - np.nanmax(coarse.pred0[:, kref]) - 1.0, -2.0)
    mu_hi = np.nanmax(ref) - np.nanmin(coarse.pred0[:, kref]) + 1.0
    mu_grid = np.arange(max(mu_lo, 0.0), min(mu_hi, 25.0) + 0.4, 0.4)
    if mu_grid.size < 3:
        mu_grid = np.linspace(mref - 15, mref, 60)
    if start is not None:
        candidates = [(-np.inf, start[0], start[1])]
    else:
        candidates = _coarse_search(coarse, ebv_grid, mu_grid, (-np.inf, 0.0, 10.0))
    reach = np.zeros(p.size, bool)
    for c, (_, e0, m0) in enumerate(candidates):
        # second, finer pass around each coarse peak
        best = (-np.inf, e0, m0)
        for e in np.arange(max(e0 - 0.1, -0.1), e0 + 0.101, 0.025):
            mg = np.arange(m0 - 0.6, m0 + 0.601, 0.075)
            val = coarse.mixture(e, mg, 0.3, 0.0)[0].sum(axis=1)
            j = int(np.argmax(val))
            if val[j] > best[0]:
                best = (val[j], e, mg[j])
        candidates[c] = best
        # the fine model only needs the stretch of the sequence the members can reach
        a = _a_at(coarse.red_ebv, coarse.red_tab, best[1])
        pred_ref = coarse.pred0[:, kref] + (coarse.coef @ a)[kref] + best[2]
        reach |= (pred_ref >= np.nanmin(ref) - 2.5) & (pred_ref <= np.nanmax(ref) + 1.5)
    prange = (p[reach].min(), p[reach].max()) if np.count_nonzero(reach) >= 2 else None
    model = _Model(**args, step=0.025, param_range=prange)
    # the field's dwarfs on the whole sequence, on a coarser grid (field_sequence smooths them)
    wide = _Model(**args, step=0.1)
    e_top = max(c[1] for c in candidates)
    model.add_field(wide.field_sequence(2.0 * e_top + 0.5, np.arange(mu_grid[0], mu_grid[-1] + 1e-9, 0.3)))
    if len(candidates) > 1:
        # the coarse model (one width, no binaries, a broad field) can rank its peaks wrongly:
        # the full model chooses among them (a degenerate diagram has several)
        def score(c):
            mg = np.arange(c[2] - 0.3, c[2] + 0.301, 0.05)
            val = model.mixture(c[1], mg, 0.3, 0.3, 0.0, args["scatter"])[0].sum(axis=1)
            return float(np.max(val)), c[1], float(mg[int(np.argmax(val))])
        candidates = sorted((score(c) for c in candidates), key=lambda c: -c[0])
    return candidates[0][1], candidates[0][2], model


def _coarse_search(coarse, ebv_grid, mu_grid, best, n_candidates=3):
    """The best (value, E(B-V), mu0) points on the coarse grid: the highest peaks of the profile
    along E(B-V) (the best mu0 at each), at most ``n_candidates``, best first. While the best
    lies at the grid's top (an embedded cluster seen in the infrared), the grid goes on upward
    to the reddening line's end, 3 mag of E(B-V) at a time."""
    top = coarse.red_ebv[-1]
    profile = {}
    while len(ebv_grid):
        for e in ebv_grid:
            val = coarse.mixture(e, mu_grid, 0.3, 0.0)[0].sum(axis=1)
            j = int(np.argmax(val))
            profile[float(e)] = (val[j], float(e), mu_grid[j])
            if val[j] > best[0]:
                best = (val[j], e, mu_grid[j])
        step = ebv_grid[1] - ebv_grid[0] if len(ebv_grid) > 1 else 0.1
        if best[1] < ebv_grid[-1] - 2.5 * step or ebv_grid[-1] >= top:
            break
        ebv_grid = np.arange(ebv_grid[-1] + step, min(ebv_grid[-1] + 3.0, top) + step / 2, step)
    if not profile:
        return [best]
    vals = [profile[e][0] for e in sorted(profile)]
    peaks = [profile[e] for i, e in enumerate(sorted(profile))
             if (i == 0 or vals[i] >= vals[i - 1]) and (i == len(vals) - 1 or vals[i] >= vals[i + 1])]
    return sorted(peaks, key=lambda c: -c[0])[:n_candidates]


def _simplex(x0, steps):
    n = len(x0)
    s = np.tile(x0, (n + 1, 1))
    for i in range(n):
        s[i + 1, i] += steps[i]
    return s


def _auto_evolved(res, values, ref_k):
    """Apparent magnitude (reference band) at or above which stars are taken as evolved.

    A member is an outlier when no point of the sequence (single or binary) matches it
    within about 3 sigma per observable. The turn-off is the brightest star below which
    three stars in a row fit the sequence; the stars above it are cut when at least two of
    them are outliers. Returns None otherwise.
    """
    model = res["model"]
    e, m = res["ebv"], res["mu0"]
    a = _a_at(model.red_ebv, model.red_tab, e)
    pred = model.pred0 + (model.coef @ a)[None, :] + m * model.is_mag[None, :]
    r = (model.obs[:, None, :] - pred[None, :, :]) * model.mask[:, None, :]
    chi2 = np.einsum("ngk,ngk->ng", r, r * model.ivar[:, None, :])
    # binaries: allow a brightening in the magnitudes up to binary_max
    if model.has_mag:
        P = model.ivar @ model.is_mag
        Pc = np.where(P > 0, P, 1.0)
        B = (r * model.ivar[:, None, :]) @ model.is_mag
        dhat = np.clip(-B / Pc[:, None], 0.0, model.binary_max)
        chi2 = chi2 + 2 * dhat * B + dhat**2 * Pc[:, None]
    nk = np.maximum(model.mask.sum(axis=1), 1)
    outlier = chi2.min(axis=1) / nk > 9.0
    mag = values[:, ref_k]
    order = np.argsort(np.where(np.isfinite(mag), mag, np.inf))
    out_sorted = outlier[order]
    # the turn-off: the brightest point below which three stars in a row fit the sequence
    good = ~out_sorted
    run = good[:-2] & good[1:-1] & good[2:] if good.size >= 3 else np.zeros(0, bool)
    if not run.any():
        return None
    start = int(np.argmax(run))
    if start == 0 or np.count_nonzero(out_sorted[:start]) < 2:
        return None
    k = start - 1
    return float(mag[order[k]])
