"""Model files, exported tables and HEALPix slice maps.

Three kinds of file:

* **Model files** (:func:`save_model` / :func:`load_model`): a FITS file holding everything a
  fitted :class:`~dustkit.model.ExtinctionModel` needs to answer, so that a loaded model
  answers bit for bit like the saved one. The sky part follows the HEALPix FITS convention
  (Gorski et al. 2005, ApJ 622, 759; the keywords healpy writes): a binary table
  ``SKYMODEL`` with ``PIXTYPE='HEALPIX'``, ``ORDERING``, ``COORDSYS='G'``, ``NSIDE`` and,
  for a partial sky, ``INDXSCHM='EXPLICIT'``/``OBJECT='PARTIAL'`` with a ``PIXEL`` column
  (or ``INDXSCHM='IMPLICIT'``, ``OBJECT='FULLSKY'``, ``FIRSTPIX``/``LASTPIX`` when every
  pixel is stored). Each row holds one pixel's vectors over the distance edges. Further
  extensions: ``DISTANCE_EDGES``, ``STATE`` (exact float64 scalars: layer, scatter
  calibration, smoothing), ``TRACERS`` (the tracers the model was built from; ``ROW`` left out when every input
  row was kept in order, ``EXCESS``/``EXCESS_ERR`` left out with ``EXCSAME = T`` when they
  repeat ``AV``/``AV_ERR`` bit for bit, both made again on reading) and ``CV``
  (the cross-validation table). Header keywords repeat the law, R_V, layer parameters and
  errors, the scatter calibration, the dustkit version and the input catalogue's checksum
  for people reading the header; the exact values are read from the ``STATE`` extension.
  Every HDU carries FITS ``CHECKSUM``/``DATASUM`` keywords, so damage is detected on reading.
* **Exported tables** (:func:`export_table`): the binned model, one row per pixel and
  distance bin (:meth:`~dustkit.model.ExtinctionModel.to_table`), as ECSV (units and
  metadata kept), FITS or CSV (for spreadsheets; units are listed in the docstring).
* **Slice maps** (:func:`write_slice_maps`): full-sky HEALPix maps of cumulative A_V at every
  distance edge, one column per edge, readable with ``healpy.read_map(path, field=k)``.

Pixels that are not stored in a model file are rebuilt on loading from the stored scalars
exactly as the model computes them where no tracer reaches (residual 0, random-walk prior
variance, layer A_V). Which pixels can be left out is decided on saving by rebuilding them
and comparing bit for bit, so the round trip is exact by construction.

All writes are atomic: the file is written to a temporary file in the same folder and then
moved over the target with :func:`os.replace`; a failed write leaves an existing file intact.
"""

import os
import textwrap
import warnings
from pathlib import Path

import numpy as np
from astropy import units as u
from astropy.table import Table

from .exceptions import DustkitError, ModelFileError
from ._lib.formats import TABLE_FORMATS, atomic_write, check_target, format_for
from .binned.finish import empty_pixel_fill
from ._lib.validation import check_choice
from .tracers.stored import tracers_from_hdu, tracers_hdu

__all__ = [
    "save_model",
    "check_fits_path",
    "load_model",
    "export_table",
    "write_table",
    "write_slice_maps",
    "EXPORT_FORMATS",
    "MODEL_FILE_KIND",
]

#: Export formats by file suffix (``format=`` accepts the values); the registry's table formats.
EXPORT_FORMATS = TABLE_FORMATS
#: Value of the ``DKFILE`` keyword that marks a dustkit model file.
MODEL_FILE_KIND = "EXTINCTION MODEL"
_FORMAT_VERSION = 1

_SKY_COLUMNS = (  # (column, model attribute, per edge or per bin, unit)
    ("AV", "av_", "edge", "mag"),
    ("AV_ERR", "av_err_", "edge", "mag"),
    ("RESID", "_resid_", "edge", "mag"),
    ("POST_VAR", "_post_var_", "edge", "mag2"),
    ("N_TRACERS", "n_tracers_", "edge", ""),
    ("COUNTS", "counts_", "bin", ""),
    ("DIFFERENTIAL", "differential_", "bin", "mag/kpc"),
)
_STATE_FLOATS = (
    "a0", "a0_err", "h", "h_err", "z_sun", "z_sun_err", "layer_scatter",
    "walk_variance", "distance_smoothing", "rv",
)

# ============================================================================ helpers

def _version():
    try:
        from importlib.metadata import version

        return version("dustkit")
    except Exception:  # not installed (running from a source tree)
        return "unknown"


def _table_format(path, format):
    """The table format: ``format`` when given (checked), else from the suffix (the registry)."""
    if format is not None:
        return check_choice("format", format, tuple(sorted(set(TABLE_FORMATS.values()))))
    return format_for(path, "table")


