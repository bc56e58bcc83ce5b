"""Intervals of ``d output_k / d input`` over boxes: the delta recursion in interval arithmetic.

The same recursion as :meth:`tinyprop.Network.input_gradient` (see
``network.py``), seeded with ``delta = e_k`` at the output, with every
quantity an interval ``[lo, hi]`` per box:

- affine ``delta_x = delta_z W``: ``lo = lo_z W+ + hi_z W-``, ``hi = hi_z W+ + lo_z W-``
  (``W+``, ``W-`` the positive and negative parts of ``W``);
- activation ``delta_z = f'(z) delta_a``: the product of two intervals, with
  ``f'`` over the pre-activation interval from the declared shape;
- scaling ``delta_x = delta_y * gain``.

Each result is widened by the rounding of the network's own evaluation in its
dtype and of this float64 computation (``gamma_n`` of both times the sum of
the magnitudes of the terms, doubled), except where every term is known to
be ``>= 0`` (or ``<= 0``): round-to-nearest is monotone, so a computed sum of
non-negative products is never negative, and the lower end then stays at 0
or above. That keeps the certificate for networks built monotone, whose
input gradient is ``>= 0`` exactly.
"""

from __future__ import annotations

import numpy as np

from ._arith import FLOAT64, down, magnitude, up
from ._program import AffineStep, Intervals, Program, ScalingStep


def gradient_intervals(program: Program, found: Intervals, k: int) -> tuple[np.ndarray, np.ndarray]:
    """``(lo, hi)``, each ``(B, n_in)``: bounds on ``d output_k / d input_j`` over each box."""
    net = program.rounding
    batch = found.lo[0].shape[0]
    lo = np.zeros((batch, program.n_out))
    lo[:, k] = 1.0
    hi = lo.copy()
    for i in range(len(program.steps) - 1, -1, -1):
        step = program.steps[i]
        if isinstance(step, AffineStep):
            w = step.weight
            plus, minus = np.maximum(w, 0.0), np.minimum(w, 0.0)
            new_lo = lo @ plus + hi @ minus
            new_hi = hi @ plus + lo @ minus
            size = magnitude(lo, hi) @ np.abs(w)
            n = w.shape[0] + 2
            margin = 2.0 * ((net.gamma(n) + FLOAT64.gamma(n)) * size + n * (net.tiny + FLOAT64.tiny))
            # exact signs: count the terms that could be negative (positive)
            could_fall = (lo < 0).astype(float) @ (w > 0) + (hi > 0).astype(float) @ (w < 0)
            could_rise = (hi > 0).astype(float) @ (w > 0) + (lo < 0).astype(float) @ (w < 0)
            lo, hi = _widen_keeping_sign(new_lo, new_hi, margin, could_fall == 0, could_rise == 0)
        elif isinstance(step, ScalingStep):
            lo, hi = _product(lo, hi, step.gain, step.gain, net)
        else:
            d_lo, d_hi = step.rules.derivative_range(found.lo[i], found.hi[i])
            lo, hi = _product(lo, hi, d_lo, d_hi, net)
    return lo, hi


def _product(a_lo, a_hi, b_lo, b_hi, net) -> tuple[np.ndarray, np.ndarray]:
    """Interval product, widened for one rounding in the network's dtype and in float64."""
    candidates = np.stack(np.broadcast_arrays(a_lo * b_lo, a_lo * b_hi, a_hi * b_lo, a_hi * b_hi))
    new_lo, new_hi = candidates.min(axis=0), candidates.max(axis=0)
    margin = 2.0 * ((2 * net.u + FLOAT64.u) * magnitude(new_lo, new_hi) + net.tiny + FLOAT64.tiny)
    a_zero = (a_lo == 0) & (a_hi == 0)
    b_zero = (b_lo == 0) & (b_hi == 0)
    non_negative = ((a_lo >= 0) & (b_lo >= 0)) | ((a_hi <= 0) & (b_hi <= 0)) | a_zero | b_zero
    non_positive = ((a_lo >= 0) & (b_hi <= 0)) | ((a_hi <= 0) & (b_lo >= 0)) | a_zero | b_zero
    return _widen_keeping_sign(new_lo, new_hi, margin, non_negative, non_positive)


def _widen_keeping_sign(lo, hi, margin, non_negative, non_positive) -> tuple[np.ndarray, np.ndarray]:
    lo, hi = down(lo - margin), up(hi + margin)
    lo = np.where(non_negative, np.maximum(lo, 0.0), lo)
    hi = np.where(non_positive, np.minimum(hi, 0.0), hi)
    return lo, hi
