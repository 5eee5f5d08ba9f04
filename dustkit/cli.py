"""The ``dustkit`` command: build, query and export extinction models from a shell.

A thin layer over the library: every command calls the same functions a Python user would
(:func:`dustkit.tracers.read_tracers`, :class:`dustkit.model.ExtinctionModel`,
:mod:`dustkit.io`, :mod:`dustkit.plotting`). Errors are reported as one line on stderr, naming
the option the user typed, with exit status 2 when the command line itself is wrong (unknown or
missing option, a value outside its range, options that conflict, an output name whose suffix
names no format written there) and 1 when the command line is right but the job failed (an input
file missing, unreadable or with bad contents, an output that exists without --overwrite or whose
folder is missing, a fit that failed); see DEVELOPERS.md. ``--debug`` shows the traceback.
Progress bars appear only on a terminal and never with ``--quiet``.

Run ``dustkit --help`` or ``dustkit COMMAND --help``.
"""

import argparse
import gc
import json
import os
import re
import sys
import traceback
import warnings
from pathlib import Path

__all__ = ["main", "build_parser"]

_PROG = "dustkit"
_DEMO_FILES = ("veyra_clusters.csv", "veyra_targets.csv", "veyra_field.json")


class _UsageError(Exception):
    """A bad option value found after parsing (exit status 2)."""


class _Parser(argparse.ArgumentParser):
    """ArgumentParser whose errors are one line on stderr (exit status 2)."""

    def error(self, message):
        sys.stderr.write(f"{self.prog}: error: {_with_help_hint(message, self.prog)}\n")
        sys.exit(2)


def _one_line(text):
    return " ".join(str(text).split())


def _with_help_hint(text, prog):
    text = _one_line(text)
    if "Hint:" in text:
        return text
    return f"{text.rstrip('.')}. Hint: see '{prog} --help'."


# ============================================================================ parser

_EPILOGS = {
    "build": """examples:
  dustkit build clusters.csv -o model.fits
  dustkit build clusters.fits -o model.fits --nside 64 --distance-max 5000 --distance-step 250
  dustkit build stars.csv -o model.fits --column ebv=EBV_MAG --column distance=D --distance-unit kpc
  dustkit build clusters.csv -o model.fits --distance-edges 0,250,500,1000,2000,4000 --law odonnell94 --rv 3.1
  dustkit build field_stars/ -o model.fits --nside 64 --chunk-size 2000000
  dustkit build giants.csv -o model.fits --source-temperature 4500
  dustkit build region.csv -o model.fits --layer-from layer.json
  dustkit build clusters.csv -o model.fits --rejects rejected_rows.csv

A colour excess other than E(B-V) (a column E(BP-RP), E(J-Ks), ...) is turned into A_V through
the passbands of its two bands for each row's star: its temperature from a column teff (T_eff,
logTeff, teff_gspphot, ...) or its intrinsic colour from a column such as (BP-RP)_0; rows and
catalogues without one use --source-temperature (default 5800 K, announced). E(B-V) gives
A_V = R_V E(B-V) whatever the star.""",
    "estimate": """examples:
  dustkit estimate model.fits targets.csv -o targets_av.csv
  dustkit estimate model.fits targets.ecsv -o targets_av.ecsv --band J --band Ks
  dustkit estimate model.fits targets.csv -o out.csv --column distance=dist --distance-unit kpc
  dustkit estimate model.fits targets.csv -o draws.ecsv --samples 200

The output keeps every input column and adds av and av_err (mag); for a 3-D density model
av_err_layer (the fitted layer's part of av_err, the same error under every row: it does not
average down when rows are combined), support (0 = the prior alone, 1 = set by tracers),
n_tracers (tracers in front, kernel-weighted), prior_only (support below 0.1) and, with
--samples N, N posterior draws of A_V; and a_BAND, a_BAND_err for each --band. Rows without a
usable position or distance keep empty (NaN) values.""",
    "layer": """examples:
  dustkit layer clusters.csv
  dustkit layer clusters.csv --json > layer.json
  dustkit layer clusters.csv --rejects rejected_rows.ecsv

a0 is in mag/kpc, h and z_sun in pc. The JSON serves 'dustkit build --layer-from' for the
model of a smaller region inside the catalogue's, where clouds would lift a layer fitted there.""",
    "profile": """examples:
  dustkit profile model.fits --l 58 --b 1 -o sightline.png
  dustkit profile model.fits --l 32.5 --b -2 --radius 1.5 -o cone.pdf""",
    "features": """examples:
  dustkit features model.fits -o features.csv
  dustkit features model.fits -o features.ecsv --min-delta-av 0.3 --min-probability 0.999
  dustkit features model.fits -o features.ecsv --finder steps --radius 6 --detections pixels.ecsv

On a 3-D density model (the default for cluster catalogues) features are compact
over-densities of the model's dust density, tested against the tracers they hold; no cone
radius is needed. Columns: feature, kind ('located' or 'nearer than'), l, b (deg), extent
(deg), extent_pc, depth (pc), distance, distance_err, distance_upper, distance_front,
distance_behind (the tracers bracketing it), distance_near, distance_far (pc), delta_av, delta_av_err, delta_av_max (mag), contrast, n_tracers,
n_front, n_behind, n_pixels, n_cells, significance (the tracers' posterior probability of
adding --min-delta-av), model_significance (the model's, from its posterior samples).
A 'nearer than' feature has fewer than two tracers in front of it that do not show it (one
could be a wrong member): the dust lies somewhere nearer than distance_upper. On a binned model (or with --finder steps) steps in A_V against distance
are searched per sky pixel and merged (significance: BIC improvement over no step).
Features are statistical: check them against local data.""",
    "export": """examples:
  dustkit export model.fits -o table.ecsv
  dustkit export model.fits -o table.csv
  dustkit export model.fits -o table.fits --maps slices.fits

The table has one row per informed pixel and distance bin: pixel, l, b, distance_min,
distance_max, av_near, av, av_err, differential, n_tracers. The maps file holds one
full-sky HEALPix map of A_V per distance edge (healpy.read_map(path, field=k)), then the
error maps.""",
    "laws": """example:
  dustkit laws""",
    "bands": """examples:
  dustkit bands
  dustkit bands --law fitzpatrick99 --temperature 4000 --av 1

For each band: its system, where its transmission curve comes from (or that it has
none, and the law is taken at its effective wavelength), the photon-weighted
wavelength for the reference star, and A_band/A_V for that star (a blackbody at
--temperature behind A_V = --av). Broad bands (Gaia G, BP, RP) depend strongly on
the star: give the star's temperature when converting.""",
    "demo": """examples:
  dustkit demo
  dustkit demo --out /tmp/veyra

Runs the whole job on the invented Veyra Field (a made-up region, not a real one): reads the
cluster catalogue (with a few deliberately bad rows), fits the dust layer, builds and saves a
model, exports the table and slice maps, draws figures and estimates extinction for a target
list. Files from an earlier demo run in the same folder are replaced.""",
}


def _common(sub):
    """--quiet/--debug also after the command name (defaults suppressed so they do not reset)."""
    sub.add_argument("--quiet", action="store_true", default=argparse.SUPPRESS,
                     help="print only errors and warnings; no progress bars")
    sub.add_argument("--debug", action="store_true", default=argparse.SUPPRESS,
                     help="show the full traceback on errors")


def _add_catalogue_options(p):
    p.add_argument("--column", action="append", default=[], metavar="KEY=NAME",
                   help="use column NAME for KEY (repeatable), e.g. --column ebv=EBV --column distance=Dist; "
                        "keys: name, l, b, ra, dec, distance, distance_modulus, apparent_modulus, parallax, "
                        "ebv, av, excess, temperature, intrinsic_color and KEY_err; --column name= reads no names")
    p.add_argument("--distance-unit", metavar="UNIT",
                   help="unit of the distance column (pc or kpc); overrides a unit in the file or in the column name")
    p.add_argument("--parallax-zero-point", type=float, default=None, metavar="MAS",
                   help="zero point of a parallax column, mas (-10 to 10), subtracted before the parallaxes are "
                        "used (default 0; that of Gaia (E)DR3 is about -0.02)")
    p.add_argument("--modulus-kind", choices=("true", "apparent"), default=None,
                   help="what a modulus column whose name does not say (dm, distmod, modulus) holds: the true "
                        "modulus mu0 or the apparent V modulus (m-M)_V; without it such a column is refused")


def _add_tracer_options(p):
    p.add_argument("--duplicates", choices=("merge", "keep"), default="merge",
                   help="rows repeating a tracer (exact copies, same name, or same place with distance and A_V "
                        "within their errors): merge each group into one tracer (default) or keep them")
    p.add_argument("--duplicate-separation", type=float, default=None, metavar="ARCSEC",
                   help="sky separation within which two rows may be one tracer, arcsec (default 1; 0: only "
                        "names and exact copies); distance and A_V must agree within their errors too")
    p.add_argument("--parallax-floor", type=float, default=None, metavar="MAS",
                   help="systematic error added in quadrature to parallax errors, mas (default 0.01)")
    p.add_argument("--source-temperature", type=float, default=None, metavar="K",
                   help="blackbody temperature in K (2000 to 100000) of the stars, for converting a colour excess other than "
                        "E(B-V) (E(BP-RP), E(J-Ks), ...) to A_V where the catalogue has no temperature (teff) or "
                        "intrinsic-colour ((BP-RP)_0) column or cell (default 5800; E(B-V) does not depend on it)")


def _add_rejects_option(p):
    p.add_argument("--rejects", metavar="REJECTS.csv",
                   help="also write the rejected rows of CATALOG to this table (.csv, .ecsv or .fits): row (the "
                        "data row, counted from 0), name, reason, column and value; an empty table when no row is "
                        "rejected. For the in-memory build")


_RV_HELP = "R_V = A_V / E(B-V), a plain number inside the law's range (see 'dustkit laws'; default 3.1)"