def _fits_value(value):
    """A header-friendly value: finite floats and short strings stay, others become strings."""
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value) if np.isfinite(value) else str(value)
    return str(value)


# ============================================================================ model files

def _rows_differ(a, b):
    a = np.asarray(a)
    b = np.asarray(b)
    same = (a == b) | (np.isnan(a) & np.isnan(b)) if a.dtype.kind == "f" else (a == b)
    return ~np.all(same.reshape(a.shape[0], -1), axis=1)


def _stored_pixels(model):
    """Pixels to store: informed ones plus any whose arrays differ from the rebuilt defaults."""
    g = model.grid_
    rebuilt = empty_pixel_fill(g, model.layer_, model.walk_variance_, model.scatter_)
    need = np.zeros(g.npix, dtype=bool)
    need[model.informed_pixels()] = True
    for attr, arr in rebuilt.items():
        need |= _rows_differ(np.asarray(getattr(model, attr)), arr)
    return np.nonzero(need)[0]


def _model_hdus(model):
    """The HDUs of a model file, in file order: primary, SKYMODEL, DISTANCE_EDGES, STATE, TRACERS, CV."""
    from astropy.io import fits

    from .model import model_state

    state = model_state(model)
    version = _version()
    tmeta = state["tracer_info"].get("meta") or {}
    sky, edges = _sky_hdu(model, state, version), _edges_hdu(model.grid_)
    st, trh = _state_hdu(model, state), _tracers_hdu(model, state)
    hdus = [fits.PrimaryHDU(), sky, edges, st, trh]
    ph = hdus[0].header
    ph["DKFILE"] = (MODEL_FILE_KIND, "dustkit file kind")
    ph["DKFORMAT"] = (_FORMAT_VERSION, "dustkit model file layout version")
    ph["DUSTKIT"] = (version, "dustkit version that wrote the file")
    ph["CATSHA"] = str(tmeta.get("sha256", ""))
    ph.add_comment("Extinction estimates from a model are statistical; check them against local data.")

    cv = state.get("cv")
    if cv is not None and len(cv):
        cvt = Table(cv)
        scheme = cvt.meta.pop("validation", None)
        cvt.meta.clear()
        cvh = fits.table_to_hdu(cvt)
        cvh.name = "CV"
        if scheme:
            cvh.header["CVSCHEME"] = str(scheme)  # how the smoothing was chosen
        hdus.append(cvh)
    return fits.HDUList(hdus)


