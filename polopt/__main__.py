"""``python -m polopt ...`` is ``polopt ...``."""

import sys

from polopt.cli import main

sys.exit(main())
