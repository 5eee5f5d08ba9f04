"""Old module path, kept so existing imports keep working: ``dustkit._sums`` *is* ``dustkit.binned.statistics``."""

import importlib
import sys

sys.modules[__name__] = importlib.import_module("dustkit.binned.statistics")