def _sky_hdu(model, state, version):
    """SKYMODEL: one row per stored pixel, HEALPix keywords, and the record a reader of the header needs."""
    from astropy.io import fits

    g = model.grid_
    lay = state["layer"]
    sc = state["scatter"]
    scal = state["scalars"]
    info = state["tracer_info"]
    tmeta = info.get("meta") or {}
    pixels = _stored_pixels(model)
    full = pixels.size == g.npix
    E, B = g.n_edges, g.n_bins
    cols = []
    if not full:
        cols.append(fits.Column(name="PIXEL", format="K", array=pixels.astype(np.int64)))
    for name, attr, kind, unit in _SKY_COLUMNS:
        arr = np.asarray(state["arrays"][attr])[pixels]
        n = E if kind == "edge" else B
        fmt = f"{n}K" if arr.dtype.kind in "iu" else f"{n}D"
        if arr.dtype.kind in "iu":
            arr = arr.astype(np.int64)
        cols.append(fits.Column(name=name, format=fmt, unit=unit or None, array=arr))
    sky = fits.BinTableHDU.from_columns(cols, name="SKYMODEL")
    h = sky.header
    h["PIXTYPE"] = ("HEALPIX", "HEALPix pixelisation")
    h["ORDERING"] = (g.ordering.upper() if g.ordering == "ring" else "NESTED", "Pixel ordering scheme")
    h["COORDSYS"] = ("G", "Galactic coordinates")
    h["NSIDE"] = (g.nside, "HEALPix resolution parameter")
    if full:
        h["INDXSCHM"] = ("IMPLICIT", "Row i is pixel FIRSTPIX + i")
        h["OBJECT"] = ("FULLSKY", "Every pixel is stored")
        h["FIRSTPIX"] = (0, "First pixel stored")
        h["LASTPIX"] = (g.npix - 1, "Last pixel stored")
    else:
        h["INDXSCHM"] = ("EXPLICIT", "Pixel index in column PIXEL")
        h["OBJECT"] = ("PARTIAL", "Unlisted pixels: no tracer reaches them")
    h["NEDGES"] = (E, "Distance edges (length of per-edge vectors)")
    h["NBINS"] = (B, "Distance bins (length of per-bin vectors)")
    h["DKFILE"] = (MODEL_FILE_KIND, "dustkit file kind")
    h["DKFORMAT"] = (_FORMAT_VERSION, "dustkit model file layout version")
    h["DUSTKIT"] = (version, "dustkit version that wrote the file")
    h["LAW"] = (str(info["law"]), "Extinction law of the tracers' A_V")
    h["RV"] = (float(info["rv"]), "R_V of the tracers' A_V")
    h["LAYA0"] = (lay["a0"], "[mag/kpc] layer mid-plane extinction")
    h["LAYA0E"] = (lay["a0_err"], "[mag/kpc] error of LAYA0")
    h["LAYH"] = (lay["h"], "[pc] layer scale height")
    h["LAYHE"] = (lay["h_err"], "[pc] error of LAYH")
    h["LAYZSUN"] = (lay["z_sun"], "[pc] height of the Sun above the mid-plane")
    h["LAYZSUNE"] = (lay["z_sun_err"], "[pc] error of LAYZSUN")
    h["SCROOT"] = (sc["root"], "[mag] scatter, sqrt term at A_V = 1 mag")
    h["SCFRAC"] = (sc["frac"], "unresolved scatter fraction of A_V")
    h["SCKAPPA"] = (sc["kappa"], "scale of the posterior variance")
    h["SCSCALE"] = (sc["scale"], "overall scale of the predictive variance")
    h["WALKVAR"] = (float(scal["walk_variance_"]), "[mag2/kpc] random-walk variance")
    h["SKYPASS"] = (int(scal["sky_passes_"]), "sky smoothing passes chosen")
    h["DSMOOTH"] = (float(scal["distance_smoothing_"]), "[pc] distance smoothing chosen")
    h["UNCERT"] = (str(scal["uncertainty_scheme_"]), "how tracer errors entered")
    h["NDRAWS"] = (int(scal["n_draws_"]), "Monte Carlo draws per tracer")
    h["NTRACERS"] = (len(model.tracers_), "tracers the model was built from")
    h["CATSHA"] = str(tmeta.get("sha256", ""))  # SHA-256 of the input catalogue
    h["CATSHAOF"] = (str(tmeta.get("sha256_of", "")), "what CATSHA is a checksum of")
    h.add_comment("Cumulative A_V (mag) per pixel at each distance edge (DISTANCE_EDGES extension).")
    return sky


def _edges_hdu(g):
    from astropy.io import fits

    edges = fits.BinTableHDU.from_columns(
        [fits.Column(name="DISTANCE", format="D", unit="pc", array=g.distance_edges)], name="DISTANCE_EDGES"
    )
    edges.header["NEDGES"] = g.n_edges
    return edges


def _state_hdu(model, state):
    """STATE: the exact float64 scalars (layer, scatter calibration, smoothing) and the constructor parameters."""
    from astropy.io import fits

    g = model.grid_
    lay = state["layer"]
    sc = state["scatter"]
    scal = state["scalars"]
    params = state["params"]
    info = state["tracer_info"]
    # exact scalars (header floats may be rounded to 20 characters)
    values = {
        "a0": lay["a0"], "a0_err": lay["a0_err"], "h": lay["h"], "h_err": lay["h_err"],
        "z_sun": lay["z_sun"], "z_sun_err": lay["z_sun_err"], "layer_scatter": lay["scatter"],
        "walk_variance": scal["walk_variance_"],
        "distance_smoothing": scal["distance_smoothing_"], "rv": info["rv"],
    }
    st_cols = [fits.Column(name=k.upper(), format="D", array=np.array([float(values[k])])) for k in _STATE_FLOATS]
    st_cols += [fits.Column(name=f"SCATTER_{k.upper()}", format="D", array=np.array([float(x)])) for k, x in sc.items()]
    st_cols.append(fits.Column(name="LAYER_COV", format="9D", array=np.asarray(lay["covariance"], float).reshape(1, 9)))
    st_cols.append(fits.Column(name="LAYER_PULL", format="3D", array=np.asarray(lay["pull"], float).reshape(1, 3)))
    st_cols.append(fits.Column(name="LAYER_NUSED", format="K", array=np.array([int(lay["n_used"])])))
    st = fits.BinTableHDU.from_columns(st_cols, name="STATE")
    sh = st.header
    sh["NSIDE"] = g.nside
    sh["ORDERING"] = g.ordering.upper() if g.ordering == "ring" else "NESTED"
    sh["UNCERT"] = str(scal["uncertainty_scheme_"])
    sh["NDRAWS"] = int(scal["n_draws_"])
    sh["SKYPASS"] = int(scal["sky_passes_"])
    sh["P_UNCERT"] = (str(params["uncertainty"]), "constructor parameter")
    sh["P_NDRAWS"] = (-1 if params["n_draws"] is None else int(params["n_draws"]), "constructor parameter (-1: auto)")
    sh["P_NFOLDS"] = (int(params["n_folds"]), "constructor parameter")
    sh["P_SEED"] = (-1 if params["random_state"] is None else int(params["random_state"]), "constructor parameter")
    sh["P_PASSES"] = (",".join(str(int(p)) for p in params["sky_passes"]), "constructor parameter")
    sh["P_LAYER"] = (bool(params.get("layer_given", False)), "layer given instead of fitted")
    sh["LAYNOFIT"] = (str(lay.get("not_fitted", "")), "layer parameters not fitted (reference values)")
    sh["LAW"] = str(info["law"])
    return st