def _add_law_options(p):
    p.add_argument("--law", default="ccm89", help="extinction law for reddening -> A_V (default ccm89; see 'dustkit laws')")
    p.add_argument("--rv", type=float, default=3.1, help=_RV_HELP)


def build_parser():
    """The ``dustkit`` argument parser."""
    from . import __version__
    from .model import DENSITY_LIMIT

    parser = _Parser(
        prog=_PROG,
        description="Build interstellar extinction models from star-cluster and field-star catalogues, "
                    "and query them. Extinction estimates are statistical: check them against local data "
                    "before using them for science or instrument time.",
        epilog="example:\n  dustkit demo\n\nRun 'dustkit COMMAND --help' for each command's options.",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"dustkit {__version__}")
    parser.add_argument("--quiet", action="store_true", help="print only errors and warnings; no progress bars")
    parser.add_argument("--debug", action="store_true", help="show the full traceback on errors")
    subs = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    def sub(name, help_text):
        p = subs.add_parser(name, help=help_text, description=help_text, epilog=_EPILOGS[name],
                            formatter_class=argparse.RawDescriptionHelpFormatter)
        _common(p)
        p.set_defaults(func=globals()[f"_cmd_{name}"])
        return p

    p = sub("build", "Build a model from a tracer catalogue and save it as a FITS model file.")
    p.add_argument("catalog", metavar="CATALOG", help="tracer catalogue (CSV, ECSV, FITS table, VOTable, Parquet)")
    p.add_argument("-o", "--output", required=True, metavar="MODEL.fits", help="model file to write")
    grid = _grid_defaults()
    p.add_argument("--nside", type=int, default=None,
                   help=f"HEALPix NSIDE of the sky pixels (power of two; default: the binned model {grid['nside']}, "
                        "the density model 32 for cluster catalogues and finer for dense samples)")
    p.add_argument("--distance-max", type=float, metavar="PC",
                   help=f"last distance edge in pc (default {grid['distance_max']:g})")
    p.add_argument("--distance-step", type=float, metavar="PC",
                   help=f"distance bin width in pc (default {grid['distance_step']:g})")
    p.add_argument("--distance-edges", metavar="E0,E1,...",
                   help="explicit distance edges in pc, comma-separated (instead of --distance-max/--distance-step)")
    p.add_argument("--model", choices=("auto", "density", "binned"), default="auto",
                   help="which model: the 3-D density model, the binned model, or 'auto' (default): density "
                        f"up to {DENSITY_LIMIT} tracers, binned above, for out-of-core builds and with --distance-step")
    _add_law_options(p)
    _add_catalogue_options(p)
    _add_tracer_options(p)
    p.add_argument("--uncertainty", choices=("auto", "monte-carlo", "bin-scatter"), default="auto",
                   help="uncertainty scheme (default auto: from the number of tracers, whatever the storage)")
    p.add_argument("--chunk-size", type=int, metavar="ROWS",
                   help="build out of core, reading ROWS rows at a time (automatic for Parquet or FITS catalogues "
                        "of more than 2 000 000 rows, from their metadata; for catalogues larger than memory, "
                        "with columns l, b, distance, distance_err, av, av_err)")
    p.add_argument("--in-memory", action="store_true",
                   help="read the whole catalogue into memory whatever its size")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="run the out-of-core build on this dask scheduler (e.g. tcp://host:8786; "
                        "default: local threads)")
    p.add_argument("--layer-from", metavar="LAYER.json",
                   help="use this smooth dust layer instead of fitting one to CATALOG (JSON with a0 in mag/kpc, "
                        "h and z_sun in pc and their errors, as 'dustkit layer OTHER_CATALOG --json' writes): "
                        "in a small region where clouds hold much of the dust they lift a layer fitted there")
    _add_rejects_option(p)
    p.add_argument("--overwrite", action="store_true", help="replace MODEL.fits (and the --rejects file) if it exists")

    p = sub("estimate", "Estimate A_V (and A in other bands) for a list of targets from a saved model.")
    p.add_argument("model", metavar="MODEL", help="model file written by 'dustkit build'")
    p.add_argument("targets", metavar="TARGETS", help="table of targets with l/b or ra/dec and a distance")
    p.add_argument("-o", "--output", required=True, metavar="OUT.csv", help="output table (.csv, .ecsv or .fits)")
    p.add_argument("--band", action="append", default=[], metavar="BAND",
                   help="also give A in BAND (repeatable; see 'dustkit bands')")
    p.add_argument("--temperature", metavar="K|COLUMN",
                   help="the targets' stars for the --band extinctions (broad bands depend on the star): a "
                        "temperature in K or a column of TARGETS (default: a column teff, T_eff, logTeff, ... "
                        "if there is one, else an intrinsic colour such as (BP-RP)_0 or bp_rp0, read as a "
                        "blackbody of that colour, else a 5800 K blackbody)")
    p.add_argument("--samples", type=int, default=0, metavar="N",
                   help="also write N posterior draws of A_V per target (N up to 100000; 3-D density models), each "
                        "target's "
                        "distance error drawn in: columns av_samples_1 .. av_samples_N in CSV, one (n, N) "
                        "column in ECSV and FITS")
    _add_catalogue_options(p)
    p.add_argument("--overwrite", action="store_true", help="replace OUT if it exists")

    p = sub("layer", "Fit the smooth exponential dust layer to a tracer catalogue and print it.")
    p.add_argument("catalog", metavar="CATALOG", help="tracer catalogue")
    p.add_argument("--json", action="store_true",
                   help="print JSON with keys a0, a0_err (mag/kpc), h, h_err, z_sun, z_sun_err (pc)")
    _add_law_options(p)
    _add_catalogue_options(p)
    _add_tracer_options(p)
    _add_rejects_option(p)
    p.add_argument("--overwrite", action="store_true", help="replace the --rejects file if it exists")

    p = sub("profile", "Plot cumulative A_V against distance along a sight line.")
    p.add_argument("model", metavar="MODEL", help="model file written by 'dustkit build'")
    p.add_argument("--l", type=float, required=True, metavar="DEG", help="Galactic longitude (deg)")
    p.add_argument("--b", type=float, required=True, metavar="DEG", help="Galactic latitude (deg, -90 to 90)")
    p.add_argument("--radius", type=float, metavar="DEG",
                   help="average over a cone of this radius (deg, above 0 and at most 90)")
    p.add_argument("-o", "--output", required=True, metavar="FIG.png", help="figure file (.png, .pdf, .svg)")
    p.add_argument("--overwrite", action="store_true", help="replace FIG if it exists")

    p = sub("features", "Find dust features: compact clouds in the 3-D density, or steps in A_V along sight lines.")
    p.add_argument("model", metavar="MODEL", help="model file written by 'dustkit build'")
    p.add_argument("-o", "--output", required=True, metavar="OUT.csv", help="feature table (.csv, .ecsv or .fits)")
    p.add_argument("--finder", choices=("auto", "density", "steps"), default="auto",
                   help="'density': over-densities of a 3-D density model; 'steps': steps along each pixel's "
                        "sight line (any model); 'auto' (default): density for a density model, else steps")
    p.add_argument("--min-delta-av", type=float, metavar="MAG",
                   help="least extinction a feature adds, mag (default 0.25 for the density finder, "
                        "0.2 for the steps)")
    # the density finder's own defaults (dustkit.features.MIN_PROBABILITY, MIN_CONTRAST, MIN_DELTA_AV) apply when not given
    p.add_argument("--min-probability", type=float, metavar="P",
                   help="density finder: least posterior probability, from a feature's tracers, of adding "
                        "--min-delta-av, 0 to 1, used as given (default: 1 - RATE / the number of candidate "
                        "regions tested, at least 0.99; see --false-rate)")
    p.add_argument("--false-rate", metavar="RATE",
                   help="density finder: the chance, over the whole search, of listing a region its tracers do "
                        "not support (the look-elsewhere correction of the default --min-probability), above 0 "
                        "and at most 1 (default 0.1); 'off': 0.99 whatever the number of candidates")
    p.add_argument("--min-model-probability", type=float, metavar="P",
                   help="density finder: least posterior probability, from the model's own samples, of adding "
                        "--min-delta-av, 0 to 1 (default 0.75; 0 lists what the tracers alone support)")
    p.add_argument("--min-contrast", type=float, metavar="RATIO",
                   help="density finder: least ratio of a cell's dust density to the smooth layer's, above 1 "
                        "(default 1.3)")
    p.add_argument("--min-significance", type=float, metavar="BIC",
                   help="steps finder: least BIC improvement of a step over no step, >= 0 (default 10)")
    p.add_argument("--radius", type=float, metavar="DEG",
                   help="steps finder: cone radius around each pixel centre (default: adaptive, the smallest cone holding 30 tracers, from one pixel to 6 deg)")
    p.add_argument("--detections", metavar="PIXELS.ecsv", help="steps finder: also write the per-pixel steps")
    p.add_argument("--seed", type=int, metavar="SEED", help="steps finder: seed of the bootstrap resampling, an integer >= 0 (default 0)")
    p.add_argument("--overwrite", action="store_true", help="replace existing output files")

    p = sub("export", "Export a model's binned extinction table (and optionally HEALPix slice maps).")
    p.add_argument("model", metavar="MODEL", help="model file written by 'dustkit build'")
    p.add_argument("-o", "--output", required=True, metavar="TABLE", help="table file (.ecsv, .fits or .csv)")
    p.add_argument("--maps", metavar="MAPS.fits", help="also write HEALPix maps of A_V at every distance edge")
    p.add_argument("--overwrite", action="store_true", help="replace existing output files")

    p = subs.add_parser("fit-clusters", help="Fit E(B-V) and distance of clusters from their members' photometry.",
                        description="Fit E(B-V) and the true distance modulus of clusters from their members' "
                                    "photometry (main-sequence fitting); write a tracer table.",
                        epilog="""examples:
  dustkit fit-clusters members.csv -o clusters.ecsv
  dustkit fit-clusters members.ecsv -o clusters.ecsv --cluster-column cluster --law odonnell94 --rv 3.1
  dustkit fit-clusters one_cluster.csv -o one.ecsv --json

Fits E(B-V) and the true distance modulus mu0 of every cluster from its members' photometry
(U, B, V, Gaia G/BP/RP, 2MASS J/H/Ks, colours like B-V; errors, membership probabilities and
parallaxes when present) against the Pecaut & Mamajek (2013) mean dwarf sequence. The output
has one row per cluster (name, l, b, ebv, ebv_err, mu0, mu0_err, distance_pc, distance_pc_err,
ebv_mu0_corr, ...) and is read by 'dustkit build' as it is. Main-sequence fits are estimates
to check: metallicity and age shift the sequence (0.1-0.3 mag in mu0).""", formatter_class=argparse.RawDescriptionHelpFormatter)
    _common(p)
    p.set_defaults(func=_cmd_fit_clusters)
    p.add_argument("members", metavar="MEMBERS", help="member photometry table (CSV, ECSV, FITS, VOTable, Parquet)")
    p.add_argument("-o", "--output", required=True, metavar="TRACERS.ecsv", help="tracer table to write (.ecsv, .fits or .csv)")
    p.add_argument("--cluster-column", metavar="NAME", help="column naming each star's cluster (default: found, e.g. 'cluster')")
    _add_law_options(p)
    p.add_argument("--json", action="store_true",
                   help="with a single cluster, print one JSON object: ebv, ebv_err, distance_modulus, "
                        "distance_modulus_err (mag), distance_pc, n_members_used")
    p.add_argument("--overwrite", action="store_true", help="replace TRACERS if it exists")

    sub("laws", "List the extinction laws.")
    p = sub("bands", "List the photometric bands and their coefficients for a reference star.")
    p.add_argument("--law", default="ccm89", help="extinction law of the coefficients (default ccm89; see 'dustkit laws')")
    p.add_argument("--rv", type=float, default=3.1, help=_RV_HELP)
    p.add_argument("--temperature", type=float, default=5800.0, metavar="K",
                   help="blackbody temperature of the reference star in K, 2000 to 100000 (default 5800)")
    p.add_argument("--av", type=float, default=0.1, metavar="MAG",
                   help="A_V of the reference star in mag, >= 0 (default 0.1)")

    p = sub("demo", "Run the whole job on the invented demo field and show where everything went.")
    p.add_argument("-o", "--output", "--out", dest="out", default="dustkit_demo_output", metavar="DIR",
                   help="output folder (default ./dustkit_demo_output); -o/--output as in the other commands")
    return parser


