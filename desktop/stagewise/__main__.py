"""``python -m stagewise`` runs the command line."""

import sys

from stagewise.cli import main

sys.exit(main())