def _tracers_hdu(model, state):
    """TRACERS: the tracers the model was built from, with their metadata (:mod:`dustkit.tracers.stored`)."""
    return tracers_hdu(state["tracers"], state["tracer_info"], row=getattr(model.tracers_, "row", None),
                       distance_kind=getattr(model.tracers_, "distance_kind", "distance"))


def _write_hdul(hdul, tmp):
    """Write an HDUList (the one place model files hit the disk; tests make it fail midway)."""
    hdul.writeto(tmp, checksum=True)


def check_fits_path(path, overwrite=False, what="model file"):
    """Check that a FITS file (a model file, slice maps) can be written to ``path``.

    Checks its folder, overwriting and its suffix, so a caller can fail before a long build.

    Raises
    ------
    FileFormatError
        ``path`` ends in the suffix of another format (``.csv``, ``.ecsv``, ``.parquet``, ...):
        the file is FITS, and one named as a table would be taken for one.
    ModelFileError
        As :func:`dustkit._lib.formats.check_target` (missing folder, existing file).
    """
    from .exceptions import FileFormatError

    fmt = format_for(path, "catalogue", strict=False)
    if fmt is not None and fmt != "fits":
        raise FileFormatError(
            f"Cannot write a {what} to '{path}': a {what} is FITS, and its name ends like a "
            f"{fmt.removeprefix('ascii.').upper()} table. Hint: end the name in .fits"
            + ("; to write the model as a table, use export_table (on the command line: dustkit export)."
               if what == "model file" else ".")
        )
    return check_target(path, overwrite)


def save_model(model, path, overwrite=False):
    """Save a fitted model to a FITS file that :func:`load_model` reads back losslessly.

    Parameters
    ----------
    model : ExtinctionModel
        A fitted model.
    path : str or path-like
        Output file (``.fits``; ``.fits.gz`` writes it gzip-compressed). The suffix of a
        table format (``.csv``, ``.ecsv``, ...) is refused.
    overwrite : bool
        Replace an existing file. Without it an existing file raises ``ModelFileError``.

    Returns
    -------
    pathlib.Path
        The file written.

    Raises
    ------
    ModelNotFittedError
        The model is not fitted.
    ModelFileError
        The file exists (and ``overwrite`` is False), or it could not be written; an
        existing file is then left unchanged.

    Notes
    -----
    Layout: see the module docstring. The sky table follows the HEALPix FITS convention
    (PIXTYPE, ORDERING, COORDSYS='G', NSIDE, INDXSCHM; Gorski et al. 2005).
    """
    model.check_fitted()
    check_fits_path(path, overwrite)
    hdul = _density_hdul(model) if _is_density(model) else _model_hdus(model)
    return atomic_write(path, lambda tmp: _write_hdul(hdul, tmp), overwrite, what="model file")


def _is_density(model):
    from .density import DensityModel

    return isinstance(model, DensityModel)


def _density_hdul(model):
    """A density model file: the same primary keywords, the density layout (dustkit.density.files)."""
    from astropy.io import fits

    from .density.files import MODEL_KIND, density_hdus

    primary = fits.PrimaryHDU()
    ph = primary.header
    ph["DKFILE"] = (MODEL_FILE_KIND, "dustkit file kind")
    ph["DKFORMAT"] = (_FORMAT_VERSION, "dustkit model file layout version")
    ph["DKMODEL"] = (MODEL_KIND, "which dustkit model")
    ph["DUSTKIT"] = (_version(), "dustkit version that wrote the file")
    ph["LAW"], ph["RV"] = str(model.law), float(model.rv)
    ph.add_comment("Extinction estimates from a model are statistical; check them against local data.")
    return fits.HDUList([primary, *density_hdus(model)])


def _bad_file(path, why, hint=None):
    why = " ".join(str(why).split()).rstrip(".")
    return ModelFileError(
        f"'{path}' is not a readable dustkit model file: {why}. "
        + (hint or "Hint: model files are written by dustkit.save_model or 'dustkit build'; "
           "if this one was, it is damaged: build the model again.")
    )


