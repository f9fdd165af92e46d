"""``python -m bucksim`` runs the command-line tool."""

import sys

from bucksim.cli.main import main

sys.exit(main())
