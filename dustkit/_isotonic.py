"""Old module path, kept so existing imports keep working: ``dustkit._isotonic`` *is* ``dustkit._lib.isotonic``."""

import importlib
import sys

sys.modules[__name__] = importlib.import_module("dustkit._lib.isotonic")
