"""The core stays numpy-only at import time (DESIGN: scipy only inside solve and check)."""

from __future__ import annotations

import subprocess
import sys


def test_import_tinyprop_does_not_import_scipy_or_matplotlib():
    code = (
        "import sys, tinyprop\n"
        "heavy = sorted({m.split('.')[0] for m in sys.modules} & {'scipy', 'matplotlib'})\n"
        "print(','.join(heavy))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == ""
