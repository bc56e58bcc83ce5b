"""Bounds on one activation over intervals, derived from its declared shape.

Every rule here works for any activation that declares an
:class:`~tinyprop.activations.ActivationShape` (pieces cut at breakpoints, each
convex, concave or linear), elementwise over arrays of intervals ``[z_lo, z_hi]``:

- the range of ``f`` over ``[z_lo, z_hi]`` (interval arithmetic, Moore 1966);
- the range of ``f'`` over ``[z_lo, z_hi]``: ``f'`` is monotone on each piece, so its
  extremes are among ``f'(z_lo)``, ``f'(z_hi)`` and the one-sided values at the
  breakpoints inside;
- two lines ``alpha_L z + beta_L <= f(z) <= alpha_U z + beta_U`` on ``[z_lo, z_hi]``,
  the linear relaxation of Zhang et al. 2018 (NeurIPS, "Efficient neural
  network robustness certification with general activation functions").

Lines and the range of ``f`` rest on one sound rule, :meth:`ActivationRules.gap_extreme`:
the minimum (or maximum) of ``g(z) = f(z) - alpha z`` over ``[z_lo, z_hi]``. On a
piece where ``g`` is concave its minimum is at an end of the piece; where
``g`` is convex it lies above the tangent at any point ``z0`` of the piece:
``g(z) >= g(z0) + g'(z0) (z - z0)``, so its minimum over ``[a, b]`` is at least
``g(z0) + min(g'(z0) (a - z0), g'(z0) (b - z0))``. A bisection on the monotone
``f'`` puts ``z0`` near the stationary point, which makes the bound nearly
exact; wherever ``z0`` lands, the bound stays valid. The maximum is the mirror
image. The slopes are chosen for tightness only (a tangent at the middle of a
convex or concave piece, else the chord); any slope gives valid lines.

All bounds enclose both the exact ``f`` and its evaluation in the network's
dtype (``value_error``, ``derivative_error`` of the declared shape), and the
float64 rounding of the rule itself (see :mod:`tinyprop.bounds._arith`).
"""

from __future__ import annotations

import numpy as np

from ..activations import Activation, ActivationShape
from ._arith import FLOAT64, Rounding, down, magnitude, up

_BISECTION_STEPS = 10
_SAFETY = 8.0  # operations per rule, counted generously, in units of roundoff (float64)


class UndeclaredActivation(TypeError):
    """An activation without a declared shape cannot be bounded."""


def rules_for(activation: Activation, net: Rounding, where: str) -> "ActivationRules":
    """The rules of ``activation``, or :class:`UndeclaredActivation` naming what to declare."""
    shape = activation.declared_shape()
    if not isinstance(shape, ActivationShape):
        raise UndeclaredActivation(
            f"{where} is {type(activation).__name__}, which declares no shape for bounds: "
            "its declared_shape() must return a tinyprop.ActivationShape giving the breakpoints "
            "(inflection points and kinks), the curvature of each piece (1 convex, -1 concave, "
            "0 linear) and the rounding errors of value and derivative (see docs/guarantees.md); "
            f"got {shape!r}"
        )
    cls = type(activation)
    owner = _defined_in(cls, "declared_shape")
    for method in ("value", "derivative"):
        if _defined_in(cls, method) is not owner and issubclass(_defined_in(cls, method), owner):
            raise UndeclaredActivation(
                f"{where} is {cls.__name__}, which redefines {method}() but inherits declared_shape() from "
                f"{owner.__name__}; the declaration may not fit the new function: give {cls.__name__} its own "
                "declared_shape() (see docs/guarantees.md)"
            )
    return ActivationRules(activation, shape, net)


def _defined_in(cls: type, name: str) -> type:
    """The class in ``cls``'s method resolution order that defines ``name``."""
    return next(k for k in cls.__mro__ if name in k.__dict__)


