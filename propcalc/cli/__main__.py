"""``python -m propcalc.cli``."""

import sys

from .program import main

sys.exit(main())
