"""``python -m solver.cli``: the ``kktrace`` command."""

import sys

from solver.cli import main

sys.exit(main())
