"""The one table of rejection rules, limits and default errors for tracer catalogues.

Both ways of reading a catalogue use what is written here: :func:`dustkit.tracers.read_tracers`
(in memory, any columns and units) and the chunked reads of :mod:`dustkit.scale` (A_V
catalogues in deg, pc and mag, larger than memory). A limit or a default changed here
changes both; a rejection reason reads the same in both (``REASONS``).
"""

import numpy as np
from astropy import units as u


from .._lib.validation import check_real, param_error

__all__ = [
    "DEFAULT_REJECT_LIMITS",
    "DEFAULT_DISTANCE_FRAC_ERR",
    "DEFAULT_EXCESS_ERR",
    "LATITUDE_RANGE",
    "LONGITUDE_RANGE",
    "RA_RANGE",
    "PARALLAX_WARN_FRAC",
    "KPC_HINT_MEDIAN",
    "ARCSEC_HINT_PARALLAX",
    "PARALLAX_NEGATIVE_NSIGMA",
    "PARALLAX_LENGTH_SCALE",
    "PARALLAX_ERR_FLOOR",
    "AV_ERR_FLOOR",
    "DUPLICATE_SEPARATION_ARCSEC",
    "DUPLICATE_NSIGMA",
    "SAME_NAME_SEPARATION_ARCMIN",
    "SAME_NAME_PAIRS_LIMIT",
    "same_name_apart_notes",
    "DISTANCE_FRAC_ERR_FLOOR",
    "REASONS",
    "CHUNK_RULES",
    "reason",
    "zero_point",
    "floor_errors",
    "check_limits",
    "check_law",
    "check_modulus_kind",
    "check_duplicates",
    "chunk_reasons",
    "validate_rows",
    "below_limit",
    "NEGATIVE_NSIGMA",
]

#: Row rejection limits: E(B-V) in mag (A_V and other excesses are compared
#: through their A_V = R_V * E(B-V) equivalent) and distance in pc.
DEFAULT_REJECT_LIMITS = {"ebv": (-0.3, 20.0), "distance": (0.0, 2.0e5)}
#: A negative lower E(B-V) limit is a noise allowance: a row below it is kept while it lies within
#: this many of its own errors of zero (noise, not a wrong row), so noisy catalogues keep their
#: low tail (cutting it would bias the mean reddening of low-extinction sight lines upward).
NEGATIVE_NSIGMA = 3.0
#: Fractional distance error assumed where a catalogue gives none (``default_distance_frac_err``).
DEFAULT_DISTANCE_FRAC_ERR = 0.10
#: Reddening error assumed where a catalogue gives none, mag of E(B-V) (``default_excess_err``).
DEFAULT_EXCESS_ERR = 0.05
#: Accepted Galactic latitude, Galactic longitude and right ascension, deg (inclusive).
LATITUDE_RANGE = (-90.0, 90.0)
LONGITUDE_RANGE = (-180.0, 360.0)
RA_RANGE = (0.0, 360.0)
#: Fractional parallax error above which 1/parallax is announced as a biased distance.
PARALLAX_WARN_FRAC = 0.2
#: A median distance (in the column's bare numbers) below this means kpc, not pc: reading stops.
KPC_HINT_MEDIAN = 30.0
#: Bare parallaxes (no unit) whose median size is below this, in the column's numbers, are arcsec, not mas
#: (as mas, half the catalogue would lie beyond 100 kpc): reading stops.
ARCSEC_HINT_PARALLAX = 0.01
#: A parallax (zero point subtracted) more than this many of its errors (floor included) below zero is
#: rejected: a true parallax is positive, so under Gaussian errors such a value has odds below 1e-6; it is a
#: 'no value' number (-99) or a failed measurement, and the distance prior would place it far away.
PARALLAX_NEGATIVE_NSIGMA = 5.0
#: Length scale of the exponentially decreasing space density prior for parallaxes, kpc
#: (the value of the examples of Bailer-Jones 2015, PASP 127, 994).
PARALLAX_LENGTH_SCALE = 1.35
#: Systematic floor added in quadrature to parallax errors, mas. From memory of Gaia EDR3
#: validation work (systematics of about 0.01 mas on small angular scales): it matters for
#: cluster-mean parallaxes, whose statistical errors can be far smaller; user-settable.
PARALLAX_ERR_FLOOR = 0.01
#: Two tracers closer than this on the sky (arcsec), with distance and A_V within
#: ``DUPLICATE_NSIGMA`` times their combined errors, are one tracer (common practice for
#: cross-matching compilations).
DUPLICATE_SEPARATION_ARCSEC = 1.0
DUPLICATE_NSIGMA = 2.0
#: Rows with the same name are one tracer only if they are also within this separation on the
#: sky, arcmin. Two compilations' centres of one cluster differ by arcminutes (common practice:
#: cluster centres from different member lists and epochs), while the reused integer IDs of two
#: surveys name different objects, almost always far apart; same-name rows farther apart are
#: kept as separate tracers and reported (``same_name_apart_notes``).
SAME_NAME_SEPARATION_ARCMIN = 30.0
#: At most this many pairs of rows of one name are compared in one sky cell (a cell of twice the
#: same-name limit across): a "name" that so many rows share in one place is not an identifier (a
#: survey or cluster label, say), and comparing all its pairs would take memory without bound, so
#: the read stops and names the value (hint: columns={'name': None}).
SAME_NAME_PAIRS_LIMIT = 5_000_000
#: Floor on per-tracer A_V errors used in every fit, mag (the same value as the 3-D model).
AV_ERR_FLOOR = 0.02
#: Floor on per-tracer fractional distance errors used in every fit (1%).
DISTANCE_FRAC_ERR_FLOOR = 0.01

