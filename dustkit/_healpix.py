"""Old module path, kept so existing imports keep working: ``dustkit._healpix`` *is* ``dustkit._lib.healpix``."""

import importlib
import sys

sys.modules[__name__] = importlib.import_module("dustkit._lib.healpix")
