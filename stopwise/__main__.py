"""``python -m stopwise`` runs the command line through the console command's launcher
(``stopwise_launch.main``), so an interrupt during start-up ends with one line and exit
130 (143 for SIGTERM) here too, never a traceback."""

import sys

from stopwise_launch import main

sys.exit(main())
