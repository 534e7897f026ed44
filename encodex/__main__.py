"""``python -m encodex`` runs the command line."""

import sys

from encodex.cli import main

if __name__ == "__main__":
    sys.exit(main())