# ============================================================================ helpers

class _Out:
    """Printing that respects --quiet; ``say`` puts the library's parameter names into the command's
    options (a read's summary says 'Pass distance_unit=...': the command prints '--distance-unit')."""

    def __init__(self, quiet, notes=True, say=str):
        self.quiet = quiet
        self.notes = notes
        self.say = say

    def note(self, text):
        """A note about the data (rows left out, ...): on stderr, even with --quiet."""
        if self.notes:
            sys.stderr.write(f"note: {_one_line(self.say(text))}\n")

    def __call__(self, *lines):
        if not self.quiet:
            for line in lines:
                print(self.say(line))
        sys.stdout.flush()


def _columns(pairs):
    from .tracers import COLUMN_KEYS

    out = {}
    for item in pairs:
        key, sep, name = item.partition("=")
        key, name = key.strip(), name.strip()
        if sep and key == "name" and not name:  # --column name= : read without names
            out[key] = None
            continue
        if not sep or not key or not name:
            raise _UsageError(f"--column takes KEY=NAME (e.g. --column ebv=EBV). Got {item!r} instead")
        if key not in COLUMN_KEYS:
            raise _UsageError(f"--column key must be one of {', '.join(COLUMN_KEYS)}. Got {key!r} instead")
        out[key] = name
    return out or None


def _check_law(args):
    """--law and --rv: a known law, and an R_V inside that law's range (a usage error, status 2)."""
    from ._lib.validation import check_real
    from .exceptions import LawRangeError
    from .laws import get_law

    law = get_law(args.law)
    check_real("rv", args.rv, 0, 20, low_inclusive=False)
    try:
        law.check_rv(args.rv)
    except LawRangeError as exc:
        raise _UsageError(f"--rv {args.rv:g} does not suit --law {law.name}: {exc}") from None


def _check_output(path, kind, overwrite, option="-o"):
    """An output file name given on the command line: its suffix names a format of ``kind`` ('table',
    'figure', or 'fits' for model and slice-map files) -- else a usage error naming ``option`` (status 2) --,
    its folder exists and it may be written (else the job fails, status 1)."""
    from ._lib.formats import check_target, format_for, suffixes
    from .exceptions import FileFormatError
    from .io import check_fits_path

    try:
        if kind == "fits":
            return check_fits_path(path, overwrite, what="slice-map file" if option == "--maps" else "model file")
        format_for(path, kind)
    except FileFormatError as exc:
        if kind == "fits":
            raise _UsageError(f"{option} {path}: {exc}") from None
        got = "".join(Path(os.fspath(path)).suffixes[-1:]).lower() or "none"
        raise _UsageError(f"{option} {path}: no {kind} format has the suffix {got!r}. "
                          f"Hint: end the name in one of {', '.join(suffixes(kind))}") from None
    return check_target(path, overwrite)


def _grid_defaults():
    """The grid parameters' defaults, from the model's constructor (one list of parameters): nside, pc, pc."""
    from astropy import units as u

    from .model import ExtinctionModel

    d = ExtinctionModel.param_defaults()
    return {"nside": d["nside"], "distance_max": d["distance_max"].to_value(u.pc),
            "distance_step": d["distance_step"].to_value(u.pc)}


def _grid_options(args):
    import numpy as np
    from astropy import units as u

    from ._lib.validation import check_nside, check_real

    kw = {}
    if args.nside is not None:  # each model has its own default (the density model's adapts to the catalogue)
        check_nside(args.nside)
        kw["nside"] = args.nside
    if args.distance_edges is not None:
        if args.distance_max is not None or args.distance_step is not None:
            raise _UsageError("give either --distance-edges or --distance-max/--distance-step, not both")
        try:
            edges = np.array([float(x) for x in args.distance_edges.split(",") if x.strip()])
        except ValueError:
            raise _UsageError(
                f"--distance-edges takes comma-separated distances in pc, e.g. 0,250,500,1000. "
                f"Got {args.distance_edges!r} instead") from None
        from .grid import Grid

        Grid(args.nside or 32, edges)  # validates: increasing, non-negative, at least two
        kw["distance_edges"] = edges * u.pc
    else:
        defaults = _grid_defaults()
        dmax = defaults["distance_max"] if args.distance_max is None else check_real("distance_max", args.distance_max, 0, 1e6,
                                                                       low_inclusive=False)
        step = defaults["distance_step"] if args.distance_step is None else check_real("distance_step", args.distance_step, 0, dmax,
                                                                       low_inclusive=False)
        kw["distance_max"] = dmax * u.pc
        kw["distance_step"] = step * u.pc
        if args.distance_step is not None:  # the binned model's grid: one too large for memory refused before the read
            from .grid import Grid

            Grid.linear(kw["distance_max"], kw["distance_step"], args.nside or defaults["nside"])
    return kw


def _reading_options(args):
    """The reading options of a command (the same for the in-memory and the chunked builds)."""
    from astropy import units as u

    kw = {"distance_unit": args.distance_unit, "distance_modulus_kind": getattr(args, "modulus_kind", None),
          "duplicates": getattr(args, "duplicates", "merge")}
    if getattr(args, "parallax_floor", None) is not None:
        kw["parallax_err_floor"] = args.parallax_floor * u.mas
    if getattr(args, "duplicate_separation", None) is not None:
        kw["duplicate_separation"] = args.duplicate_separation * u.arcsec
    kw.update(_zero_point(args))
    return kw


def _zero_point(args):
    """``parallax_zero_point`` for a reader when the command was given one."""
    from astropy import units as u

    zp = getattr(args, "parallax_zero_point", None)
    return {} if zp is None else {"parallax_zero_point": zp * u.mas}


def _read_tracers(args, path, summary_shown=True):
    """read_tracers with the command's options. Assumptions go into the summary, so when it is
    printed they are not printed again as warning lines (each assumption is said once)."""
    from astropy import units as u

    from .exceptions import AssumptionWarning
    from .tracers import read_tracers

    kw = _reading_options(args)
    if getattr(args, "source_temperature", None) is not None:
        kw["source_temperature"] = args.source_temperature * u.K
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        tracers = read_tracers(path, columns=_columns(args.column), law=args.law, rv=args.rv, **kw)
    said = set(tracers.meta.get("assumptions", [])) if summary_shown and not getattr(args, "quiet", False) else set()
    for w in record:
        if issubclass(w.category, AssumptionWarning) and str(w.message) in said:
            continue
        warnings.showwarning(w.message, w.category, w.filename, w.lineno)
    return tracers


def _check_rejects(args, output=None):
    """--rejects: a table name (usage error otherwise), not the catalogue read nor the -o file, writable (before any work)."""
    if not getattr(args, "rejects", None):
        return
    _check_output(args.rejects, "table", args.overwrite, option="--rejects")
    if output is not None:
        _refuse_same_file(output, args.rejects, "--rejects", "the rejected rows would replace the model",
                          "rejects.csv")
    if _same_file(args.rejects, args.catalog):
        raise _UsageError(f"--rejects names the catalogue being read ({args.catalog!r}): the rejected rows would "
                          "replace it. Hint: give them a name of their own, e.g. --rejects rejects.csv")


