"""``python -m loopwright`` runs the command line."""

import sys

from loopwright.cli import main

sys.exit(main())
