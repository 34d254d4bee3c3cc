"""``python -m linz_ros`` runs the ``linz`` command."""

import sys

from linz_ros.cli import main

if __name__ == "__main__":         # worker processes (spawn) import this module without running it
    sys.exit(main())