def _write_rejects(tracers, args):
    """Write the rejected rows of a read (``TracerSet.rejected``: row, name, reason, column, value) to the
    --rejects file, atomically (an empty table with the same columns when none was rejected); return what was done."""
    from .io import write_table

    table = tracers.rejected.copy(copy_data=False)
    table.meta["catalogue"] = str(args.catalog)
    table.meta["n_input_rows"] = int(tracers.meta["n_input"])
    path = write_table(table, args.rejects, overwrite=args.overwrite)
    columns = ", ".join(table.colnames)
    if not len(table):
        return f"No row of {args.catalog} was rejected: wrote an empty table (columns {columns}) to {path}"
    return (f"Wrote the {len(table)} rejected row{'s' if len(table) > 1 else ''} of {args.catalog} to {path} "
            f"(columns {columns}; row counts the data rows from 0)")


def _given_layer_file(path):
    """The layer of a JSON file (``dustkit layer --json``), with a clear error for a bad file."""
    from .layer import DustLayer

    try:
        values = json.loads(Path(path).read_text())
    except FileNotFoundError:
        raise _UsageError(f"--layer-from: no file {path}") from None
    except (OSError, ValueError) as exc:
        raise _UsageError(f"--layer-from: {path} is not a JSON file ({_one_line(exc)}); "
                          "write one with 'dustkit layer CATALOG --json > layer.json'") from None
    return DustLayer.from_dict(values)


def _layer_lines(layer, given=None):
    how = f"given in {given}, not fitted" if given else "robust fit to the tracers"
    none = bool(getattr(layer, "no_dust", False))
    held = f"NOT FITTED: reference value, the tracers {'show no dust' if none else 'cannot fix it'}; "
    flat = set(getattr(layer, "not_fitted", ()))
    return [
        f"Dust layer (exponential in height, {how}):",
        f"  a0     = {layer.a0:.3f} +- {layer.a0_err:.3f} mag/kpc   (mid-plane A_V per kpc"
        + (f"; no dust detected: below {layer.a0 + 2 * layer.a0_err:.3f} at 2 sigma)" if none else ")"),
        f"  h      = {layer.h:.1f} +- {layer.h_err:.1f} pc        ({held if 'h' in flat else ''}scale height)",
        f"  z_sun  = {layer.z_sun:.1f} +- {layer.z_sun_err:.1f} pc        "
        f"({held if 'z_sun' in flat else ''}height of the Sun above the mid-plane)",
    ] + ([] if given else [f"  scatter of tracers around it: {layer.scatter:.3f} mag (from {layer.n_used} tracers)"]) + ([f"  the errors include the pull of dust above the layer (clouds): a0 {abs(pull[0]):.3f} mag/kpc, "
          f"h {abs(pull[1]):.1f} pc, z_sun {abs(pull[2]):.1f} pc"] if any(pull := [float(x) for x in layer.pull]) else [])


def _false_rate(text):
    """--false-rate: a number (its range is the library's check, dustkit.features.density_features), or
    'off' (no look-elsewhere correction)."""
    if text.strip().lower() in ("off", "none"):
        return None
    try:
        return float(text)
    except ValueError:
        raise _UsageError(f"--false-rate takes a number above 0 and at most 1 (0.1, say) or 'off'; got {text!r}") from None


def _quiet_flag(args):
    return True if args.quiet else None


def _save_figure(fig, path, overwrite):
    """Write a figure atomically, with the figure suffixes of the format registry."""
    from ._lib.formats import atomic_write, format_for
    from .exceptions import FileFormatError

    try:
        fmt = format_for(path, "figure")
    except FileFormatError as exc:  # a bad option value: usage error, as for other options
        raise _UsageError(str(exc).rstrip(".")) from None
    return atomic_write(path, lambda tmp: fig.savefig(tmp, format=fmt, dpi=150), overwrite, what="figure")


