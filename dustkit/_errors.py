"""dustkit's exception and warning classes.

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
    "DustkitWarning",
    "AssumptionWarning",
    "RowsRejectedWarning",
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


class DustkitWarning(UserWarning):
    """Base class of dustkit's warnings."""


class AssumptionWarning(DustkitWarning):
    """dustkit assumed something the input did not say (a unit, a default error)."""


class RowsRejectedWarning(DustkitWarning):
    """Some input rows were rejected; the warning says how many and why."""
