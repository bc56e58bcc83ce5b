"""How far two correct evaluations of a network may differ: the tolerance for checking exported code.

``Network.predict`` (numpy, BLAS) and the generated code perform the same
operations on the same numbers, but BLAS may sum a dot product in another
order or with fused multiply-adds, and numpy's ``exp``/``tanh``/``log1p`` are
not the C library's. :func:`agreement_bound` bounds the resulting difference,
sample by sample, by first-order running error analysis with the unit
roundoff ``u = eps / 2`` of the dtype:

- affine ``z = W x + b`` (``n = n_in + 1`` terms): each evaluation is within
  ``gamma_n (|W| |x| + |b|)`` of the exact result for its own input, in any
  summation order, with or without fused multiply-add, where ``gamma_n = n u /
  (1 - n u)`` (Higham, *Accuracy and Stability of Numerical Algorithms*,
  2nd ed., section 3.1, eq. 3.4-3.5). Two evaluations whose inputs differ by
  ``e`` differ by at most ``|W| e + 2 gamma_n (|W| |x| + |b|)``;
- scaling ``x * gain + offset`` (two roundings): ``|gain| e + 2 gamma_2 (|x gain| + |offset|)``;
- activation: ``L e + 2 c u |a|`` with ``L`` the Lipschitz constant of ``f``
  and ``c`` the relative error of one evaluation in units of ``u``, from the
  operations of the stable form and ``k = function_ulps`` ulps (one ulp is at
  most ``2 u |a|``) per call of ``exp``, ``tanh`` or ``log1p``. Each activation
  class declares its pair as ``_rounding(k)`` in :mod:`tinyprop.activations`, the
  count beside it (Sigmoid: ``L = 1/4``, ``c = 3k + 2`` for ``e = exp(-|z|)``, then
  ``1 + e`` and one division; ReLU: ``L = 1``, ``c = 0``, exact).

Near underflow a result can lose its relative accuracy, so every rounding also
gets an absolute allowance of one smallest subnormal. The sums over the
bound's own terms are evaluated in float64 and the bound is multiplied by 1.01
to cover the neglected second-order terms (of relative size ``n u``).

The bound assumes IEEE 754 arithmetic in the dtype (no wider intermediate
precision, as on x87 with ``FLT_EVAL_METHOD == 2``, which can only make the
exported result more accurate, but not within this bound by proof) and that
``exp``, ``tanh``, ``log1p`` are accurate to ``function_ulps`` on both sides.
The default of 4 ulps covers the figures published for glibc (the "Errors in
Math Functions" table of the glibc manual lists at most 2 ulps for these
functions on x86_64, from memory) and numpy's own float32 kernels (documented
in numpy's source at up to about 4 ulps, from memory); the tests confirm it on
the test machine.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .._validate import as_samples
from ..activations import Activation, declared
from ..network import Network
from ._plan import ActivationStep, AffineStep, ScalingStep, make_plan

__all__ = ["agreement_bound"]

_SECOND_ORDER = 1.01


def agreement_bound(net: Network, X: Any, *, dtype: Any = None, function_ulps: float = 4.0) -> np.ndarray:
    """Bound on ``|y_a - y_b|`` for two evaluations of ``net`` at ``X`` in ``dtype``.

    Parameters
    ----------
    net:
        A network with built-in activations only (the bound needs each
        activation's Lipschitz constant and rounding behaviour).
    X:
        Inputs ``(n, n_in)``.
    dtype:
        The arithmetic of both evaluations; defaults to ``net.dtype``. Use the
        ``dtype`` the code was exported with.
    function_ulps:
        Accuracy, in units in the last place, of ``exp``, ``tanh`` and
        ``log1p`` in each evaluation.

    Returns
    -------
    An array ``(n, n_out)`` of non-negative bounds, one per output.

    >>> import numpy as np, tinyprop as tp
    >>> net = tp.Network([tp.Affine(2, 1)], seed=0, init=None)
    >>> net.set_vector([1.0, 1.0, 0.0])
    >>> float(tp.agreement_bound(net, [[1.0, 1.0]])[0, 0]) < 4 * float(np.spacing(2.0))  # a few ulp of 2.0
    True
    """
    dtype = np.dtype(net.dtype if dtype is None else dtype)
    plan = make_plan(net, dtype)
    if not (np.isfinite(function_ulps) and function_ulps >= 0):
        raise ValueError(f"function_ulps must be a finite number >= 0, got {function_ulps!r}")
    u = float(np.finfo(dtype).eps) / 2
    tiny = float(np.finfo(dtype).smallest_subnormal)
    x = as_samples(X, "X", plan.n_in, dtype).astype(np.float64)
    error = np.zeros_like(x)
    for step in plan.steps:
        if isinstance(step, AffineStep):
            W = step.weight.astype(np.float64)
            b = np.zeros(W.shape[0]) if step.bias is None else step.bias.astype(np.float64)
            n = W.shape[1] + 1
            gamma = n * u / (1 - n * u)
            magnitude = np.abs(x) @ np.abs(W).T + np.abs(b)
            error = error @ np.abs(W).T + 2 * gamma * magnitude + 2 * n * tiny
            x = x @ W.T + b
        elif isinstance(step, ScalingStep):
            gain, offset = step.gain.astype(np.float64), step.offset.astype(np.float64)
            gamma = 2 * u / (1 - 2 * u)
            error = np.abs(gain) * error + 2 * gamma * (np.abs(x * gain) + np.abs(offset)) + 4 * tiny
            x = x * gain + offset
        else:
            lipschitz, units = _activation_constants(step, function_ulps)
            x = step.activation.value(x)
            error = lipschitz * error + 2 * units * (u * np.abs(x) + tiny)
    return _SECOND_ORDER * error


def _activation_constants(step: ActivationStep, k: float) -> tuple[float, float]:
    """``(L, c)``: Lipschitz constant and relative error in units of ``u`` (see the module docstring)."""
    act: Activation = step.activation
    constants = declared(act, "_rounding", k)
    if constants is None:
        raise TypeError(
            f"agreement_bound knows the built-in activations only; layer {step.layer} is "
            f"{type(act).__name__}, whose Lipschitz constant and rounding are unknown"
        )
    return constants
