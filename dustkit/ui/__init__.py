"""Interactive notebook tools (ipywidgets). The only part of dustkit that imports ipywidgets.

>>> from dustkit.ui import Explorer          # doctest: +SKIP
>>> Explorer.from_file("clusters.ecsv")      # doctest: +SKIP
"""

from .explorer import Explorer

__all__ = ["Explorer"]
