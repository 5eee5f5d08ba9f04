"""Old module path, kept so existing imports keep working: ``dustkit._errors`` *is* ``dustkit.exceptions``."""

import importlib
import sys

sys.modules[__name__] = importlib.import_module("dustkit.exceptions")
