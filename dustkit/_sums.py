"""Old module path, kept so existing imports keep working: ``dustkit._sums`` *is* ``dustkit.build.statistics``."""

import importlib
import sys

sys.modules[__name__] = importlib.import_module("dustkit.build.statistics")
