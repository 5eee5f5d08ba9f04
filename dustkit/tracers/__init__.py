"""Catalogue ingestion: read extinction tracers and targets into validated arrays.

A *tracer* is an object (a star cluster, a field star) with a known position,
distance and reddening. :func:`read_tracers` reads a catalogue of them from a
file (CSV, ECSV, FITS table, VOTable, Parquet; all through astropy's
``Table.read``), an astropy ``Table``/``QTable`` or a pandas ``DataFrame``,
recognises the columns, converts everything to Galactic ``l``, ``b`` (deg),
distance (pc) and A_V (mag) with errors, and rejects unusable rows with a
reason per row. :func:`read_targets` reads a list of positions and distances
at which extinction is wanted.

Column recognition
------------------
Column names are matched case-insensitively after removing everything but
letters and digits (``"E(B-V)"``, ``"E_B-V"`` and ``"ebv"`` all read as
``ebv``). The roles, and the keys of the ``columns=`` mapping that names a
column explicitly (an explicit mapping always wins), are:

===================== =====================================================
key                   meaning (a few accepted spellings)
===================== =====================================================
name                  tracer name (``name``, ``id``, ``cluster``, ``source_id``)
l, b                  Galactic longitude, latitude in deg (``l``/``b``,
                      ``glon``/``glat``, ``GLON``/``GLAT``, ``_Glon``/``_Glat``)
ra, dec               ICRS right ascension, declination in deg, or
                      sexagesimal strings (``ra``/``dec``, ``RAJ2000``/``DEJ2000``,
                      ``RA_ICRS``/``DE_ICRS``, ``RAdeg``/``DEdeg``); FK4 for
                      ``RAB1950``/``DEB1950`` or a file that says so (COOSYS, EQUINOX)
distance              distance; unit from the column, the name (``dist_kpc``),
                      or ``distance_unit`` (``distance``, ``dist``, ``d``)
distance_modulus      true distance modulus mu0 in mag (``mu0``, ``(m-M)0``, ``dm0``);
                      ``dm``, ``distmod``, ``modulus`` need ``distance_modulus_kind``
apparent_modulus      apparent V-band modulus (m-M)_V in mag (``(m-M)V``, ``mM_V``, ``dmv``)
ebv_mu0_corr          correlation of the E(B-V) and mu0 errors (-> ``av_distance_corr``)
parallax              parallax in mas (``parallax``, ``plx``)
ebv                   E(B-V) in mag (``E(B-V)``, ``ebv``, ``E_BV``, ``reddening``)
av                    A_V in mag (``A_V``, ``Av``, ``A(V)``)
excess                any other colour excess (``E(BP-RP)``, ``E_J_Ks``); its
                      colour from ``excess_color`` or the column name
temperature           the source star's temperature in K, for converting a colour
                      excess other than E(B-V) (``teff``, ``T_eff``, ``Teff_K``,
                      ``temperature``, ``teff_gspphot``; ``logTeff`` in log10 K)
intrinsic_color       the star's intrinsic colour instead (``(BP-RP)_0``, ``bp_rp0``,
                      ``(B-V)_0``, ``intrinsic_BP-RP``); its colour from the name or
                      ``intrinsic_color_bands``
<key>_err             the error of any of the above (``e_X``, ``X_err``,
                      ``err_X``, ``sigma_X``, ``X_error``, ``eX``); relative with a unit
                      ``%`` or a name saying ``pct``/``frac``/``rel`` (``e_X(%)``); a
                      lower/upper pair (``e_X``/``E_X``, ``X_err_lo``/``X_err_hi``) averaged
===================== =====================================================

Columns whose names mark them as errors (``e_...``, ``err_...``, ``sigma_...``,
``..._err``, ``..._error``, and ``eX`` beside a column ``X``) are never taken
as values; so ``e_B-V`` (the error of a colour ``B-V``) is not read as E(B-V).

When several candidates are present, the first of these is used: Galactic
before equatorial positions (noted in ``meta["assumptions"]``); distance, then
true distance modulus, then parallax, then apparent V modulus; E(B-V), then
A_V, then another colour excess (these two choices with an ``AssumptionWarning``).

Package layout (each module imports only the ones above it in this list)
------------------------------------------------------------------------
``rules``      the one table of rejection rules, limits and default errors (also used by
               the chunked reads of :mod:`dustkit.scale`)
``context``    rejected rows and notes of one read
``values``     numbers from columns, positions, error columns, names
``reddening``  colour excess / A_V -> A_V
``columns``    column recognition
``distances``  distance, modulus or parallax -> pc (parallaxes through the distance prior)
``duplicates`` exact and near-duplicate tracers: groups, report, inverse-variance merge
``assemble``   one table -> the fields of a TracerSet
``sets``       :class:`TracerSet`, :class:`TargetList`
``reader``     :func:`read_tracers`, :func:`read_targets`
"""

from .columns import COLUMN_KEYS
from .reader import SUFFIX_FORMATS, read_targets, read_tracers
from .rules import DEFAULT_REJECT_LIMITS
from .sets import TargetList, TracerSet

__all__ = [
    "TracerSet",
    "TargetList",
    "read_tracers",
    "read_targets",
    "COLUMN_KEYS",
    "SUFFIX_FORMATS",
    "DEFAULT_REJECT_LIMITS",
]
