"""The one file-format registry: file suffix -> format, for every reader and writer.

Every place that reads or writes a file asks here which format a suffix means, so they
all accept the same suffixes and refuse the others with the same error
(:class:`~dustkit.exceptions.FileFormatError`, which lists the suffixes):

===========  ==============================================================  ==============
kind         who uses it                                                      format values
===========  ==============================================================  ==============
catalogue    ``read_tracers``, ``read_targets`` (astropy ``Table.read``)      astropy formats
chunked      ``scale.build_from_parquet`` / ``build_from_fits`` (row chunks)   parquet, fits
table        ``io.write_table``, ``io.export_table``, the CLI, the explorer     ecsv, fits, csv
figure       ``plotting.save_figure``, the CLI (matplotlib ``savefig``)         png, pdf, ...
===========  ==============================================================  ==============

Writes are atomic (:func:`atomic_write`): a temporary file in the same folder, then
:func:`os.replace`; a failed write leaves an existing file untouched.
"""

import os
import tempfile
from pathlib import Path

from ..exceptions import DustkitError, FileFormatError, ModelFileError, OutputExistsError, OutputFolderError

__all__ = [
    "CATALOGUE_FORMATS",
    "CHUNKED_FORMATS",
    "TABLE_FORMATS",
    "FIGURE_FORMATS",
    "FORMATS",
    "suffix_of",
    "format_for",
    "suffixes",
    "check_target",
    "parquet_parts",
    "file_mode",
    "atomic_write",
]

#: Catalogue files read through astropy's ``Table.read``: suffix -> astropy format.
CATALOGUE_FORMATS = {
    ".csv": "ascii.csv",
    ".csv.gz": "ascii.csv",
    ".ecsv": "ascii.ecsv",
    ".ecsv.gz": "ascii.ecsv",
    ".tsv": "ascii.tab",
    ".txt": "ascii",
    ".dat": "ascii",
    ".fits": "fits",
    ".fit": "fits",
    ".fts": "fits",
    ".fits.gz": "fits",
    ".fit.gz": "fits",
    ".vot": "votable",
    ".votable": "votable",
    ".xml": "votable",
    ".parquet": "parquet",
    ".parq": "parquet",
    ".pq": "parquet",
}
#: Catalogues read in row chunks (larger than memory): the Parquet and FITS catalogue suffixes.
CHUNKED_FORMATS = {s: f for s, f in CATALOGUE_FORMATS.items() if f in ("parquet", "fits")}
#: Tables dustkit writes (exported models, estimates, feature lists): suffix -> format.
TABLE_FORMATS = {".ecsv": "ecsv", ".fits": "fits", ".fit": "fits", ".fts": "fits", ".csv": "csv"}
#: Figures (matplotlib ``savefig``): suffix -> format.
FIGURE_FORMATS = {".png": "png", ".pdf": "pdf", ".svg": "svg", ".eps": "eps"}

#: kind -> (suffix map, what the files are called in messages)
FORMATS = {
    "catalogue": (CATALOGUE_FORMATS, "catalogue"),
    "chunked": (CHUNKED_FORMATS, "out-of-core catalogue"),
    "table": (TABLE_FORMATS, "table"),
    "figure": (FIGURE_FORMATS, "figure"),
}


def suffixes(kind):
    """The suffixes of one kind of file, sorted."""
    return sorted(FORMATS[kind][0])


def suffix_of(path, kind):
    """The registered suffix ``path`` ends in (longest match, case-insensitive), or None."""
    name = Path(os.fspath(path)).name.lower()
    for suffix in sorted(FORMATS[kind][0], key=len, reverse=True):
        if name.endswith(suffix):
            return suffix
    return None


