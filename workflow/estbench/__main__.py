"""``python -m estbench``: the same as the ``estbench`` command."""

import sys

from estbench.app.cli import main

sys.exit(main())
