"""Guarantees over an input box: sound bounds on a network's outputs and slopes.

- :func:`output_bounds`: guaranteed lower and upper bounds on every output;
- :func:`gradient_bounds`: guaranteed bounds on every ``d output_k / d input_j``,
  with monotonicity certificates (or witness pairs) and Lipschitz bounds;
- :func:`certificate`: both, as a reviewer's text and JSON-ready record.

The method, its sources and what is guaranteed are in ``docs/guarantees.md``.
Not certified for safety functions: validating a network against the applicable
functional-safety standards, local codes and qualified review is the user's
responsibility.
"""

from ._rules import UndeclaredActivation
from .certificate import Certificate, certificate
from .gradient import GradientBounds, gradient_bounds
from .output import OutputBounds, output_bounds

__all__ = [
    "Certificate",
    "GradientBounds",
    "OutputBounds",
    "UndeclaredActivation",
    "certificate",
    "gradient_bounds",
    "output_bounds",
]
