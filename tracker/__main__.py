"""``python -m tracker`` runs the command line."""

import sys

from tracker.cli import main

sys.exit(main())
