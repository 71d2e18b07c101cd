"""``python -m mapdyn`` = the ``mapdyn`` command."""

import sys

from mapdyn.cli import main

if __name__ == "__main__":
    sys.exit(main())