def format_for(path, kind, strict=True):
    """The format of ``path`` from its suffix, for one kind of file.

    Raises
    ------
    FileFormatError
        The suffix is not registered for this kind (only when ``strict``; otherwise None
        is returned), naming the suffix and listing the accepted ones.
    """
    table, what = FORMATS[kind]
    suffix = suffix_of(path, kind)
    if suffix is not None:
        return table[suffix]
    if not strict:
        return None
    got = "".join(Path(os.fspath(path)).suffixes[-1:]).lower()
    raise FileFormatError(
        f"Cannot tell the {what} format of '{path}' from its suffix {got!r}. "
        f"Hint: the 'path' must end in one of {', '.join(suffixes(kind))}"
        + (", or pass format='ecsv', 'fits' or 'csv'." if kind == "table" else ".")
    )


def parquet_parts(folder):
    """The Parquet files of a catalogue folder, searched recursively, sorted by path.

    Files and folders whose names start with ``.`` or ``_`` are left out, as pyarrow's and
    Spark's readers of such folders do (``_temporary/`` of an unfinished write, ``_SUCCESS``,
    ``._part-0.parquet`` copies of macOS metadata, hidden temporary files): they hold no rows
    of the table, or rows it holds already.
    """
    folder = Path(os.fspath(folder))
    return sorted(
        q for q in folder.rglob("*")
        if q.is_file() and format_for(q, "catalogue", strict=False) == "parquet"
        and not any(part.startswith((".", "_")) for part in q.relative_to(folder).parts)
    )


def check_target(path, overwrite):
    """Return ``path`` as a Path after checking its folder exists and overwriting is allowed.

    Raises
    ------
    ModelFileError
        Not a path; :class:`~dustkit.exceptions.OutputFolderError` when the folder is
        missing or the path is a folder, :class:`~dustkit.exceptions.OutputExistsError`
        when the file exists and ``overwrite`` is false.
    """
    if not isinstance(path, (str, os.PathLike)):
        raise ModelFileError(f"The output path must be a file name; got {type(path).__name__} {path!r}.")
    path = Path(path).expanduser()
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise OutputFolderError(
            f"Cannot write '{path}': the folder '{folder}' does not exist. Hint: create it first."
        )
    if path.is_dir():
        raise OutputFolderError(f"Cannot write '{path}': it is a folder. Hint: give a file name.")
    if path.exists() and not overwrite:
        raise OutputExistsError(
            f"'{path}' already exists; dustkit does not overwrite files unless asked. "
            "Hint: pass overwrite=True (on the command line: --overwrite), or choose another name."
        )
    return path


def file_mode(path):
    """The permission bits a plain write of ``path`` would give (kept when it exists)."""
    if path.exists():
        return path.stat().st_mode & 0o7777
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


def atomic_write(path, write, overwrite=False, what="file"):
    """Write through ``write(tmp_path)`` into a temporary file beside ``path``, then replace ``path``.

    Any failure removes the temporary file and leaves an existing ``path`` untouched; a
    failure that is not a dustkit error is raised as :class:`~dustkit.exceptions.ModelFileError`
    naming the file and a hint.
    """
    path = check_target(path, overwrite)
    folder = path.parent if str(path.parent) else Path(".")
    suffix = "".join(path.suffixes[-1:])
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=f".part{suffix}", dir=folder)
    os.close(fd)
    os.unlink(tmp)  # writers (astropy, healpy, matplotlib) create the file themselves
    try:
        write(tmp)
        os.chmod(tmp, file_mode(path))
        os.replace(tmp, path)
    except BaseException as exc:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        if isinstance(exc, DustkitError) or not isinstance(exc, Exception):
            raise
        raise ModelFileError(
            f"Could not write the {what} '{path}': {type(exc).__name__}: {str(exc).rstrip('.')}. "
            + ("The existing file was left unchanged. " if path.exists() else "")
            + ("Hint: check the free space and permissions of the folder." if isinstance(exc, OSError)
               else "Hint: the data may hold values this format cannot store; try ECSV.")
        ) from exc
    return path
