"""``python -m stopwise`` runs the command line."""

import sys

from stopwise.cli import main

sys.exit(main())