def load_model(path):
    """Read a model written by :func:`save_model`.

    Parameters
    ----------
    path : str or path-like

    Returns
    -------
    ExtinctionModel
        A fitted model that answers exactly (bit for bit) like the one saved.

    Raises
    ------
    ModelFileError
        Missing, truncated, corrupt or foreign file (any FITS file that dustkit did not
        write as a model, a table in another format), with what is wrong and a hint.
    """
    from astropy.io import fits

    if not isinstance(path, (str, os.PathLike)):
        raise ModelFileError(f"The model path must be a file name; got {type(path).__name__} {path!r}.")
    path = Path(path).expanduser()
    if not path.is_file():
        raise ModelFileError(
            f"Model file '{path}' does not exist or is not a file. Hint: check the path "
            f"(current folder: {os.getcwd()}); build a model with 'dustkit build'."
        )
    with open(path, "rb") as fh:
        head = fh.read(80)
    size = path.stat().st_size
    if size == 0:
        raise _bad_file(path, "it is empty", "Hint: the write that made it was interrupted; build the model again.")
    gzipped = head[:2] == b"\x1f\x8b"  # save_model to a '.gz' name writes it so (astropy); read it alike
    if gzipped:
        head = _gzip_head(path)
    if not head.startswith(b"SIMPLE  ="):
        kind = "it does not start like a FITS file"
        if gzipped:
            kind += " (it is gzip-compressed, but what it holds is not FITS either)"
        elif all(32 <= c < 127 or c in (9, 10, 13) for c in head):
            kind += " (it looks like a text file, e.g. a CSV table)"
        raise _bad_file(path, kind, "Hint: give the .fits file written by dustkit.save_model or 'dustkit build'.")
    if size % 2880 and not gzipped:
        raise _bad_file(path, f"it is truncated ({size} bytes, not a whole number of 2880-byte FITS blocks)")
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            with fits.open(path, mode="readonly", memmap=False, checksum=True) as hdul:
                hdul.verify("exception")
                names = [h.name for h in hdul]
                ours = hdul[0].header.get("DKFILE") == MODEL_FILE_KIND
                missing = [n for n in ("SKYMODEL", "DISTANCE_EDGES", "STATE", "TRACERS") if n not in names]
                if ours and missing:
                    raise _bad_file(path, f"it is incomplete (truncated?): extension(s) {', '.join(missing)} missing")
                if "SKYMODEL" not in names or not ours:
                    raise _bad_file(
                        path,
                        f"it is a FITS file but not a dustkit model (extensions: {', '.join(names)})",
                        "Hint: slice maps and exported tables cannot be loaded as models; "
                        "give the file written by dustkit.save_model or 'dustkit build'.",
                    )
                parts = {n: (hdul[n].header.copy(), hdul[n].data) for n in names[1:]}
                for n in parts:
                    data = parts[n][1]
                    if data is not None:
                        parts[n] = (parts[n][0], data.copy())
        damaged = [str(w.message) for w in caught if "checksum" in str(w.message).lower() or "datasum" in str(w.message).lower()]
        if damaged:
            raise _bad_file(path, f"its checksums do not match ({damaged[0].strip().rstrip('.')})")
        if str(parts["STATE"][0].get("DKMODEL", "")) == "DENSITY":
            from .density.files import density_from_parts

            return density_from_parts(parts)
        return _model_from_parts(path, parts)
    except DustkitError:
        raise
    except Exception as exc:
        raise _bad_file(path, f"{type(exc).__name__}: {exc}") from None


def _gzip_head(path):
    """The first 80 bytes a gzip-compressed file holds (empty when it cannot be decompressed)."""
    import gzip
    import zlib

    try:
        with gzip.open(path, "rb") as fh:
            return fh.read(80)
    except (OSError, EOFError, zlib.error):
        return b""


def _stored_sky(path, sh, sky, grid):
    """The pixels stored in SKYMODEL (explicit or implicit index) and their arrays by model attribute."""
    scheme = str(sh.get("INDXSCHM", "")).upper()
    if scheme == "EXPLICIT":
        pixels = np.asarray(sky["PIXEL"], dtype=np.int64)
    elif scheme == "IMPLICIT":
        first, last = int(sh.get("FIRSTPIX", 0)), int(sh.get("LASTPIX", grid.npix - 1))
        pixels = np.arange(first, last + 1)
    else:
        raise _bad_file(path, f"keyword INDXSCHM is {scheme!r}, expected 'EXPLICIT' or 'IMPLICIT'")
    if pixels.size != len(sky) or (pixels.size and (pixels.min() < 0 or pixels.max() >= grid.npix)):
        raise _bad_file(path, f"its pixel list does not fit NSIDE {grid.nside} ({len(sky)} rows)")
    stored = {}
    for name, attr, kind, _ in _SKY_COLUMNS:
        col = np.asarray(sky[name])
        n = grid.n_edges if kind == "edge" else grid.n_bins
        col = col.reshape(len(sky), -1)
        if col.shape[1] != n:
            raise _bad_file(path, f"column {name} has {col.shape[1]} values per pixel, expected {n}")
        stored[attr] = col
    return pixels, stored