def _profile_figure(model, l_deg, b_deg, radius_deg=None):
    """A sight-line figure: dustkit.plotting.plot_profile when available, else a plain plot."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from astropy import units as u

    radius = None if radius_deg is None else radius_deg * u.deg
    try:
        from .plotting import plot_profile
    except ImportError:
        plot_profile = None
    if plot_profile is not None:
        ax = plot_profile(model, l_deg * u.deg, b_deg * u.deg, radius=radius)
        return ax.figure
    prof = model.profile(l_deg * u.deg, b_deg * u.deg, radius=radius)
    fig, ax = plt.subplots(figsize=(6.4, 4.2), layout="constrained")
    d = prof["distance"].to_value(u.pc)
    a = prof["av"].to_value(u.mag)
    e = prof["av_err"].to_value(u.mag)
    ax.fill_between(d, a - e, a + e, alpha=0.3, label="1-sigma")
    ax.plot(d, a, label="model")
    ax.plot(d, prof["av_layer"].to_value(u.mag), ls="--", label="smooth layer")
    ax.set_xlabel("Distance [pc]")
    ax.set_ylabel("A_V [mag]")
    ax.set_title(f"l = {l_deg:g} deg, b = {b_deg:g} deg" + (f", radius {radius_deg:g} deg" if radius_deg else ""))
    ax.legend()
    return fig


def _sky_figure(model, distance_pc):
    """A sky map at one distance if dustkit.plotting provides plot_sky, else None."""
    import matplotlib

    matplotlib.use("Agg")
    from astropy import units as u

    try:
        from .plotting import plot_sky
    except ImportError:
        return None
    ax = plot_sky(model, distance_pc * u.pc)
    return ax.figure


# ============================================================================ commands

def _cmd_build(args, out):
    from .io import save_model
    from .model import CAUTION

    kw = _grid_options(args)
    _check_law(args)
    columns = _columns(args.column)
    _check_output(args.output, "fits", args.overwrite)  # fail before a long build, not after
    if getattr(args, "layer_from", None):
        kw["layer"] = _given_layer_file(args.layer_from)
    from .scale import build_path

    if getattr(args, "in_memory", False) and (args.chunk_size is not None or args.scheduler):
        raise _UsageError("--in-memory reads the whole catalogue at once; --chunk-size and --scheduler are for the "
                          "out-of-core build. Hint: give one or the other")
    path_kind = "memory" if getattr(args, "in_memory", False) else build_path(args.catalog, args.chunk_size, args.scheduler)
    if path_kind == "chunked" and getattr(args, "rejects", None):
        raise _UsageError("--rejects lists every rejected row, which the out-of-core build (a catalogue this "
                          "large, --chunk-size or --scheduler) does not keep: it counts them by reason only. "
                          "Hint: add --in-memory to read the catalogue at once, or drop --rejects")
    _check_rejects(args, output=args.output)
    if path_kind == "chunked":
        if getattr(args, "uncertainty", "auto") == "monte-carlo":
            raise _UsageError("--uncertainty monte-carlo needs the in-memory build; add --in-memory")
        if getattr(args, "source_temperature", None) is not None:
            raise _UsageError("--source-temperature applies to the in-memory build (the out-of-core build does not "
                              "take one); add --in-memory")
        if args.model == "density":
            raise _UsageError("the out-of-core build (a catalogue this large, --chunk-size or --scheduler) makes "
                              "the binned model; drop --model density or add --in-memory")
        model = _build_out_of_core(args, kw, columns, out)
    else:
        from .model import DENSITY_LIMIT, build_model, choose_model

        tracers = _read_tracers(args, args.catalog)
        if not out.quiet:  # the summary (sky area, medians: 0.2 s at 10^6 tracers) only when it is printed
            out(tracers.summary(), "")
        if getattr(args, "rejects", None):  # before the build: the rows are there if the build fails
            out(_write_rejects(tracers, args), "")
        if columns:
            out(f"Column mapping given: {columns}")
        kind = choose_model(len(tracers), args.model)
        why = "" if args.model != "auto" else (" (chosen for a catalogue of this size: the 3-D density model up to "
                                               f"{DENSITY_LIMIT} tracers, the binned model above)")
        if args.model == "auto" and args.distance_step is not None:
            kind, why = "binned", " (--distance-step asks for the binned model's fixed bins)"
        out(f"Building the {kind} model from {len(tracers)} tracers in memory{why} ...")
        if kind == "density":
            kw = {k: v for k, v in kw.items() if k != "distance_step"}
            if args.distance_step is not None:
                raise _UsageError("--distance-step applies to the binned model; the density model's bins grow "
                                  "with distance (give --distance-edges for your own)")
            if getattr(args, "uncertainty", "auto") != "auto":
                raise _UsageError(f"--uncertainty {args.uncertainty} applies to the binned model; the density "
                                  "model's errors come from its posterior draws (add --model binned)")
        if kind == "binned":
            kw["uncertainty"] = getattr(args, "uncertainty", "auto")
        model = build_model(tracers, kind, **kw, quiet=_quiet_flag(args))
    out(*_layer_lines(model.layer_, given=getattr(args, "layer_from", None)))  # a lifted layer: the fit warns
    g = model.grid_
    if hasattr(model, "amplitude_"):
        rep = model.build_report_
        out(f"Model: 3-D log-normal density on {len(model.active_pixels_)} pixels of {g.pixel_area.value:.2f} deg^2 "
            f"x {g.n_bins} distance bins ({g.distance_edges[0]:g}..{g.distance_edges[-1]:g} pc); chosen by "
            f"spatially blocked cross-validation: amplitude {model.amplitude_:g}, correlation length "
            f"{model.length_:.0f} pc, unresolved fraction {model.tau_:.3f}"
            + (f" (learned on a random {rep['tracers_for_hyperparameters']} of the {rep['n_tracers']} tracers; "
               "the final fit uses them all)" if rep.get("tracers_for_hyperparameters", rep["n_tracers"])
               < rep["n_tracers"] else "")
            + f"; {rep['duplicate_groups']} groups of "
            f"near-duplicate tracers counted once; {rep['censored']} tracers beyond the grid used as bounds"
            + ("." if rep.get("layer_given") else f"; {rep['pull_left']:.2f} of the clouds' pull on the layer left "
               "in the answers' errors (as the tracers show it)."))
    else:
        out(f"Model: {g.npix} pixels of {g.pixel_area.value:.2f} deg^2 x {g.n_bins} distance bins "
            f"({g.distance_edges[0]:g}..{g.distance_edges[-1]:g} pc); {len(model.informed_pixels())} pixels "
            f"informed by tracers; sky smoothing {model.sky_passes_} passes; uncertainty "
            f"'{model.uncertainty_scheme_}'; {getattr(model, 'build_report_', {}).get('beyond_grid', 0)} tracers "
            f"beyond the grid left out (bounds only).")
    path = save_model(model, args.output, overwrite=args.overwrite)
    out(f"Wrote the model to {path}", f"Caution: {CAUTION}")
    return 0


def _build_out_of_core(args, kw, columns, out):
    """The chunked (dask) build of ``dustkit build`` for a Parquet folder or --chunk-size."""
    from .scale import build_from_parquet

    chunk = 1_000_000 if args.chunk_size is None else args.chunk_size
    if chunk < 1:
        raise _UsageError(f"--chunk-size must be a positive number of rows. Got {chunk} instead")
    out(f"Building out of core from {args.catalog} in chunks of {chunk} rows (NSIDE {args.nside or _grid_defaults()['nside']}) ...")
    client = None
    if args.scheduler:
        from distributed import Client

        client = Client(args.scheduler, timeout="20s")
        out(f"Using the dask scheduler at {args.scheduler}")
    try:
        model = build_from_parquet(args.catalog, columns=columns or None, chunk_size=chunk, law=args.law,
                                   rv=args.rv, client=client, quiet=_quiet_flag(args), **_reading_options(args), **kw)
    finally:
        if client is not None:
            client.close()
    info = model.build_info_
    out(f"Read {info['n_rows']} rows in {info['n_chunks']} chunks (out of core): {info['n_used']} tracers used, "
        f"{info['n_rejected']} rejected, {info['n_merged']} merged as duplicates.")
    for reason, count in info["rejected_by_reason"].items():
        out(f"  {count:>10}  {reason}")
    return model


def _cmd_estimate(args, out):
    import numpy as np
    from astropy import units as u

    from .answers import CAUTION, UNITLESS_COLUMNS, estimate_columns, estimate_targets
    from .bands import get_band
    from .exceptions import RowsRejectedWarning
    from .io import load_model, write_table
    from .tracers import read_targets

    bands = list(dict.fromkeys(args.band))
    for band in bands:
        get_band(band)
    columns = _columns(args.column)
    _check_output(args.output, "table", args.overwrite)
    model = load_model(args.model)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RowsRejectedWarning)  # reported below, with the rows
        targets = read_targets(args.targets, columns=columns, distance_unit=args.distance_unit,
                               distance_modulus_kind=getattr(args, "modulus_kind", None), **_zero_point(args))
    temperature = getattr(args, "temperature", None)
    if temperature is not None:
        try:
            temperature = float(temperature) * u.K
        except ValueError:
            pass  # a column name
    table = estimate_targets(model, targets, bands=bands, samples=args.samples, temperature=temperature)
    band_temperature = table.meta.get("band_temperature")
    table.meta["model"] = str(args.model)
    names = estimate_columns(model, bands, args.samples)
    rej = targets.rejected
    table.meta.pop("rejected_by_reason")
    table.meta.pop("band_temperature_rejected", None)  # named in a warning, counted in band_temperature
    n_ok = table.meta.pop("n_estimated")
    n_far = table.meta.pop("n_beyond_grid")
    path = write_table(table, args.output, overwrite=args.overwrite)
    n = len(table)
    n_bad = n - n_ok
    out(f"Estimated extinction for {n_ok} of {n} targets with the model {args.model} "
        f"(law {model.law!r}, R_V = {model.rv:g}).")
    if n_bad:
        reasons, counts = np.unique(np.asarray(rej["reason"]), return_counts=True)
        why = "; ".join(f"{c} {r}" for r, c in zip(reasons, counts))
        rows = ", ".join(f"row {int(r)} ({nm})" for r, nm in zip(rej["row"][:5], rej["name"][:5]))
        msg = (f"{n_bad} of {n} targets have no usable position or distance and keep empty (NaN) "
               f"extinction values: {why} [{rows}{', ...' if n_bad > 5 else ''}]")
        out.note(msg)
    unitless = [c for c in names if c in UNITLESS_COLUMNS]
    added = ", ".join(c for c in names if c not in unitless) + " in mag"
    added += f"; {', '.join(unitless)}" if unitless else ""
    out(f"Wrote {path} (every input column plus {added})", f"Caution: {CAUTION}")
    if band_temperature is not None:
        out.note(f"Band extinctions ({', '.join(bands)}) are for {band_temperature}: a "
                 "broad band's A/A_V depends on the star (Gaia G by up to 30%). Hint: --temperature K or COLUMN.")
    if "prior_only" in names and n_ok:
        n_prior = int(np.sum(np.asarray(table["prior_only"].filled(False))))
        if n_prior:
            out.note(f"{n_prior} of {n_ok} targets are answered by the prior alone (prior_only: tracers barely inform "
                     "them; their av_err is the prior's spread). Hint: check them against local data first.")
    if n_far:
        out.note(f"{n_far} of {n_ok} targets lie beyond the model's last distance edge "
                 f"({model.grid_.distance_edges[-1]:g} pc): their answers carry the fitted smooth layer on from "
                 "there, with growing errors, and no tracer informs them. Hint: build the model with a larger "
                 "distance_max if the tracers reach that far.")
    return 0


def _cmd_layer(args, out):
    from .density import catalogue_lift, fit_catalogue_layer
    from .exceptions import DustkitWarning
    from .layer_lift import lift_caution

    _check_law(args)
    _check_rejects(args)
    tracers = _read_tracers(args, args.catalog, summary_shown=not args.json)
    if not args.json:
        out(tracers.summary(), "")
    if getattr(args, "rejects", None):  # before the fit: the rows are there if it fails
        said = _write_rejects(tracers, args)
        if not args.json:
            out(said, "")
        elif not out.quiet:  # stdout holds the JSON alone
            out.note(said)
    layer = fit_catalogue_layer(tracers)  # as the density model fits it: errors summed over sky blocks, and the pull
    lift = catalogue_lift(tracers, layer)  # at the distances the layer was fitted at, as the build says it
    if lift["lifted"]:  # a warning on stderr: also with --json (the layer a later --layer-from takes) and --quiet
        warnings.warn(lift_caution(lift), DustkitWarning, stacklevel=2)
    if args.json:
        d = layer.as_dict()
        values = {k: float(d[k]) for k in ("a0", "a0_err", "h", "h_err", "z_sun", "z_sun_err")}
        if layer.not_fitted:  # h, z_sun held at reference values: said, and kept by --layer-from
            values["not_fitted"] = list(layer.not_fitted)
        print(json.dumps(values, indent=1))
        return 0
    print("\n".join(_layer_lines(layer)))  # the command's answer: printed with --quiet too, as --json is
    return 0


def _cmd_profile(args, out):
    import numpy as np

    from ._lib.validation import check_real
    from .io import load_model

    check_real("b", args.b, -90, 90)
    check_real("l", args.l, -360, 720)
    if args.radius is not None:
        check_real("radius", args.radius, 0, 90, low_inclusive=False)
    _check_output(args.output, "figure", args.overwrite)  # before the model is read and the figure drawn
    model = load_model(args.model)
    fig = _profile_figure(model, args.l, args.b, args.radius)
    path = _save_figure(fig, args.output, args.overwrite)
    from astropy import units as u

    prof = model.profile(args.l * u.deg, args.b * u.deg, radius=None if args.radius is None else args.radius * u.deg)
    e = model.grid_.distance_edges
    want = np.unique(np.linspace(0, e[-1], 7)[1:])
    out(f"A_V toward l = {args.l:g} deg, b = {args.b:g} deg" + (f" (cone radius {args.radius:g} deg)" if args.radius else "") + ":")
    d = prof["distance"].to_value(u.pc)
    for w in want:
        k = int(np.argmin(np.abs(d - w)))
        out(f"  {d[k]:7.0f} pc   A_V = {prof['av'][k].value:6.2f} +- {prof['av_err'][k].value:.2f} mag")
    out(f"Wrote {path}")
    return 0


def _same_file(a, b):
    """True when two names given on the command line name one file."""
    return os.path.abspath(os.path.expanduser(a)) == os.path.abspath(os.path.expanduser(b))


def _refuse_same_file(output, other, option, loss, example):
    """A usage error when ``other`` (the file of ``option``) is the -o file: one write would replace the other."""
    if _same_file(other, output):
        raise _UsageError(f"-o and {option} name the same file ({output!r}): {loss}. Hint: give them a name of "
                          f"their own, e.g. {option} {example}")


def _cmd_export(args, out):
    from .io import export_table, load_model, write_slice_maps

    _check_output(args.output, "table", args.overwrite)
    if args.maps:
        _check_output(args.maps, "fits", args.overwrite, option="--maps")
        _refuse_same_file(args.output, args.maps, "--maps", "the maps would replace the table", "slices.fits")
    model = load_model(args.model)
    path = export_table(model, args.output, overwrite=args.overwrite)
    g = model.grid_
    out(f"Wrote {path} ({len(model.informed_pixels())} informed pixels x {g.n_bins} distance bins)")
    if args.maps:
        mpath = write_slice_maps(model, args.maps, overwrite=args.overwrite)
        out(f"Wrote {mpath} ({g.n_edges} HEALPix maps of A_V, NSIDE {g.nside}, {g.ordering.upper()}, "
            f"Galactic; then {g.n_edges} error maps; uninformed pixels are UNSEEN)")
    return 0


def _cmd_features(args, out):
    from astropy import units as u

    from ._lib.validation import check_real
    from .features import KIND_NEARER, density_features, detect_features
    from .io import load_model, write_table

    # each finder keeps its own default least step unless one is given
    given_dav = {} if args.min_delta_av is None else {"min_delta_av": args.min_delta_av * u.mag}
    if given_dav:
        check_real("min_delta_av", args.min_delta_av, 0, 100)
    if args.radius is not None:
        check_real("radius", args.radius, 0, 90, low_inclusive=False)
    for path, option in ((args.output, "-o"), (args.detections, "--detections")):
        if path:
            _check_output(path, "table", args.overwrite, option)
    if args.detections:
        _refuse_same_file(args.output, args.detections, "--detections",
                          "the per-pixel steps would replace the feature table", "pixels.ecsv")
    model = load_model(args.model)
    has_density = hasattr(model, "samples_")
    finder = args.finder if args.finder != "auto" else ("density" if has_density else "steps")
    if finder == "density":
        if not has_density:
            raise _UsageError("--finder density needs a 3-D density model (build with --model density); "
                              "use --finder steps for a binned model")
        steps_only = [o for o, v in (("--radius", args.radius), ("--detections", args.detections),
                                     ("--min-significance", args.min_significance), ("--seed", args.seed)) if v is not None]
        if steps_only:
            raise _UsageError(f"{', '.join(steps_only)} appl{'ies' if len(steps_only) == 1 else 'y'} to --finder steps; the density finder searches the "
                              "model's own cells (its options: --min-probability, --false-rate, "
                              "--min-model-probability, --min-contrast)")
        if args.false_rate is not None and args.min_probability is not None:
            raise _UsageError("give --min-probability (a threshold used as given) or --false-rate (the look-elsewhere "
                              "correction of the default threshold), not both")
        given = {k: v for k, v in (("min_contrast", args.min_contrast), ("min_probability", args.min_probability),
                                   ("min_model_probability", args.min_model_probability)) if v is not None} | given_dav
        if args.false_rate is not None:
            given["false_rate"] = _false_rate(args.false_rate)
        feats = density_features(model, quiet=_quiet_flag(args), **given)
        path = write_table(feats, args.output, overwrite=args.overwrite)
        meta = feats.meta
        why = (f"the look-elsewhere cut max(0.99, 1 - {meta['false_rate']:g} / {meta['n_candidates']})"
               if meta["false_rate"] else "as given")
        out(f"{len(feats)} dust feature(s) in the 3-D density ({meta['n_candidates']} candidate region(s) "
            f"tested against their tracers; least probability {meta['min_probability']:.4g}, {why})"
            + (":" if len(feats) else "."))
        if not len(feats):
            improbable = meta["n_candidates"] - meta["n_unsupported"] - meta["n_model_doubts"]
            out(f"No feature listed: of {meta['n_candidates']} candidate region(s), {meta['n_unsupported']} shown by "
                f"fewer than {meta['min_support']} tracers ({meta['min_support_nearer']} for 'nearer than'), "
                f"{meta['n_model_doubts']} below the model's own probability "
                f"{meta['min_model_probability']:g} (--min-model-probability), {improbable} below the tracers' "
                f"probability {meta['min_probability']:.4g} (--min-probability, --false-rate) of adding "
                f"{meta['min_delta_av']:g} mag. The table has the columns and no rows.")
        for r in feats:
            if r["kind"] == KIND_NEARER:
                where = (f"nearer than {r['distance_upper'].value:6.0f} pc (fewer than "
                         f"{feats.meta['min_front']} tracers in front)")
            else:
                where = f"distance {r['distance'].value:6.0f} +- {r['distance_err'].value:.0f} pc"
            out(f"  #{r['feature']}: l = {r['l'].value:7.2f} deg, b = {r['b'].value:+6.2f} deg, extent "
                f"{r['extent'].value:.1f} deg, {where}, delta A_V {r['delta_av'].value:.2f} +- "
                f"{r['delta_av_err'].value:.2f} mag, tracers {r['n_front']} in front, {r['n_behind']} behind, "
                f"probability {r['significance']:.3f}")
        out(f"Wrote {path}")
        out("Distances and depths are the model's: it resolves dust in depth only to its "
            f"{feats.meta['resolution']} and the tracers' distance errors.")
        out(feats.meta["caution"])
        return 0
    density_only = [o for o, v in (("--min-probability", args.min_probability), ("--min-contrast", args.min_contrast),
                                   ("--min-model-probability", args.min_model_probability),
                                   ("--false-rate", args.false_rate)) if v is not None]
    if density_only:
        raise _UsageError(f"{', '.join(density_only)} appl{'ies' if len(density_only) == 1 else 'y'} to the density finder of a 3-D density model; the steps "
                          "finder's options are --min-significance, --radius, --seed"
                          + ("" if has_density else " (this model is binned: build with --model density)"))
    feats, det = detect_features(
        model, radius=None if args.radius is None else args.radius * u.deg,
        **{k: v for k, v in (("min_significance", args.min_significance), ("random_state", args.seed)) if v is not None},
        quiet=_quiet_flag(args),
        return_detections=True, **given_dav)
    path = write_table(feats, args.output, overwrite=args.overwrite)
    out(f"{len(feats)} dust feature(s) from {len(det)} pixel step(s) in {feats.meta['n_pixels_searched']} pixels "
        "searched" + (":" if len(feats) else
                      f". No step passed: at least {feats.meta['min_delta_av']:g} mag (--min-delta-av), a BIC "
                      f"improvement of at least {feats.meta['min_significance']:g} (--min-significance), "
                      f"{feats.meta['min_tracers']} tracers on each side, found again in "
                      f"{feats.meta['min_boot_fraction']:.0%} of bootstrap resamples. The table has the columns "
                      "and no rows."))
    for r in feats:
        out(f"  #{r['feature']}: l = {r['l'].value:7.2f} deg, b = {r['b'].value:+6.2f} deg, extent {r['extent'].value:.1f} deg, "
            f"distance {r['distance'].value:6.0f} +- {r['distance_err'].value:.0f} pc, "
            f"delta A_V {r['delta_av'].value:.2f} +- {r['delta_av_err'].value:.2f} mag ({r['n_pixels']} pixels)")
    out(f"Wrote {path}")
    if args.detections:
        out(f"Wrote {write_table(det, args.detections, overwrite=args.overwrite)}")
    out(feats.meta["caution"])
    return 0


def _cmd_fit_clusters(args, out):
    """dustkit fit-clusters: member photometry -> one tracer row per cluster."""
    from .clusters import CAUTION as CLUSTER_CAUTION
    from .clusters import fit_clusters
    from .exceptions import CatalogError
    from .io import write_table
    from .tracers import SUFFIX_FORMATS

    _check_law(args)
    _check_output(args.output, "table", args.overwrite)  # before the fits, not after them
    path = Path(args.members).expanduser()
    if not path.is_file():
        raise FileNotFoundError(f"No members table at '{path}'. Hint: check the path.")
    name = path.name.lower()
    fmt = next((f for suf, f in sorted(SUFFIX_FORMATS.items(), key=lambda kv: -len(kv[0])) if name.endswith(suf)), None)
    from astropy.table import Table

    members = Table.read(path, format=fmt) if fmt else Table.read(path)
    table, fits = fit_clusters(members, cluster_column=args.cluster_column, law=args.law, rv=args.rv,
                               quiet=_quiet_flag(args), return_fits=True)
    if args.json and len(table) != 1:
        raise _UsageError(f"--json needs a members table with a single cluster; this one has {len(table)}")
    fit = next(iter(fits.values()), None)
    if args.json and fit is None:  # the data, not the command line: status 1, and no table
        raise CatalogError(f"The cluster {table['name'][0]} could not be fitted, so there is no JSON to print "
                           f"and nothing was written: {table['flags'][0]}")
    written = write_table(table, args.output, overwrite=args.overwrite)
    if args.json:
        print(json.dumps({"ebv": fit.ebv, "ebv_err": fit.ebv_err, "distance_modulus": fit.distance_modulus,
                          "distance_modulus_err": fit.distance_modulus_err,
                          "distance_pc": float(fit.distance.to_value("pc")), "n_members_used": fit.n_members_used}))
        return 0
    for row in table:
        if str(row["flags"]).startswith("failed"):
            out.note(f"{row['name']}: {row['flags']}")
            continue
        out(f"{row['name']:<16s} E(B-V) = {row['ebv']:.3f} +- {row['ebv_err']:.3f} mag   "
            f"mu0 = {row['mu0']:.2f} +- {row['mu0_err']:.2f} mag ({row['distance_pc']:.0f} pc)   "
            f"{row['n_members_used']} members" + (f"   [{row['flags']}]" if row["flags"] else ""))
    out(f"Wrote {len(table)} cluster(s) to {written}", f"Caution: {CLUSTER_CAUTION}")
    return 0


def _cmd_laws(args, out):
    from .laws import list_laws

    t = list_laws()
    show = t[[c for c in ("name", "title", "rv_min", "rv_max", "wavelength_min", "wavelength_max", "notes") if c in t.colnames]]
    print("\n".join(show.pformat(max_lines=-1, max_width=-1)))
    if "citation" in t.colnames:
        print("\nCitations:")
        for row in t:
            print(f"  {row['name']}: {row['citation']}")
    return 0


def _cmd_bands(args, out):
    import astropy.units as u
    from astropy.table import Table

    from .bands import band_table

    _check_law(args)
    t = band_table(args.law, args.rv, temperature=args.temperature * u.K, av=args.av)
    shown = Table()
    shown["band"] = t["name"]
    shown["system"] = t["system"]
    shown["wavelength [micron]"] = [f"{w:.4f}" for w in t["reference_wavelength"].to_value(u.micron)]
    shown["A/A_V"] = ["outside law" if k != k else f"{k:.4f}" for k in t["coefficient"]]
    shown["transmission curve"] = t["curve"]
    for name in ("band", "system", "transmission curve"):
        shown[name].format = "<"
    print("\n".join(shown.pformat(max_lines=-1, max_width=-1)))
    print(f"\nReference star: a {args.temperature:g} K blackbody behind A_V = {args.av:g} mag, law "
          f"{t.meta['law']} with R_V = {t.meta['rv']:g}. 'wavelength' is the star's photon-weighted mean "
          "wavelength in the band (the effective wavelength for bands without a curve).")
    print("Bands without a transmission curve use the law at their effective wavelength "
          "(monochromatic): " + ", ".join(n for n, c in zip(t["name"], t["curve"]) if c.startswith("none")) + ".")
    print("E(B-V) is the nominal reddening A_V / R_V under every law. Coefficients are statistical: "
          "check them against local data before using them for science or instrument time.")
    return 0


def _demo_data_dir():
    """The packaged demo files (dustkit/data), falling back to a source tree's data_demo/."""
    here = Path(__file__).resolve().parent
    for folder in (here / "data", here.parent / "data_demo"):
        if all((folder / f).is_file() for f in _DEMO_FILES):
            return folder
    raise FileNotFoundError(
        f"The demo data ({', '.join(_DEMO_FILES)}) are missing from {here / 'data'}. "
        "Hint: reinstall dustkit, or run 'python data_demo/make_demo.py' in a source checkout."
    )


