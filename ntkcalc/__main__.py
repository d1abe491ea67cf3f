"""``python -m ntkcalc``: the command line."""

import sys

from ._workflows.cli import main

if __name__ == "__main__":
    sys.exit(main())