def _model_from_parts(path, parts):
    from .model import model_from_state

    for need in ("SKYMODEL", "DISTANCE_EDGES", "STATE", "TRACERS"):
        if need not in parts:
            raise _bad_file(path, f"the '{need}' extension is missing")
    sh, sky = parts["SKYMODEL"]
    version = sh.get("DKFORMAT")
    if version != _FORMAT_VERSION:
        raise _bad_file(path, f"it has layout version {version}, this dustkit reads version {_FORMAT_VERSION}",
                        "Hint: read it with the dustkit version that wrote it "
                        f"({sh.get('DUSTKIT', 'unknown')}).")
    for key, expect in (("PIXTYPE", "HEALPIX"), ("COORDSYS", "G")):
        if str(sh.get(key, "")).upper() != expect:
            raise _bad_file(path, f"keyword {key} is {sh.get(key)!r}, expected {expect!r}")
    nside = int(sh["NSIDE"])
    ordering = {"RING": "ring", "NESTED": "nested", "NEST": "nested"}.get(str(sh.get("ORDERING", "")).upper())
    if ordering is None:
        raise _bad_file(path, f"keyword ORDERING is {sh.get('ORDERING')!r}, expected 'RING' or 'NESTED'")
    edges = np.asarray(parts["DISTANCE_EDGES"][1]["DISTANCE"], dtype=float)
    stt_h, stt = parts["STATE"]
    v = {k: float(stt[k.upper()][0]) for k in _STATE_FLOATS}
    from .grid import Grid
    from .layer import DustLayer

    grid = Grid(nside, edges, ordering)
    layer = DustLayer(
        a0=v["a0"], h=v["h"], z_sun=v["z_sun"], a0_err=v["a0_err"], h_err=v["h_err"], z_sun_err=v["z_sun_err"],
        scatter=v["layer_scatter"], n_used=int(stt["LAYER_NUSED"][0]),
        covariance=np.asarray(stt["LAYER_COV"][0], float).reshape(3, 3),
        pull=np.asarray(stt["LAYER_PULL"][0], float) if "LAYER_PULL" in stt.columns.names else np.zeros(3),
        not_fitted=tuple(k for k in str(stt_h.get("LAYNOFIT", "")).split(",") if k),
    )
    scatter = {name[len("SCATTER_"):].lower(): float(stt[name][0])
               for name in stt.columns.names if name.startswith("SCATTER_")}
    if not scatter:
        raise _bad_file(path, "its STATE extension has no scatter calibration")
    pixels, stored = _stored_sky(path, sh, sky, grid)

    th, trd = parts["TRACERS"]
    ts, tracers = tracers_from_hdu(th, trd, law=sh.get("LAW", "ccm89"), rv=v["rv"])
    passes = [int(p) for p in str(stt_h.get("P_PASSES", "0")).split(",") if p.strip()]
    ndraws = int(stt_h.get("P_NDRAWS", -1))
    seed = int(stt_h.get("P_SEED", 0))
    state = {
        "params": {"nside": nside, "ordering": ordering, "uncertainty": str(stt_h.get("P_UNCERT", "auto")),
                   "n_draws": None if ndraws < 0 else ndraws, "n_folds": int(stt_h.get("P_NFOLDS", 5)),
                   "random_state": None if seed < 0 else seed, "sky_passes": passes or [0],
                   "layer_given": bool(stt_h.get("P_LAYER", False))},
        "grid": {"nside": nside, "ordering": ordering, "distance_edges": edges},
        "layer": layer.state(),
        "scatter": scatter,
        "scalars": {"uncertainty_scheme_": str(sh.get("UNCERT", "monte-carlo")), "n_draws_": int(sh.get("NDRAWS", 1)),
                    "sky_passes_": int(sh.get("SKYPASS", 0)), "walk_variance_": v["walk_variance"],
                    "distance_smoothing_": v["distance_smoothing"]},
        "arrays": {},
        "tracers": ts,  # the TracerSet read once (model_from_state takes it as it is)
        "tracer_info": {"law": ts.law, "rv": v["rv"], "excess_kind": ts.excess_kind, "meta": ts.meta},
        "cv": Table(parts["CV"][1]) if "CV" in parts else None,
    }
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the tracers were validated when the model was built
        model = model_from_state(state)
    # pixels not stored: rebuilt exactly as save_model checked they would be
    arrays = empty_pixel_fill(grid, model.layer_, model.walk_variance_, model.scatter_)
    for attr, col in stored.items():
        arrays[attr][pixels] = col.astype(arrays[attr].dtype)
        setattr(model, attr, arrays[attr])
    if len(ts) != tracers["l"].size:
        raise _bad_file(path, f"its tracer table has {tracers['l'].size} rows but only {len(ts)} are valid")
    model.tracers_ = ts
    if state["cv"] is not None:
        cv = state["cv"]
        for c, unit in (("distance_smoothing", u.pc), ("walk_variance", u.mag**2 / u.kpc), ("cv_mse", u.mag**2)):
            if c in cv.colnames and cv[c].unit is None:
                cv[c].unit = unit
        scheme = cv.meta.pop("CVSCHEME", None)
        if scheme:
            cv.meta["validation"] = scheme
        model.cv_ = cv
    return model