#: Why a row is rejected: reason -> message (``col`` is the column name, quoted by ``!r``).
REASONS = {
    "missing": "missing value in {col!r}",
    "non_numeric": "non-numeric value in {col!r}",
    "infinite": "infinite value in {col!r}",
    "not_finite": "missing or non-finite value in {col!r}",  # chunked reads: null and NaN alike
    "latitude": "{col!r} outside [{lo:g}, {hi:g}] deg",
    "longitude": "{col!r} outside [{lo:g}, {hi:g}] deg",
    "ra": "{col!r} outside [{lo:g}, {hi:g}] deg",
    "negative_error": "negative error in {col!r}",
    "distance_not_positive": "distance <= 0 in {col!r}",
    "parallax_not_positive": "parallax{zero_point} <= 0 in {col!r}",
    "parallax_no_error": "parallax{zero_point} <= 0 without an error in {col!r}",
    "parallax_far_negative": "parallax{zero_point} more than {n:g} of its errors below 0 in {col!r}",
    "correlation_outside": "correlation in {col!r} outside [-1, 1]",
    "distance_outside": "distance {word} {col!r} outside ({lo:g}, {hi:g}] pc",
    "ebv_outside": "E(B-V) in {col!r} outside [{lo:g}, {hi:g}] mag",
    "excess_outside": ("{kind} in {col!r} outside the A_V range [{av_lo:.3g}, {av_hi:.3g}] mag "
                       "(E(B-V) limits [{lo:g}, {hi:g}] times R_V)"),
    "av_outside": "A_V in {col!r} outside [{lo:g}, {hi:g}] mag times R_V",
    "temperature_not_positive": "temperature <= 0 K in {col!r}",
    "temperature_log": "log10 temperature in {col!r} outside (0, 6)",
}

