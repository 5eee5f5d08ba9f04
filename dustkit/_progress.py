"""Old module path, kept so existing imports keep working: ``dustkit._progress`` *is* ``dustkit._lib.progress``."""

import importlib
import sys

sys.modules[__name__] = importlib.import_module("dustkit._lib.progress")
