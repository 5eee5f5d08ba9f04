"""Old module path, kept so existing imports keep working: ``dustkit._validation`` *is* ``dustkit._lib.validation``."""

import importlib
import sys

sys.modules[__name__] = importlib.import_module("dustkit._lib.validation")
