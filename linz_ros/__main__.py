"""``python -m linz_ros`` runs the ``linz`` command."""

import sys

from linz_ros.cli import main

sys.exit(main())
