"""``python -m cladewise``: the command line."""

import sys

from cladewise.cli.main import main

sys.exit(main())
