"""``python -m render`` is the same as the ``render`` command."""

import sys

from .cli import main

if __name__ == "__main__":
    sys.exit(main())
