"""``python -m dustkit``: the same as the ``dustkit`` command."""

import sys

from .cli import main

__all__ = []

if __name__ == "__main__":
    sys.exit(main())
