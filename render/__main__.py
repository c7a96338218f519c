"""``python -m render`` is the same as the ``render`` command."""

import sys

from .cli import entry

if __name__ == "__main__":
    sys.exit(entry())
