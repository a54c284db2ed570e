"""``python -m simulated_rig``: serve a simulated board on a pseudo-terminal (see cli.py).

Public names: none (runs ``simulated_rig.cli.main``).
"""

import sys

from clampcore.simulated_rig.cli import main

sys.exit(main())
