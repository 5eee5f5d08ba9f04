"""dustkit's public exception and warning classes (``dustkit.exceptions``).

This module imports nothing from the rest of dustkit: it is the bottom of the package.

Every error carries the offending value and a hint, so a user can fix the input
without reading a traceback.
"""

__all__ = [
    "DustkitError",
    "ParameterError",
    "CatalogError",
    "LawRangeError",
    "ModelNotFittedError",
    "ModelFileError",
    "FileFormatError",
    "OutputExistsError",
    "OutputFolderError",
    "DustkitWarning",
    "AssumptionWarning",
    "RowsRejectedWarning",
    "DuplicatesWarning",
]


class DustkitError(Exception):
    """Base class of every error raised by dustkit."""


class ParameterError(DustkitError, ValueError):
    """A parameter has a value outside what it accepts."""


class CatalogError(DustkitError, ValueError):
    """A tracer catalogue cannot be used: a column is missing, unreadable or empty."""


class LawRangeError(DustkitError, ValueError):
    """An extinction law was asked for a wavelength or R_V outside its valid range."""


class ModelNotFittedError(DustkitError, RuntimeError):
    """A model was used before ``fit`` was called."""


class ModelFileError(DustkitError, OSError):
    """A model or table file is corrupt, foreign, or could not be written."""


class FileFormatError(ModelFileError, ParameterError, CatalogError):
    """A file name's suffix names no format dustkit reads or writes there; the message lists them.

    One error for every reader and writer (the file-format registry); it is also each of
    the errors a bad suffix raised before the registry (``ModelFileError`` from the table
    writers, ``ParameterError`` from ``save_figure``, ``CatalogError`` from the chunked
    readers), so existing ``except`` clauses keep working.
    """


class OutputExistsError(ModelFileError, FileExistsError):
    """An output file exists already and overwriting was not asked for."""


class OutputFolderError(ModelFileError, FileNotFoundError):
    """The folder of an output file does not exist (or the path names a folder)."""


class DustkitWarning(UserWarning):
    """Base class of dustkit's warnings."""


class AssumptionWarning(DustkitWarning):
    """dustkit assumed something the input did not say (a unit, a default error)."""


class RowsRejectedWarning(DustkitWarning):
    """Some input rows were rejected; the warning says how many and why."""


class DuplicatesWarning(DustkitWarning):
    """Some input rows repeat a tracer; the warning says how many and whether they were merged."""
