"""The bundled benchmark: speed and memory of tinyprop as ratios measured in one run.

Run it with ``tinyprop bench`` or ``python -m tinyprop.benchmarks``; see
``docs/benchmark.md`` for how to read each figure. ``handwritten.py`` is the
plain numpy training step that tinyprop's step is compared with.
"""

from .run import main, run, table

__all__ = ["main", "run", "table"]