#: The checks of a chunked read (A_V catalogue in deg, pc, mag), in the order they are made;
#: a row is reported under the first one it fails: (role of the column, reason).
CHUNK_RULES = (
    ("l", "not_finite"),
    ("b", "not_finite"),
    ("b", "latitude"),
    ("l", "longitude"),
    ("av", "not_finite"),
    ("av_err", "infinite"),
    ("av_err", "negative_error"),
    ("av", "av_outside"),
    ("distance", "not_finite"),
    ("distance", "distance_not_positive"),
    ("distance_err", "infinite"),
    ("distance_err", "negative_error"),
    ("distance", "distance_outside"),
)
_RANGES = {"latitude": LATITUDE_RANGE, "longitude": LONGITUDE_RANGE, "ra": RA_RANGE}


def same_name_apart_notes(n_rows, n_names, example=None):
    """The warning text and the assumption text (``meta['assumptions']``) for ``n_rows`` rows under
    ``n_names`` names kept as separate tracers because rows of their name lie farther apart than
    ``SAME_NAME_SEPARATION_ARCMIN``; ``example`` is ``(name, l1, b1, l2, b2)`` (deg) or None. The
    in-memory and the chunked reads say it with these words."""
    names = f"{n_names} name" + ("" if n_names == 1 else "s")
    assumption = (f"rows with the same name more than {SAME_NAME_SEPARATION_ARCMIN:g} arcmin apart on the sky are "
                  f"different objects: {n_rows} rows under {names} kept as separate tracers")
    shown = ""
    if example is not None:
        name, l1, b1, l2, b2 = example
        shown = f" (e.g. {name!r} at (l, b) = ({l1:.3f}, {b1:.3f}) and ({l2:.3f}, {b2:.3f}) deg)"
    message = (f"{n_rows} rows share their name with rows more than {SAME_NAME_SEPARATION_ARCMIN:g} arcmin away"
               f"{shown}: {names}, each kept as one tracer per place, not merged into one. A name reused "
               "by two surveys names two objects. Hint: if the names are not unique identifiers, give the catalogue "
               "unique names or read it without names (columns={'name': None}, or rename the column).")
    return message, assumption


def reason(key, col, **values):
    """The rejection message of ``key`` (see ``REASONS``) for column ``col``.

    Position reasons take their range from the table unless ``lo``/``hi`` are given.
    """
    if key in _RANGES and "lo" not in values:
        values["lo"], values["hi"] = _RANGES[key]
    return REASONS[key].format(col=col, **values)


def chunk_reasons(colmap, limits=None):
    """``(role, message)`` of every rule in ``CHUNK_RULES`` for the file's column names ``colmap``."""
    limits = DEFAULT_REJECT_LIMITS if limits is None else limits
    extra = {"av_outside": dict(zip(("lo", "hi"), limits["ebv"])),
             "distance_outside": dict(zip(("lo", "hi"), limits["distance"]), word="in")}
    return tuple((role, reason(key, colmap[role], **extra.get(key, {}))) for role, key in CHUNK_RULES)


def below_limit(ebv, ebv_err, lo):
    """True where an E(B-V) (or its A_V / R_V equivalent) lies below the lower limit ``lo``.

    A negative ``lo`` (the default -0.3 mag) is a noise allowance, not a physical bound: a row
    below it is kept while it lies within ``NEGATIVE_NSIGMA`` of its own error (``ebv_err``, the
    same units; NaN counts as 0) of zero. A limit of zero or above is applied as given.
    """
    ebv = np.asarray(ebv, float)
    if lo >= 0:
        return ebv < lo
    err = np.nan_to_num(np.asarray(ebv_err, float), nan=0.0)
    return (ebv < lo) & (ebv < -NEGATIVE_NSIGMA * err)


