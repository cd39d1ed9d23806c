"""``python -m stripstitch``: the command line (see stripstitch.cli)."""

import sys

from .cli import main

if __name__ == "__main__":
    sys.exit(main())
