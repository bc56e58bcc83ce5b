"""Guaranteed ranges and a sound error bound for generated code over a whole input box (the envelope).

Both exports that round (the float32 C code and the integer-only C code) are
bounded the same way. Let ``v_i`` be the exact output of layer ``i`` of the
network (real arithmetic, the float64 numbers of the model) and ``v~_i`` what
the generated code holds there. For every input ``x`` of the box
``[low, high]``:

1. **Ranges.** Interval bound propagation tightened by the backward linear
   relaxation (:func:`tinyprop.bounds._relax.tight_intervals`; Moore 1966,
   Gowal et al. 2018, Zhang et al. 2018) gives ``lo_i <= v_i <= hi_i``,
   enclosing the float64 evaluation too, sound under rounding (outward
   rounding and proven margins, see ``tinyprop.bounds``).
2. **Error.** ``E_i >= |v~_i - v_i|`` (per column) follows layer by layer:

   - input: ``E_0`` is the rounding of the input to the code's number type;
   - affine ``z = W x + b`` computed by the code as ``W~ x~ + b~`` plus a
     rounding ``r`` with ``|r| <= R``:
     ``v~ - v = W (x~ - x) + (W~ - W) x~ + (b~ - b) + r``, so
     ``E_out = |W| E_in + |W~ - W| (m_in + E_in) + |b~ - b| + R`` with
     ``m_in = max(|lo_in|, |hi_in|)``;
   - scaling ``y = x g + o``: the same with ``|g|`` for ``|W|``;
   - activation ``a = f(z)`` computed by the code as ``f(z~)`` plus an
     evaluation error ``<= R``: ``|f(z~) - f(z)| <= L |z~ - z|`` with ``L =
     max |f'|`` over ``[lo - E_in, hi + E_in]``, which holds both ``z`` and
     ``z~`` (from ``ActivationRules.derivative_range``, sound), so ``E_out =
     L E_in + R``.

   ``R`` is what each export adds (:func:`integer_sources`,
   :func:`float_sources`), plus the rounding of ``Network.predict`` itself in
   float64 (``gamma_n (|W| m_in + |b|)`` per affine step, Higham, *Accuracy and
   Stability of Numerical Algorithms*, 2nd ed., section 3.1, eq. 3.4-3.5, and
   ``c u |a|`` per activation as in :func:`~tinyprop.export.agreement_bound`),
   so the final ``E`` bounds ``|code - Network.predict|`` in float64 directly.
3. **Through the slopes.** The bound on the outputs is the smaller of the
   final ``E`` and ``sum_k S_k r_k``: each layer's local error ``r_k`` (the
   ``R`` above) times bounds ``S_k`` on the slopes of the rest of the
   network over ``[lo_k - E_k, hi_k + E_k]`` (a telescoping sum and the mean
   value theorem, :func:`_through_slopes`), which keeps the signs of the
   later weights together instead of multiplying ``|W|`` layer by layer.
4. The bound is computed in float64 from non-negative terms: each ``E_out``
   is multiplied by ``1 + 2 gamma_(n+8)`` (the relative error of evaluating a
   sum of ``n + 8`` non-negative products) and rounded up with ``nextafter``.

The values the generated code holds after layer ``i`` lie in
``[lo_i - E_i, hi_i + E_i]``: the guaranteed range the integer export checks
against each number format.
"""

from __future__ import annotations

import copy
import time
from dataclasses import dataclass
from typing import Any, Callable, Sequence

import numpy as np

from .._words import count
from ..activations import declared
from ..bounds._arith import FLOAT64, down, magnitude, up
from ..bounds._program import Intervals, Program
from ..bounds._relax import tight_intervals
from ..bounds._slopes import gradient_intervals
from ..network import Network
from ._plan import ActivationStep, AffineStep, Plan, ScalingStep

__all__ = ["as_box", "Ranges", "reference_ranges", "propagate_error", "reference_rounding"]

FUNCTION_ULPS = 4.0  # accuracy assumed for exp, tanh, log1p (as agreement_bound's default)