def _cmd_demo(args, out):
    import time

    import numpy as np
    from astropy import units as u

    from .density import fit_catalogue_layer
    from .io import export_table, save_model, write_slice_maps, write_table
    from .model import CAUTION, build_model
    from .tracers import read_tracers

    t_start = time.perf_counter()
    data = _demo_data_dir()
    folder = Path(args.out).expanduser()
    folder.mkdir(parents=True, exist_ok=True)
    field = json.loads((data / "veyra_field.json").read_text())
    written = []

    out("dustkit demo: the Veyra Field, an invented survey field (l = 20..80 deg, |b| < 10 deg) with 400 "
        "invented clusters. Nothing here is a real object.", "")
    out(f"1. Reading the cluster catalogue {data / 'veyra_clusters.csv'}")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the summary below reports the rejected rows and assumptions
        tracers = read_tracers(data / "veyra_clusters.csv")
    out(tracers.summary())
    if len(tracers.rejected):
        out("   Rejected rows (kept out of the model, reported here):")
        for line in tracers.rejected.pformat(max_lines=-1, max_width=-1):
            out("     " + line)
    out("")

    out("2. Fitting the smooth dust layer")
    layer = fit_catalogue_layer(tracers)
    out(*("   " + s for s in _layer_lines(layer)))
    truth = field["layer"]
    out(f"   (the invented truth: a0 = {truth['a0']} mag/kpc, h = {truth['h']} pc, z_sun = {truth['z_sun']} pc;",
        f"    its {len(field['clouds'])} clouds in a small region lift the fitted layer by more than its errors say: read it as",
        "    the smooth part of this catalogue's dust, clouds' outskirts included; for a real region, a layer",
        "    fitted to a wider catalogue avoids it: dustkit layer WIDE.csv --json > layer.json, then",
        "    dustkit build REGION.csv -o model.fits --layer-from layer.json)", "")

    import inspect

    from .density import DensityModel

    default_max = inspect.signature(DensityModel).parameters["distance_max"].default.to_value(u.kpc)
    out("3. Building the 3-D density model (NSIDE 32, the default for a catalogue of this size; out to 5 kpc, "
        f"about as far as the clusters reach, instead of the default {default_max:g} kpc)")
    model = build_model(tracers, nside=32, distance_max=5000 * u.pc, quiet=_quiet_flag(args))
    rep = model.build_report_
    out(f"   chosen by spatially blocked cross-validation: log-density amplitude {model.amplitude_:g}, "
        f"correlation length {model.length_:.0f} pc; {rep['boosted_pixels']} pixels with a raised amplitude "
        f"where held-out clusters missed ({rep['error_boosted_pixels']} of them beyond noise, in the errors; "
        f"the errors' background amplitude {rep['error_amplitude']:.3g}); "
        f"{rep['pull_left']:.2f} of the layer's pull left in the errors; "
        f"built in {rep['seconds']:.0f} s on {rep['threads']} thread(s)")
    written.append(("model file", save_model(model, folder / "veyra_model.fits", overwrite=True)))
    written.append(("binned table (ECSV, units kept)", export_table(model, folder / "veyra_table.ecsv", overwrite=True)))
    written.append(("binned table (CSV, for spreadsheets)", export_table(model, folder / "veyra_table.csv", overwrite=True)))
    written.append(("HEALPix slice maps", write_slice_maps(model, folder / "veyra_slices.fits", overwrite=True)))
    out("")

    out("4. Estimating extinction for the target list")
    est = argparse.Namespace(model=str(folder / "veyra_model.fits"), targets=str(data / "veyra_targets.csv"),
                             output=str(folder / "veyra_targets_av.csv"), band=["J", "Ks"], column=[],
                             distance_unit=None, overwrite=True, quiet=True, samples=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        _cmd_estimate(est, _Out(True, notes=False))  # the listing below shows the row left empty
    from astropy.table import Table

    res = Table.read(folder / "veyra_targets_av.csv", format="ascii.csv")
    written.append(("target estimates", folder / "veyra_targets_av.csv"))
    dist = np.asarray(res["dist_kpc"].filled(np.nan) if hasattr(res["dist_kpc"], "filled") else res["dist_kpc"], float)
    for row, dk in zip(res, dist):
        if np.isfinite(row["av"]):
            prior = "prior_only" in res.colnames and str(row["prior_only"]) == "True"
            out(f"   {row['target']:<8s} {dk:5.2f} kpc  A_V = {row['av']:5.2f} +- {row['av_err']:.2f} mag   "
                f"A_Ks = {row['a_Ks']:.2f} mag" + ("   (the prior alone: tracers barely inform it)" if prior else ""))
        else:
            out(f"   {row['target']:<8s}   (no distance: left empty)")
    # the field is invented, so the truth is known: how well does the model recover it?
    from .simulate import Cloud, DustField
    from .tracers import read_targets

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tg = read_targets(data / "veyra_targets.csv")
    dust = DustField(a0=truth["a0"], h=truth["h"], z_sun=truth["z_sun"],
                     clouds=tuple(Cloud(**c) for c in field["clouds"].values()))
    ok = np.asarray(tg.valid)
    true_av = dust.av(np.asarray(tg.l)[ok], np.asarray(tg.b)[ok], np.asarray(tg.distance)[ok])
    est_av = np.asarray(res["av"], float)[ok]
    est_err = np.asarray(res["av_err"], float)[ok]
    within = np.mean(np.abs(est_av - true_av) <= est_err)
    out(f"   Against the invented truth: median |error| {np.median(np.abs(est_av - true_av)):.2f} mag; "
        f"{100 * within:.0f}% of targets within their 1-sigma error (about 68% expected).", "")

    written.append(_demo_features(model, field, folder, out))

    out("6. Figures")
    figs = []
    for name, (lc, bc) in (("Long Shadow", (58.0, 1.0)), ("Veyra Veil", (32.0, 2.0))):
        fig = _profile_figure(model, lc, bc)
        fname = folder / f"profile_{name.lower().replace(' ', '_')}.png"
        figs.append((f"sight line toward the {name} cloud (l = {lc:g}, b = {bc:g})", _save_figure(fig, fname, True)))
    sky = _sky_figure(model, 2000.0)
    if sky is not None:
        figs.append(("sky map of A_V out to 2 kpc", _save_figure(sky, folder / "sky_2kpc.png", True)))
    import matplotlib.pyplot as plt

    plt.close("all")
    written.extend(figs)
    out(f"   {len(figs)} figures drawn", "")

    members_file = data / "veyra_members.csv"
    if members_file.is_file():  # main-sequence fits of invented member photometry (dustkit.clusters)
        from astropy.table import Table as _Table

        from .clusters import fit_clusters

        out(f"7. Fitting E(B-V) and distance of 6 invented clusters from their members' photometry ({members_file.name})")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            fitted = fit_clusters(_Table.read(members_file, format="ascii.csv"), cluster_column="cluster",
                                  quiet=_quiet_flag(args))
        truth_file = data / "veyra_members_truth.json"
        truth_ms = json.loads(truth_file.read_text())["clusters"] if truth_file.is_file() else {}
        for row in fitted:
            tr = truth_ms.get(str(row["name"]), {})
            out(f"   {row['name']:<14s} E(B-V) = {row['ebv']:.3f} +- {row['ebv_err']:.3f} (truth {tr.get('ebv', float('nan')):.3f})   "
                f"mu0 = {row['mu0']:.2f} +- {row['mu0_err']:.2f} (truth {tr.get('mu0', float('nan')):.2f}) mag")
        written.append(("cluster fits from member photometry (a tracer table)",
                        write_table(fitted, folder / "veyra_member_fits.ecsv", overwrite=True)))
        out("")

    out(f"Done in {time.perf_counter() - t_start:.0f} s. Files in {folder.resolve()}:")
    for what, path in written:
        out(f"  {what:<70s} {path}")
    out("", "Next: dustkit estimate MODEL TARGETS -o OUT.csv with your own target list; "
            "dustkit build CATALOG -o MODEL.fits with your own catalogue.", f"Caution: {CAUTION}")
    return 0


def _demo_features(model, field, folder, out):
    """Step 5 of the demo: the dust features of the density model, each beside the invented cloud nearest it."""
    from astropy import units as u

    from ._lib.sky import separation_deg
    from .features import KIND_NEARER, density_features
    from .io import write_table

    feats = density_features(model, quiet=True)
    meta = feats.meta
    out(f"5. Finding dust features in the 3-D density ({meta['n_candidates']} candidate regions tested; least "
        f"probability {meta['min_probability']:.4g})")
    clouds = field["clouds"]
    for r in feats:
        l, b = float(r["l"].to_value(u.deg)), float(r["b"].to_value(u.deg))
        where = (f"nearer than {r['distance_upper'].to_value(u.pc):.0f} pc" if r["kind"] == KIND_NEARER
                 else f"{r['distance'].to_value(u.pc):.0f} +- {r['distance_err'].to_value(u.pc):.0f} pc")
        sep = {name: float(separation_deg(l, b, c["l"], c["b"])) for name, c in clouds.items()}
        near = min(sep, key=sep.get) if sep else None
        truth = (f"invented {near}: {clouds[near]['distance']:g} pc, {clouds[near]['av']:.1f} mag through its centre"
                 if near is not None and sep[near] <= max(2.0, 1.5 * clouds[near]["radius"]) else "no invented cloud there")
        out(f"   #{r['feature']} l = {l:6.2f}, b = {b:+5.2f} deg: {where}, delta A_V {r['delta_av'].to_value(u.mag):.2f} "
            f"+- {r['delta_av_err'].to_value(u.mag):.2f} mag, probability {r['significance']:.3f}   ({truth})")
    out("   A cloud with fewer than two clusters in front of it can only be bounded ('nearer than'); clouds that few "
        "clusters pierce are missed.", "")
    return ("dust features (dustkit features MODEL -o FILE)", write_table(feats, folder / "veyra_features.csv",
                                                                          overwrite=True))


# ============================================================================ library words -> command words

#: Library parameters whose option has another name (the rest are spelled alike: nside -> --nside); a
#: tuple: a library name that stands for what several options set together (the grid: its NSIDE and edges).
_PARAMETER_OPTIONS = {"random_state": "seed", "parallax_err_floor": "parallax_floor",
                      "distance_modulus_kind": "modulus_kind", "columns": "column", "bands": "band",
                      "grid": ("nside", "distance_max", "distance_step", "distance_edges")}
#: Python calls named in library hints, and what a command-line user does instead; a (dest, words) pair
#: applies only to a command that has that option.
_PYTHON_HINTS = {"list_laws()": "'dustkit laws'",
                 "add_band(name, wavelength) registers a new band": "from Python, dustkit.bands.add_band(name, "
                                                                    "wavelength) registers a new band",
                 "See TracerSet.rejected for the rows.": ("rejects", "--rejects FILE writes the rows."),
                 "(see .rejected)": ("rejects", "(--rejects FILE writes them)")}


def _option_names(parser, command):
    """Library parameter name -> what a user of ``command`` types: '--seed', '-o/--output', 'MODEL'.

    Read from the command's own parser (its dests and option strings), so an option added to
    the parser is named in messages without a second list."""
    subs = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    names = {}
    for action in subs.choices[command]._actions:
        if action.dest in ("help", "quiet", "debug"):
            continue
        if action.option_strings:
            names[action.dest] = "/".join(action.option_strings)
        else:
            names[action.dest] = action.metavar or action.dest.upper()
    for lib, dest in _PARAMETER_OPTIONS.items():
        if lib in names:
            continue
        if isinstance(dest, tuple):  # several options: a tuple of those the command has
            shown = tuple(names[d] for d in dest if d in names)
            if shown:
                names[lib] = shown if len(shown) > 1 else shown[0]
        elif dest in names:
            names[lib] = names[dest]
    return names


def _translator(names):
    """A function turning a library message into the command's words: "The 'random_state' parameter
    must be ..." -> "The --seed option must be ...", "pass distance_unit='kpc'" -> "add --distance-unit
    kpc", "columns={'ebv': 'X'}" -> "--column ebv=X". Names the command has no option for stay as they are."""

    def word(name):
        return names.get(name)

    def the_parameter(m):
        shown = word(m.group(2))
        if shown is None:
            return m.group(0)
        if isinstance(shown, tuple):  # "The 'grid' parameter" -> "The grid (options --nside, ... and --distance-edges)"
            listed = ", ".join(o.split("/")[-1] for o in shown[:-1]) + f" and {shown[-1].split('/')[-1]}"
            return f"{m.group(1)} {m.group(2).replace('_', ' ')} (options {listed})"
        kind = "option" if shown.startswith("-") else "argument"
        return f"{m.group(1)} {shown} {kind}"

    def bare_keyword(m):  # a hint's "lower nside=" -> "lower --nside"
        shown = word(m.group(1))
        if not isinstance(shown, str) or not shown.startswith("-"):
            return m.group(0)
        return shown.split("/")[-1]

    def keyword(m):  # pass name=value -> add --option value
        shown = word(m.group(2))
        if not isinstance(shown, str) or not shown.startswith("-"):
            return m.group(0)
        value = m.group(3).strip("'\"")
        value = "" if value in ("True", "...", "") else f" {value}"
        return f"{'Add' if m.group(1)[0].isupper() else 'add'} {shown.split('/')[-1]}{value}"

    def columns(m):
        shown = word("columns")
        if shown is None:
            return m.group(0)
        pairs = re.findall(r"'(\w+)':\s*'?([^',}]*)'?", m.group(1))
        return " ".join(f"--column {k}={v}" for k, v in pairs) if pairs else "--column KEY=NAME"

    def translate(text):
        text = str(text)
        if not names:
            return text
        # a library hint that says its command-line form already: keep only that form
        text = re.sub(r"\b\w+=[^()]*? \((?:on the )?command line:? (--[^)]*)\)", r"\1", text)
        text = re.sub(r"\b[\w.]+(?:\(\))? \((?:on the )?command line:? (dustkit [^)]*)\)", r"\1", text)
        text = re.sub(r"\(\w+=, command line (--[\w-]+)\)", r"(\1)", text)
        text = re.sub(r"\(\w+=\.\.\., (dustkit [^)]*)\)", r"(\1)", text)
        for python, command in _PYTHON_HINTS.items():
            if isinstance(command, tuple):  # only where the command has the option
                if command[0] not in names:
                    continue
                command = command[1]
            text = text.replace(python, command)
        text = re.sub(r"(\d[\d.]*) \* u\.\w+", r"\1", text)  # '4500 * u.K' -> '4500': the option has its unit
        text = re.sub(r"\b(The|the) '(\w+)' parameter", the_parameter, text)
        text = re.sub(r"\bcolumns=(\{[^}]*\})", columns, text)
        text = re.sub(r"\b(pass|Pass) (\w+)=('[^']*'|\S*?)(?=[\s,;)]|\.\s|\.$|$)", keyword, text)
        text = re.sub(r"(?<![\w.'\"-])([a-z]\w*)=(?=[\s,;)]|\.\s|\.$|$)", bare_keyword, text)
        return re.sub(r"\b(pass|Pass) (--)", lambda m: f"{'Add' if m.group(1) == 'Pass' else 'add'} --", text)

    return translate


# ============================================================================ entry point

def _show_warning_factory(debug, say=str):
    """Warnings as one line on stderr: dustkit's always (--quiet silences progress and chatter, not
    warnings: an assumed unit or default error is something the user must hear), others with --debug;
    ``say`` puts dustkit's parameter names into the command's option names."""
    from .exceptions import DustkitWarning

    def show(message, category, filename, lineno, file=None, line=None):
        if not issubclass(category, DustkitWarning) and not debug:
            return
        sys.stderr.write(f"warning: {_one_line(say(message))}\n")

    return show


def main(argv=None):
    """Run the ``dustkit`` command; returns the exit status (0 ok, 1 failed, 2 bad usage)."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # --help, --version, usage errors (already printed)
        return exc.code if isinstance(exc.code, int) else 2
    if not getattr(args, "command", None):
        parser.print_help(sys.stderr)
        return 2
    quiet = bool(getattr(args, "quiet", False))
    debug = bool(getattr(args, "debug", False))
    args.quiet, args.debug = quiet, debug
    prog = f"{_PROG} {args.command}"
    say = _translator(_option_names(parser, args.command))
    if argv is None:  # run as the program (not from Python): see _frozen_exit
        gc.freeze()
        try:
            return _run(args, prog, quiet, debug, say)
        finally:
            _frozen_exit()
    return _run(args, prog, quiet, debug, say)


def _frozen_exit():
    """Before the process ends: the objects made so far go to the collector's permanent generation
    (``gc.freeze``, also called once the arguments are parsed), so that the full collection of the
    interpreter's shutdown does not walk through every module's objects (0.2-0.4 s after a build);
    the memory goes back to the system with the process. Only when ``main`` runs as the program."""
    sys.stdout.flush()
    sys.stderr.flush()
    gc.freeze()


def _stdout_to_devnull():
    """After a broken pipe: later writes (the flush at exit) go nowhere instead of failing again."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError, AttributeError):  # stdout replaced by an object without a file
        pass


def _run(args, prog, quiet, debug, say=str):
    """The command of parsed ``args``, its errors turned into messages and an exit status; ``say`` puts
    the library's parameter names into the command's options (the user can change only those)."""
    from .exceptions import DustkitError, FileFormatError, ParameterError

    old_show = warnings.showwarning
    warnings.showwarning = _show_warning_factory(debug, say)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("default")
            warnings.showwarning = _show_warning_factory(debug, say)
            status = int(args.func(args, _Out(quiet, say=say)) or 0)
            sys.stdout.flush()  # a closed pipe fails here, inside the handlers below
            return status
    except BrokenPipeError:  # the reader of stdout stopped (dustkit laws | head -3): stop quietly
        _stdout_to_devnull()
        return 141  # 128 + SIGPIPE, as a shell reports a command the closed pipe stopped (common practice)
    except FileFormatError as exc:  # an input file of a format not read there (outputs: _check_output, status 2)
        if debug:
            traceback.print_exc()
        sys.stderr.write(f"{prog}: error: {_one_line(say(exc))}\n")
        return 1
    except (_UsageError, ParameterError) as exc:
        if debug:
            traceback.print_exc()
        sys.stderr.write(f"{prog}: error: {_with_help_hint(say(exc), prog)}\n")
        return 2
    except KeyboardInterrupt:
        sys.stderr.write(f"{prog}: interrupted\n")
        return 130
    except (DustkitError, OSError) as exc:
        if debug:
            traceback.print_exc()
        sys.stderr.write(f"{prog}: error: {_one_line(say(exc))}\n")
        return 1
    except Exception as exc:  # a bug or an unexpected library failure: still one line
        if debug:
            traceback.print_exc()
        sys.stderr.write(f"{prog}: error: unexpected {type(exc).__name__}: {_one_line(exc).rstrip('.')} "
                         "(run with --debug for the traceback and please report it)\n")
        return 1
    finally:
        warnings.showwarning = old_show


if __name__ == "__main__":
    sys.exit(main())
