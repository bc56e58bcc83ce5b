"""``python -m tinyprop``: the ``tinyprop`` command (see :mod:`tinyprop.cli`)."""

from tinyprop.cli import main

raise SystemExit(main())
