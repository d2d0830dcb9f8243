"""``python -m tolerance`` runs the command line."""

import sys

from tolerance.cli import main

sys.exit(main())
