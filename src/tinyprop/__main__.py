"""``python -m tinyprop``: the ``tinyprop`` command (see :mod:`tinyprop.cli`).

``python -m`` puts the current folder at the front of ``sys.path``; the
installed ``tinyprop`` script does not. That entry is removed here, so both
find the same modules (``--import`` of a module name in particular): neither
searches the current folder unless it is on ``PYTHONPATH``.
"""

import sys

if not getattr(sys.flags, "safe_path", False):  # python -P / PYTHONSAFEPATH (3.11+): nothing was put there
    del sys.path[0]

from tinyprop.cli import main  # noqa: E402  (after the sys.path change, as the script would import it)

raise SystemExit(main())
