"""Rounding constants and outward rounding for bounds computed in float64.

Every bound in :mod:`tinyprop.bounds` is computed in float64 with numpy's
ordinary round-to-nearest arithmetic. Soundness comes from proven error
margins (Higham, *Accuracy and Stability of Numerical Algorithms*, 2nd ed.,
section 3.1: a sum of ``n`` products computed in any order, with or without
fused multiply-add, is within ``gamma_n = n u / (1 - n u)`` of the exact value
relative to the sum of the absolute values of its terms), doubled to cover the
rounding of the margins themselves, and from one final step of outward
rounding with ``np.nextafter``. The same margins, with the unit roundoff of
the network's dtype, cover the rounding of the network's own evaluation.
"""

from __future__ import annotations

import numpy as np

U64 = float(np.finfo(np.float64).eps) / 2
TINY64 = float(np.finfo(np.float64).smallest_subnormal)


class Rounding:
    """Unit roundoff ``u`` and smallest subnormal ``tiny`` of one dtype."""

    def __init__(self, dtype: np.dtype) -> None:
        info = np.finfo(dtype)
        self.dtype = np.dtype(dtype)
        self.u = float(info.eps) / 2
        self.tiny = float(info.smallest_subnormal)

    def gamma(self, n: int) -> float:
        """``gamma_n = n u / (1 - n u)``: relative error bound of an ``n``-term dot product."""
        return n * self.u / (1.0 - n * self.u)


FLOAT64 = Rounding(np.dtype(np.float64))


def down(x: np.ndarray) -> np.ndarray:
    """The next float64 below ``x`` (outward rounding of a lower bound)."""
    return np.nextafter(x, -np.inf)


def up(x: np.ndarray) -> np.ndarray:
    """The next float64 above ``x`` (outward rounding of an upper bound)."""
    return np.nextafter(x, np.inf)


def centre_radius(lo: np.ndarray, hi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``(c, r)`` with ``[c - r, c + r]`` containing ``[lo, hi]`` (``r`` rounded up)."""
    c = 0.5 * lo + 0.5 * hi
    return c, up(np.maximum(hi - c, c - lo))


def magnitude(lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """``max |x|`` over ``[lo, hi]``."""
    return np.maximum(np.abs(lo), np.abs(hi))


def widen(lo: np.ndarray, hi: np.ndarray, margin: np.ndarray | float) -> tuple[np.ndarray, np.ndarray]:
    """``[lo - margin, hi + margin]``, rounded outward."""
    return down(lo - margin), up(hi + margin)
