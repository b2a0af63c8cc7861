"""``python -m benchmarks``: see :mod:`benchmarks.cli` for the options."""

import sys

from benchmarks.cli import main

sys.exit(main())