# ============================================================================ exported tables

def _table_for_fits(tab):
    t = Table(tab, copy=True)
    meta = dict(t.meta)
    t.meta.clear()
    keymap = {"nside": "NSIDE", "ordering": "ORDERING", "coordsys": "COORDSYS", "law": "LAW", "rv": "RV",
              "layer_a0": "LAYA0", "layer_a0_err": "LAYA0E", "layer_h": "LAYH", "layer_h_err": "LAYHE",
              "layer_z_sun": "LAYZSUN", "layer_z_sun_err": "LAYZSUNE"}
    for k, v in meta.items():
        key = keymap.get(k, str(k).upper())
        if k == "caution" or not (key.replace("_", "").replace("-", "").isalnum() and key.isascii()):
            continue
        if isinstance(v, (str, int, float, bool, np.integer, np.floating, np.bool_)):
            value = _fits_value(v)
            if isinstance(value, str) and not value.isascii():
                continue
            if len(key) <= 8:
                if not isinstance(value, str) or len(value) <= 68:
                    t.meta[key] = value
            elif len(f"HIERARCH {k} = ") + (len(value) + 2 if isinstance(value, str) else 20) <= 80:
                # a longer name (a finder's settings and counts: min_delta_av, n_candidates, ...) goes in a
                # HIERARCH card, which astropy reads back under the same name
                t.meta[f"HIERARCH {k}"] = value
    t.meta["DUSTKIT"] = _version()
    if "caution" in meta:
        t.meta["COMMENT"] = textwrap.wrap(str(meta["caution"]), 70)
    return t


def write_table(table, path, format=None, overwrite=False):
    """Write any table atomically as ECSV, FITS or CSV (format from the suffix or ``format``).

    Parameters
    ----------
    table : `~astropy.table.Table` or `~astropy.table.QTable`
    path : str or path-like
    format : {'ecsv', 'fits', 'csv'}, optional
    overwrite : bool
        Replace an existing file; a failed write leaves it intact.

    Returns
    -------
    pathlib.Path

    Notes
    -----
    ECSV keeps units and metadata; FITS keeps units and puts simple metadata in header
    keywords (names longer than 8 characters in HIERARCH cards, read back under the same
    names); CSV keeps column names and values only (for spreadsheets), a column of several
    values per row (``av_samples``) spread over ``av_samples_1``, ``av_samples_2``, ...
    """
    fmt = _table_format(path, format)

    def write(tmp):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", u.UnitsWarning)
            if fmt == "ecsv":
                table.write(tmp, format="ascii.ecsv")
            elif fmt == "fits":
                _table_for_fits(table).write(tmp, format="fits")
            else:
                _flat_for_csv(table).write(tmp, format="ascii.csv")

    return atomic_write(path, write, overwrite, what=f"{fmt.upper()} table")


def _flat_for_csv(table):
    """A plain copy of ``table`` without metadata, each column of shape (n, k) spread over ``name_1 .. name_k``."""
    plain = Table()
    for name in table.colnames:
        col = table[name]
        if col.ndim > 1:
            flat = np.asarray(getattr(col, "value", col)).reshape(len(col), -1)
            spread = [f"{name}_{j + 1}" for j in range(flat.shape[1])]
            clash = [c for c in spread if c in table.colnames]
            if clash:  # one would silently replace the other in the CSV
                raise DustkitError(
                    f"Cannot write column {name!r} ({flat.shape[1]} values per row) to CSV as {spread[0]} .. "
                    f"{spread[-1]}: the table has a column {clash[0]!r} already. Hint: rename that column, or "
                    "write ECSV or FITS, which keep several values per row in one column."
                )
            for c, j in zip(spread, range(flat.shape[1])):
                plain[c] = flat[:, j]
        else:
            plain[name] = col
    return plain


