"""``python -m tallgam`` runs the command line."""

import sys

from tallgam.cli import main

sys.exit(main())
