"""``python -m tallfit`` runs the command line."""

import sys

from tallfit.cli import main

sys.exit(main())