def export_table(model, path, format=None, overwrite=False):
    """Write the binned model as a table: one row per informed pixel and distance bin.

    Parameters
    ----------
    model : ExtinctionModel
        A fitted model.
    path : str or path-like
        Output file; the format comes from the suffix (``.ecsv``, ``.fits``, ``.csv``)
        unless ``format`` is given.
    format : {'ecsv', 'fits', 'csv'}, optional
    overwrite : bool
        Replace an existing file.

    Returns
    -------
    pathlib.Path

    Notes
    -----
    Columns (see :meth:`~dustkit.model.ExtinctionModel.to_table`): ``pixel`` (HEALPix index,
    Galactic, the model's NSIDE and ORDERING), ``l``, ``b`` (pixel centre, deg),
    ``distance_min``, ``distance_max`` (pc), ``av_near`` (cumulative A_V at the near edge,
    mag), ``av`` and ``av_err`` (cumulative A_V at the far edge and its 1-sigma error, mag),
    ``differential`` (mag/kpc), ``n_tracers`` (tracers in the pixel and bin). ECSV keeps the
    units and the metadata (NSIDE, ORDERING, law, R_V, layer); FITS keeps the units and puts
    the metadata in header keywords; CSV has the same column names and units as listed here,
    with no metadata, for spreadsheets.
    """
    _table_format(path, format)  # a bad suffix fails before the table is built
    return write_table(model.to_table(), path, format=format, overwrite=overwrite)


def write_slice_maps(model, path, overwrite=False, errors=True, mask_uninformed=True):
    """Write full-sky HEALPix maps of cumulative A_V at every distance edge.

    Parameters
    ----------
    model : ExtinctionModel
        A fitted model.
    path : str or path-like
        Output FITS file.
    overwrite : bool
        Replace an existing file.
    errors : bool
        Also write the 1-sigma error maps, after the A_V maps.
    mask_uninformed : bool
        Set pixels that no tracer informs to ``healpy.UNSEEN`` (the HEALPix "no data" value)
        instead of the smooth layer's A_V there, so a map does not suggest measurements where
        there are none.

    Returns
    -------
    pathlib.Path

    Notes
    -----
    One binary table, HEALPix FITS convention (``PIXTYPE='HEALPIX'``, ``ORDERING``,
    ``COORDSYS='G'``, ``NSIDE``, ``INDXSCHM='IMPLICIT'``, ``OBJECT='FULLSKY'``), one column per
    map: column ``k`` (``AV_000``, ``AV_001``, ...) is the cumulative A_V (mag) out to
    distance edge ``k``, whose distance is in keyword ``DIST<k>`` (pc); with ``errors`` the
    columns ``n_edges + k`` (``AV_ERR_000``, ...) hold the errors. Read map ``k`` with
    ``healpy.read_map(path, field=k)``.
    """
    import healpy as hp

    model.check_fitted()
    check_fits_path(path, overwrite, what="slice-map file")
    g = model.grid_
    av = np.array(model.av_, dtype=np.float64)
    err = np.array(model.av_err_, dtype=np.float64)
    if mask_uninformed:
        keep = np.zeros(g.npix, dtype=bool)
        keep[model.informed_pixels()] = True
        av[~keep] = hp.UNSEEN
        err[~keep] = hp.UNSEEN
    maps = [av[:, k] for k in range(g.n_edges)]
    names = [f"AV_{k:03d}" for k in range(g.n_edges)]
    if errors:
        maps += [err[:, k] for k in range(g.n_edges)]
        names += [f"AV_ERR_{k:03d}" for k in range(g.n_edges)]
    extra = [("DIST" + f"{k:04d}"[-4:], float(d), f"[pc] distance of map {k}") for k, d in enumerate(g.distance_edges)]
    extra += [
        ("NEDGES", g.n_edges, "number of distance edges (A_V maps)"),
        ("LAW", str(model.law), "extinction law"),
        ("RV", float(model.rv), "R_V"),
        ("DUSTKIT", _version(), "dustkit version"),
        ("MASKED", bool(mask_uninformed), "uninformed pixels set to UNSEEN"),
    ]

    def write(tmp):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            hp.write_map(tmp, maps, nest=g.nest, coord="G", column_names=names, column_units="mag",
                         dtype=np.float64, extra_header=extra, overwrite=True)

    if len(maps) > 999:
        raise ModelFileError(f"Too many distance edges ({g.n_edges}) for one slice-map file (at most 999).")
    return atomic_write(path, write, overwrite, what="slice-map file")
