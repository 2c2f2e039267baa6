"""`python -m server.cli` runs the `vigil` command."""

import sys

from server.cli import main

sys.exit(main())
