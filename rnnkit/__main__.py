"""``python -m rnnkit``: the command line (rnnkit.cli)."""
import sys

from .cli import main

if __name__ == "__main__":
    sys.exit(main())
