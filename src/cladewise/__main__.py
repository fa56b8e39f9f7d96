"""``python -m cladewise``: the command line."""

import sys

from cladewise.cli import main

sys.exit(main())