def validate_rows(a, rv, limits=None):
    """Reason code per row (-1 = accepted, else the index in ``CHUNK_RULES``) and the cleaned accepted rows.

    ``a`` maps the roles ``l``, ``b``, ``distance``, ``distance_err``, ``av``, ``av_err`` to
    float arrays in deg, pc and mag (NaN for nulls). The rules are those of
    :func:`dustkit.tracers.read_tracers` for such a catalogue: a missing position, distance
    or A_V, a latitude or longitude outside its range, a distance outside the limits, A_V
    outside R_V times the E(B-V) limits, or a negative error rejects a row; a missing or
    zero error takes the catalogue default (``DEFAULT_DISTANCE_FRAC_ERR`` of the distance;
    ``DEFAULT_EXCESS_ERR`` times R_V for A_V); ``l`` is wrapped into [0, 360).
    """
    limits = DEFAULT_REJECT_LIMITS if limits is None else limits
    l, b, d, de, av, ae = (a[r] for r in ("l", "b", "distance", "distance_err", "av", "av_err"))
    (ebv_lo, ebv_hi), (d_lo, d_hi) = limits["ebv"], limits["distance"]
    with np.errstate(invalid="ignore"):
        ae_used = np.where(np.isfinite(ae) & (ae > 0), ae, rv * DEFAULT_EXCESS_ERR)  # as the fits will take it
        values = {"l": l, "b": b, "distance": d, "distance_err": de, "av": av, "av_err": ae}
        failing = {
            "not_finite": lambda x: ~np.isfinite(x),
            "infinite": np.isinf,
            "negative_error": lambda x: x < 0,
            "latitude": lambda x: (x < LATITUDE_RANGE[0]) | (x > LATITUDE_RANGE[1]),
            "longitude": lambda x: (x < LONGITUDE_RANGE[0]) | (x > LONGITUDE_RANGE[1]),
            "av_outside": lambda x: below_limit(x / rv, ae_used / rv, ebv_lo) | (x / rv > ebv_hi),
            "distance_not_positive": lambda x: x <= 0,
            "distance_outside": lambda x: ~((x > d_lo) & (x <= d_hi)),
        }
        code = np.full(l.size, -1, dtype=np.int16)
        for k, (role, key) in enumerate(CHUNK_RULES):
            code[(code < 0) & failing[key](values[role])] = k
    keep = code < 0
    lk = np.mod(l[keep], 360.0)  # (errors below the fit floors are floored by the fits, floor_errors)
    lk = np.where(lk >= 360.0, 0.0, lk)
    dk = d[keep]
    dek = de[keep]
    dek = np.where(np.isfinite(dek) & (dek > 0), dek, DEFAULT_DISTANCE_FRAC_ERR * dk)
    aek = ae[keep]
    aek = np.where(np.isfinite(aek) & (aek > 0), aek, rv * DEFAULT_EXCESS_ERR)
    # the fits' floors, as the in-memory fits apply them (floor_errors)
    dek = np.maximum(dek, DISTANCE_FRAC_ERR_FLOOR * dk)
    aek = np.maximum(aek, AV_ERR_FLOOR)
    return code, (lk, b[keep], dk, dek, av[keep], aek)


def floor_errors(distance, distance_err, av_err, warn=True):
    """Per-tracer errors floored for a fit: A_V errors at ``AV_ERR_FLOOR`` mag, distance errors
    at ``DISTANCE_FRAC_ERR_FLOOR`` times the distance.

    A single near-zero error otherwise takes all the weight of a least-squares fit (one
    E(B-V) error of 1e-6 mag among 60 tracers sent a layer fit's scale height to 4 852 +-
    10 341 pc). Returns the floored ``distance_err`` and ``av_err`` (new arrays only where
    something changed) and warns (``AssumptionWarning``) with the count when ``warn``.
    """
    import warnings

    from ..exceptions import AssumptionWarning

    d = np.asarray(distance, float)
    de = np.asarray(distance_err, float)
    ae = np.asarray(av_err, float)
    low_a = ae < AV_ERR_FLOOR
    low_d = de < DISTANCE_FRAC_ERR_FLOOR * d
    na, nd = int(low_a.sum()), int(low_d.sum())
    if na:
        ae = np.maximum(ae, AV_ERR_FLOOR)
    if nd:
        de = np.maximum(de, DISTANCE_FRAC_ERR_FLOOR * d)
    if warn and (na or nd):
        warnings.warn(
            AssumptionWarning(
                f"{na} of {ae.size} tracers have an A_V error below {AV_ERR_FLOOR:g} mag and {nd} a distance error "
                f"below {100 * DISTANCE_FRAC_ERR_FLOOR:g}% of the distance; the fit uses these floors instead "
                "(dustkit.tracers.rules.AV_ERR_FLOOR, DISTANCE_FRAC_ERR_FLOOR)."
            ),
            stacklevel=3,
        )
    return de, ae


