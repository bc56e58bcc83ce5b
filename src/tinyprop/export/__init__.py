"""Dependency-free inference code generated from a network: C99 and plain Python.

- :func:`export_c` writes ``<name>.h`` and ``<name>.c`` (C99, ``<math.h>`` only);
- :func:`export_python` writes ``<name>.py`` (standard library ``math`` only);
- :func:`export_c_fixed_point` writes ``<name>.h`` and ``<name>.c`` with
  integer arithmetic only (``<stdint.h>``, int16 Q formats chosen from
  calibration rows) and returns a :class:`FixedPointReport` of the measured
  error against ``Network.predict``;
- :func:`agreement_bound` gives the tolerance for comparing the generated
  code's results with ``Network.predict``; :func:`envelope_error_bound` bounds
  the float code's difference from the float64 network over a whole input box
  (``export_c_fixed_point(..., envelope=...)`` does the same for the integer code);
- :func:`check_name` checks a ``name`` for generated code before exporting.

Custom activations take part through the methods ``c_expression(ctype)`` and
``python_expression()`` (see :mod:`tinyprop.export._activations` and
``docs/export.md``).

Not certified for safety functions: validation on the target hardware and
against the applicable functional-safety standards, local codes and qualified
review is the user's responsibility.
"""

from ._identifiers import check_name
from .bound import agreement_bound
from .c99 import export_c
from .envelope_bound import ErrorBoundWarning, envelope_error_bound
from .fixed_point import FixedPointReport, StepFormat, export_c_fixed_point
from .python import export_python

__all__ = [
    "agreement_bound",
    "check_name",
    "envelope_error_bound",
    "ErrorBoundWarning",
    "export_c",
    "export_c_fixed_point",
    "export_python",
    "FixedPointReport",
    "StepFormat",
]
