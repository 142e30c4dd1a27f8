"""``python -m xtalkcal.cli``."""

import sys

from xtalkcal.cli.main import main

sys.exit(main())