def zero_point(zp):
    """The parallax zero point in mas (a Quantity, or a plain number in mas)."""
    if isinstance(zp, u.Quantity):
        try:
            value = zp.to_value(u.mas)
        except u.UnitConversionError:
            raise param_error("parallax_zero_point", "an angle such as -0.017 * u.mas", zp) from None
        if np.ndim(value) != 0:
            raise param_error("parallax_zero_point", "one angle such as -0.017 * u.mas", zp)
        # the Quantity's value in mas, range-checked as a bare number is (a NaN or 1e9 mas is no zero point)
        return check_real("parallax_zero_point", float(value), -10.0, 10.0)
    return check_real("parallax_zero_point", zp, -10.0, 10.0)


def check_modulus_kind(kind):
    """``distance_modulus_kind``: None, ``'true'`` or ``'apparent'``."""
    if kind is None:
        return None
    if not isinstance(kind, str) or kind.strip().lower() not in ("true", "apparent"):
        raise param_error("distance_modulus_kind", "'true' (mu0) or 'apparent' ((m-M)_V)", kind)
    return kind.strip().lower()


def check_duplicates(duplicates):
    """``duplicates``: ``'merge'`` or ``'keep'``."""
    if duplicates not in ("merge", "keep"):
        raise param_error("duplicates", "'merge' or 'keep'", duplicates)
    return duplicates


def check_limits(reject_limits):
    """The rejection limits: ``DEFAULT_REJECT_LIMITS`` updated by ``reject_limits`` (checked)."""
    limits = {k: tuple(v) for k, v in DEFAULT_REJECT_LIMITS.items()}
    if reject_limits is None:
        return limits
    if not isinstance(reject_limits, dict):
        raise param_error("reject_limits", "a dict like {'ebv': (-0.3, 20.0), 'distance': (0, 2e5)}", reject_limits)
    for k, v in reject_limits.items():
        if k not in limits:
            raise param_error("reject_limits", f"a dict with keys among {', '.join(limits)}", k)
        try:
            lo, hi = v
            if isinstance(lo, u.Quantity) or isinstance(hi, u.Quantity):
                unit = u.pc if k == "distance" else u.mag
                lo = u.Quantity(lo).to_value(unit)
                hi = u.Quantity(hi).to_value(unit)
            lo, hi = float(lo), float(hi)
        except (TypeError, ValueError, u.UnitsError):
            raise param_error(f"reject_limits['{k}']", "a (low, high) pair of numbers", v) from None
        if not lo < hi:
            raise param_error(f"reject_limits['{k}']", "a (low, high) pair with low < high", v)
        limits[k] = (lo, hi)
    return limits


def check_law(law, rv):
    """Validate the law name and R_V through dustkit.laws (when present); return (law, rv)."""
    if not isinstance(law, str) or not law.strip():
        raise param_error("law", "the name of an extinction law, e.g. 'ccm89'", law)
    try:
        from .. import laws
    except ImportError:
        return law, rv
    if hasattr(laws, "get_law"):
        obj = laws.get_law(law)
        if hasattr(obj, "check_rv"):
            rv = float(obj.check_rv(rv))
        name = getattr(obj, "name", None)
        if isinstance(name, str) and name:
            law = name
    return law, rv
