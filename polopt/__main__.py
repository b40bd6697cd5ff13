"""``python -m polopt ...`` is ``polopt ...``."""

import sys

from polopt.commands.main import main

sys.exit(main())
