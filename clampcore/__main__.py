"""``python -m clampcore``: the command line."""

import sys

from clampcore.cli import main

sys.exit(main())