def as_box(envelope: Any, n_in: int) -> tuple[np.ndarray, np.ndarray]:
    """``(low, high)`` float64 arrays of length ``n_in`` from an object with ``.low``/``.high`` or a pair.

    Refuses non-finite ends and ``low > high``, naming the input.
    """
    if hasattr(envelope, "low") and hasattr(envelope, "high"):
        low, high = envelope.low, envelope.high
    elif isinstance(envelope, (tuple, list)) and len(envelope) == 2:
        low, high = envelope
    else:
        raise TypeError("envelope must have .low and .high (an Envelope) or be a (low, high) pair of sequences, "
                        f"got {type(envelope).__name__}")
    ends = []
    for label, values in (("low", low), ("high", high)):
        try:
            array = np.array(values, dtype=np.float64).reshape(-1)
        except (TypeError, ValueError):
            raise TypeError(f"envelope {label} must be a sequence of {n_in} numbers, got {values!r}") from None
        if array.shape != (n_in,):
            raise ValueError(f"envelope {label} must have {count(n_in, 'entry', 'entries')} (one per input), "
                             f"got {array.size}")
        if not np.isfinite(array).all():
            raise ValueError(f"envelope {label} must be finite, got {float(array[~np.isfinite(array)][0])!r} "
                             f"at input {int(np.flatnonzero(~np.isfinite(array))[0])}")
        ends.append(array)
    wrong = np.flatnonzero(ends[0] > ends[1])
    if wrong.size:
        j = int(wrong[0])
        raise ValueError(f"envelope low must not exceed high; input {j} has low {float(ends[0][j])!r} "
                         f"> high {float(ends[1][j])!r}")
    return ends[0], ends[1]


@dataclass(frozen=True)
class Ranges:
    """Guaranteed ``lo[i] <= v_i <= hi[i]`` of the float64 network over the box (input, then each layer)."""

    lo: list[np.ndarray]
    hi: list[np.ndarray]
    program: Program
    seconds: float

    def magnitude(self, i: int) -> np.ndarray:
        return magnitude(self.lo[i], self.hi[i])


def reference_ranges(net: Network, low: np.ndarray, high: np.ndarray) -> Ranges:
    """Interval propagation tightened by linear relaxation, one box, no splitting."""
    start = time.perf_counter()
    program = Program(net if net.dtype == np.float64 else net.copy(dtype=np.float64))
    found = tight_intervals(program, low[None, :], high[None, :])
    return Ranges([a[0] for a in found.lo], [a[0] for a in found.hi], program, time.perf_counter() - start)


Sources = Callable[[int, np.ndarray, np.ndarray], np.ndarray]
"""``R_i(i, m_in, E_in)``: the error layer ``i`` of the code adds (input magnitude ``m_in``, error ``E_in``)."""


def propagate_error(plan: Plan, ranges: Ranges, input_error: np.ndarray, sources: Sources) -> list[np.ndarray]:
    """``E_0 = input_error`` and ``E_(i+1)`` after each step (see the module docstring); float64, rounded up.

    The last entry, the bound on the outputs, is the smaller of the recursion's
    and the sum of slopes times local errors (:func:`_through_slopes`).
    """
    errors = [np.asarray(input_error, dtype=np.float64)]
    local = []
    for i, step in enumerate(plan.steps):
        e = errors[-1]
        m = ranges.magnitude(i)
        if isinstance(step, AffineStep):
            spread = e @ np.abs(step.weight.astype(np.float64)).T
            n = step.weight.shape[1]
        elif isinstance(step, ScalingStep):
            spread = np.abs(step.gain.astype(np.float64)) * e
            n = 1
        else:
            rules = ranges.program.steps[i].rules
            d_lo, d_hi = rules.derivative_range(ranges.lo[i] - e, ranges.hi[i] + e)
            spread = magnitude(d_lo, d_hi) * e
            n = 1
        local.append(sources(i, m, e) + reference_rounding(plan, ranges, i))
        errors.append(up((spread + local[-1]) * (1.0 + 2.0 * FLOAT64.gamma(n + 8))))
    errors[-1] = np.minimum(errors[-1], _through_slopes(ranges, errors, local))
    return errors


