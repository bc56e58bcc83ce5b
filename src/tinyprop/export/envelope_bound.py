"""How far generated floating-point code can lie from the float64 network anywhere in an envelope.

:func:`envelope_error_bound` is the envelope version of
:func:`~tinyprop.export.agreement_bound`: one bound per output that holds for
*every* input of the box ``[low, high]``, not only at given rows. It follows
the recursion of :mod:`~tinyprop.export._envelope_error` with what the code
in ``dtype`` (unit roundoff ``u``, smallest subnormal ``t``) adds at each
layer (unit roundoff analysis of Higham, *Accuracy and Stability of Numerical
Algorithms*, 2nd ed., chapter 3: a dot product of ``n`` terms computed in any
order, with or without fused multiply-add, is within ``gamma_n = n u / (1 -
n u)`` times the sum of the terms' magnitudes, section 3.1, eq. 3.4-3.5):

- input ``x`` rounded to ``dtype``: ``E_0 = u max(|low|, |high|) + t``;
- affine ``z = W x + b`` computed as ``fl(W_d x~ + b_d)`` (``W_d``, ``b_d`` the
  numbers converted to ``dtype``, ``n = n_in + 1`` terms): ``R = |W_d - W|
  (m + E) + |b_d - b| + gamma_n (|W_d| (m + E) + |b_d|) + 2 n t``;
- scaling ``x g + o`` (two roundings): ``R = |g_d - g| (m + E) + |o_d - o| +
  gamma_2 (|g_d| (m + E) + |o_d|) + 4 t``;
- activation: ``R = c (u A + t)`` with ``c`` the activation's declared
  relative error in units of ``u`` (``_rounding``, with ``exp``, ``tanh``,
  ``log1p`` accurate to 4 ulps as ``agreement_bound`` assumes by default) and ``A`` the largest ``|f|`` over
  ``[lo - E, hi + E]``.

``m`` is the largest magnitude of the layer's input over the box (guaranteed
by interval bound propagation with linear relaxation) and ``E`` the error
bound at the input; the error is carried through each layer by ``|W|``,
``|g|`` or the largest ``|f'|`` over ``[lo - E, hi + E]``. The same
assumptions as :func:`~tinyprop.export.agreement_bound`: IEEE 754 arithmetic
in ``dtype`` without wider intermediates, and the math library's accuracy.

Not certified for safety functions: validation against the applicable
functional-safety standards, local codes and qualified review is the user's
responsibility.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ..bounds._arith import Rounding, magnitude
from ..network import Network
from ._envelope_error import activation_rounding, as_box, propagate_error, reference_ranges
from ._plan import AffineStep, ScalingStep, make_plan

__all__ = ["envelope_error_bound", "ErrorBoundWarning"]


class ErrorBoundWarning(UserWarning):
    """An export's proven error bound over the envelope exceeds the tolerance it was given."""


def envelope_error_bound(net: Network, envelope: Any, *, dtype: Any = "float32") -> np.ndarray:
    """Sound bound on ``|code in dtype - Network.predict in float64|`` over the whole envelope, per output.

    Parameters
    ----------
    net:
        A network with built-in activations (their rounding must be declared).
        It is not modified.
    envelope:
        The input box: an object with ``.low`` and ``.high`` (one entry per
        input), or a ``(low, high)`` pair of sequences.
    dtype:
        The number type of the generated code, ``"float32"`` (C ``float``,
        the default) or ``"float64"``; its numbers are ``net``'s converted to it
        as :func:`~tinyprop.export.export_c` converts them.

    Returns
    -------
    An array ``(n_out,)`` of non-negative bounds (see the module docstring for
    the derivation).

    >>> import numpy as np, tinyprop as tp
    >>> net = tp.Network([tp.Affine(2, 3), tp.Tanh(), tp.Affine(3, 1)], seed=0)
    >>> bound = tp.envelope_error_bound(net, ([-1.0, -1.0], [1.0, 1.0]))
    >>> bool(0 < bound[0] < 1e-5)
    True
    """
    dtype = np.dtype(dtype)
    if dtype not in (np.dtype(np.float32), np.dtype(np.float64)):
        raise ValueError(f"dtype must be float32 or float64, got {dtype}")
    plan, code = make_plan(net, np.dtype(np.float64)), make_plan(net, dtype)
    low, high = as_box(envelope, plan.n_in)
    ranges = reference_ranges(net, low, high)
    rounding = Rounding(dtype)
    u, tiny = rounding.u, rounding.tiny

    def sources(i: int, m: np.ndarray, e: np.ndarray) -> np.ndarray:
        exact, step = plan.steps[i], code.steps[i]
        reach = m + e
        if isinstance(step, AffineStep):
            assert isinstance(exact, AffineStep)
            W, W_d = exact.weight.astype(np.float64), step.weight.astype(np.float64)
            b = np.zeros(W.shape[0]) if exact.bias is None else exact.bias.astype(np.float64)
            b_d = np.zeros(W.shape[0]) if step.bias is None else step.bias.astype(np.float64)
            n = W.shape[1] + 1
            return (np.abs(W_d - W) @ reach + np.abs(b_d - b)
                    + rounding.gamma(n) * (np.abs(W_d) @ reach + np.abs(b_d)) + 2 * n * tiny)
        if isinstance(step, ScalingStep):
            assert isinstance(exact, ScalingStep)
            g, g_d = exact.gain.astype(np.float64), step.gain.astype(np.float64)
            o, o_d = exact.offset.astype(np.float64), step.offset.astype(np.float64)
            return (np.abs(g_d - g) * reach + np.abs(o_d - o)
                    + rounding.gamma(2) * (np.abs(g_d) * reach + np.abs(o_d)) + 4 * tiny)
        rules = ranges.program.steps[i].rules
        a_lo, a_hi = rules.value_range(ranges.lo[i] - e, ranges.hi[i] + e)
        return activation_rounding(step, magnitude(a_lo, a_hi), u, tiny)

    input_error = u * magnitude(low, high) + tiny if dtype != np.float64 else np.zeros(plan.n_in)
    return propagate_error(plan, ranges, input_error, sources)[-1]