class ActivationRules:
    """Range, derivative range and linear relaxation of one activation, elementwise."""

    def __init__(self, activation: Activation, shape: ActivationShape, net: Rounding) -> None:
        self.activation = activation
        self.shape = shape
        self.net = net
        self.edges = (-np.inf, *shape.breakpoints, np.inf)

    # ------------------------------------------------------------------ evaluation
    def f(self, z: np.ndarray) -> np.ndarray:
        return self.activation.value(z)

    def df(self, z: np.ndarray) -> np.ndarray:
        return self.activation.derivative(z, self.activation.value(z))

    def _pieces(self, z_lo: np.ndarray, z_hi: np.ndarray):
        """``(curvature, a, b, present)`` for each piece: ``[a, b]`` is the piece within ``[z_lo, z_hi]``."""
        for i, curvature in enumerate(self.shape.curvature):
            a = np.maximum(z_lo, self.edges[i])
            b = np.minimum(z_hi, self.edges[i + 1])
            yield curvature, a, b, a <= b

    # ------------------------------------------------------------------ the one rule
    def gap_extreme(self, z_lo: np.ndarray, z_hi: np.ndarray, alpha: np.ndarray, sign: int) -> np.ndarray:
        """Sound ``min`` (``sign=1``) or ``max`` (``sign=-1``) of ``f(z) - alpha z`` over ``[z_lo, z_hi]``.

        The float64 rounding of this rule is included (a margin of a few
        units of roundoff of the magnitudes that entered, ``scale``).
        """
        best = np.full(z_lo.shape, np.inf)  # of sign * g
        scale = np.zeros(z_lo.shape)
        for curvature, a, b, present in self._pieces(z_lo, z_hi):
            a = np.where(present, a, z_lo)
            b = np.where(present, b, z_lo)
            ga, gb = self.f(a) - alpha * a, self.f(b) - alpha * b
            candidate = np.minimum(sign * ga, sign * gb)
            scale = np.maximum(scale, np.maximum(np.abs(ga), np.abs(gb)))
            if curvature * sign > 0:  # sign*g convex on this piece: tangent from below
                z0 = self._stationary(a, b, alpha, curvature)
                slope = self.df(z0) - alpha
                g0 = self.f(z0) - alpha * z0
                tangent = sign * g0 + np.minimum(sign * slope * (a - z0), sign * slope * (b - z0))
                candidate = tangent
                width = b - a
                scale = np.maximum(scale, np.abs(g0) + (1.0 + np.abs(slope) + np.abs(alpha)) * width)
            best = np.where(present, np.minimum(best, candidate), best)
        error = self.shape.value_error + self.shape.derivative_error + _SAFETY
        scale = scale + 2.0 * np.abs(alpha) * magnitude(z_lo, z_hi)  # |f| + |alpha z| <= |g| + 2 |alpha z|
        margin = error * (FLOAT64.u * scale + FLOAT64.tiny)
        return sign * down(best - margin)

    def _stationary(self, a: np.ndarray, b: np.ndarray, alpha: np.ndarray, curvature: int) -> np.ndarray:
        """A point of ``(a, b)`` near where ``f' = alpha`` (``f'`` monotone there), by bisection."""
        lo, hi = a.copy(), b.copy()
        for _ in range(_BISECTION_STEPS):
            mid = 0.5 * lo + 0.5 * hi
            rising = curvature * (self.df(mid) - alpha) < 0  # the root lies above mid
            lo = np.where(rising, mid, lo)
            hi = np.where(rising, hi, mid)
        return np.clip(0.5 * lo + 0.5 * hi, a, b)  # (halving subnormals can land outside)

    # ------------------------------------------------------------------ what callers use
    def _evaluation_margin(self, biggest: np.ndarray) -> np.ndarray:
        """How far the network's evaluation of ``f`` may lie from ``f`` (``biggest >= |f|``)."""
        return self.shape.value_error * (self.net.u * biggest + self.net.tiny)

    def value_range(self, z_lo: np.ndarray, z_hi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Interval containing ``f(z)``, exact or as the network evaluates it, for ``z`` in ``[z_lo, z_hi]``."""
        zero = np.zeros(z_lo.shape)
        lo = self.gap_extreme(z_lo, z_hi, zero, 1)
        hi = self.gap_extreme(z_lo, z_hi, zero, -1)
        margin = self._evaluation_margin(magnitude(lo, hi))
        return down(lo - margin), up(hi + margin)

    def derivative_range(self, z_lo: np.ndarray, z_hi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Interval containing ``f'(z)``, exact or as the network evaluates it, for ``z`` in ``[z_lo, z_hi]``.

        Where every candidate is ``>= 0`` the lower end stays ``>= 0``: the
        declared shape promises that ``derivative`` is then never negative.
        """
        d_l, d_u = self.df(z_lo), self.df(z_hi)
        lo, hi = np.minimum(d_l, d_u), np.maximum(d_l, d_u)
        for point in self.shape.breakpoints:
            inside = (z_lo <= point) & (point <= z_hi)
            for z in (np.nextafter(point, -np.inf), point, np.nextafter(point, np.inf)):
                d = self.df(np.full(z_lo.shape, z))
                lo = np.where(inside, np.minimum(lo, d), lo)
                hi = np.where(inside, np.maximum(hi, d), hi)
        units = self.shape.derivative_error
        rounding = (self.net.u + FLOAT64.u) * np.maximum(1.0, magnitude(lo, hi)) + self.net.tiny + FLOAT64.tiny
        margin = units * rounding
        widened = down(lo - margin)
        lo = np.where(lo >= 0, np.maximum(widened, 0.0), widened)
        return lo, up(hi + margin)

    def lines(self, z_lo: np.ndarray, z_hi: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """``(alpha_L, beta_L, alpha_U, beta_U)``: ``alpha_L z + beta_L <= f(z) <= alpha_U z + beta_U``.

        The lines hold on ``[z_lo, z_hi]`` and also enclose the network's
        evaluation of ``f`` at any ``z`` there; ``|f|`` there is at most the
        larger of the two lines' magnitudes.
        """
        alpha_lower, alpha_upper = self._slopes(z_lo, z_hi)
        beta_lower = self.gap_extreme(z_lo, z_hi, alpha_lower, 1)
        beta_upper = self.gap_extreme(z_lo, z_hi, alpha_upper, -1)
        z = magnitude(z_lo, z_hi)
        biggest = np.maximum(np.abs(alpha_lower) * z + np.abs(beta_lower), np.abs(alpha_upper) * z + np.abs(beta_upper))
        margin = self._evaluation_margin(biggest)
        return alpha_lower, down(beta_lower - margin), alpha_upper, up(beta_upper + margin)

    def _slopes(self, z_lo: np.ndarray, z_hi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Tangent at the middle on the side where one convex or concave piece allows it, else the chord."""
        mid = 0.5 * z_lo + 0.5 * z_hi
        width = z_hi - z_lo
        tangent = self.df(mid)
        with np.errstate(divide="ignore", invalid="ignore"):
            chord = (self.f(z_hi) - self.f(z_lo)) / width
        usable = width > 1e-12 * (1.0 + np.abs(mid))
        chord = np.where(usable & np.isfinite(chord), chord, tangent)
        lower, upper = chord.copy(), chord.copy()
        for curvature, a, b, present in self._pieces(z_lo, z_hi):
            alone = present & (a == z_lo) & (b == z_hi)  # [z_lo, z_hi] lies in this one piece
            if curvature > 0:
                lower = np.where(alone, tangent, lower)
            elif curvature < 0:
                upper = np.where(alone, tangent, upper)
        return lower, upper
