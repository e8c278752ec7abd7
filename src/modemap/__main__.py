"""``python -m modemap``: the command line (the same as the ``modemap`` command)."""

import sys

from modemap.app.cli import main

sys.exit(main())
