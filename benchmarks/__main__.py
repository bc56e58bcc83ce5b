"""``python -m tinyprop.benchmarks``: run the bundled benchmark."""

import sys

from .run import main

sys.exit(main())