def _through_slopes(ranges: Ranges, errors: list[np.ndarray], local: list[np.ndarray]) -> np.ndarray:
    """``sum_k S_k r_k``: each local error ``r_k`` carried to the outputs by the slopes of the layers after it.

    With ``G_k`` the exact network from layer ``k`` on, ``F_k`` layer ``k``
    and ``v~_k`` the code's values, ``v~_n - y = sum_k [G_k(v~_k) -
    G_k(F_k(v~_(k-1)))] + [G_0(v~_0) - G_0(x)]`` (a telescoping sum), and
    ``|G_k(a) - G_k(b)| <= S_k |a - b|`` by the mean value theorem (integral
    form, also across ReLU kinks), with ``S_k >= |d G_k / d v|`` over the box
    ``[lo_k - E_k, hi_k + E_k]``, which holds both ``a`` and ``b``. ``S_k``
    comes from the delta recursion in interval arithmetic
    (:func:`tinyprop.bounds._slopes.gradient_intervals`) on interval
    propagation from that box; ``|a - b| <= r_k``, the local error.
    """
    program = ranges.program
    n = len(program.steps)
    perturbations = [errors[0]] + local  # the input's, then each step's, as seen at the next step's input
    total = np.array(perturbations[n], dtype=np.float64)
    terms = 1
    for k in range(n):
        found = Intervals([down(ranges.lo[k] - errors[k])[None, :]], [up(ranges.hi[k] + errors[k])[None, :]], {}, {})
        for i in range(k, n):
            program.advance(found, i)
        later = copy.copy(program)
        later.steps = program.steps[k:]
        later.n_in = found.lo[0].shape[1]
        slopes = np.stack([magnitude(*gradient_intervals(later, found, m))[0] for m in range(program.n_out)])
        total = total + slopes @ perturbations[k]
        terms += slopes.shape[1]
    return up(total * (1.0 + 2.0 * FLOAT64.gamma(terms + 2)))


def reference_rounding(plan: Plan, ranges: Ranges, i: int) -> np.ndarray:
    """How far ``Network.predict`` (float64) may lie from the exact value of step ``i``, from its input range."""
    step, m = plan.steps[i], ranges.magnitude(i)
    u, tiny = FLOAT64.u, FLOAT64.tiny
    if isinstance(step, AffineStep):
        W = np.abs(step.weight.astype(np.float64))
        b = np.zeros(W.shape[0]) if step.bias is None else np.abs(step.bias.astype(np.float64))
        n = W.shape[1] + 1
        return FLOAT64.gamma(n) * (m @ W.T + b) + n * tiny
    if isinstance(step, ScalingStep):
        return FLOAT64.gamma(2) * (m * np.abs(step.gain.astype(np.float64)) + np.abs(step.offset)) + 2 * tiny
    return activation_rounding(step, ranges.magnitude(i + 1), u, tiny)


def activation_rounding(step: ActivationStep, out_magnitude: np.ndarray, u: float, tiny: float) -> np.ndarray:
    """``c u |a| + c tiny``: one evaluation's error, ``c`` from the activation's declared ``_rounding``."""
    constants = declared(step.activation, "_rounding", FUNCTION_ULPS)
    if constants is None:
        raise TypeError(f"layer {step.layer} is {type(step.activation).__name__}, whose rounding is undeclared; "
                        "the envelope bound needs a built-in activation")
    return constants[1] * (u * out_magnitude + tiny)


def widest_magnitude(ranges: Ranges, errors: Sequence[np.ndarray], i: int) -> np.ndarray:
    """``max(|lo_i - E_i|, |hi_i + E_i|)``: the largest magnitude the code can hold after step ``i - 1``."""
    return magnitude(ranges.lo[i] - errors[i], ranges.hi[i] + errors[i])
