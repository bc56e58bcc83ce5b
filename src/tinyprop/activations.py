"""Elementwise activations with closed-form derivatives.

An activation maps a pre-activation ``z`` to ``a = f(z)`` element by element.
The network's backward pass needs ``f'(z)``; :meth:`Activation.derivative`
receives both ``z`` and ``a`` so that derivatives that are cheapest in terms of
the output (sigmoid: ``a (1 - a)``, tanh: ``1 - a**2``) cost nothing extra.

Every built-in is written in a form that neither overflows nor warns for
``|z|`` up to 1e4 in float32 and float64, and returns arrays of ``z``'s dtype.

To write your own, subclass :class:`Activation`, implement ``value`` and
``derivative``, then verify the pair with :func:`tinyprop.check_activation`
(see ``docs/custom-activation.md``).

Every built-in derivative is written in terms of the output ``a`` alone. That
lets a training workspace (:class:`tinyprop.Workspace`) evaluate a built-in
activation in place over its pre-activation buffer and, in the backward
pass, turn the stored output into ``f'(z) * delta`` in that same buffer
(``_value_in_place`` / ``_delta_in_place``, same formulas, no new arrays;
``_delta_in_place(a, delta)`` leaves ``f'(z) * delta`` in ``a`` and may
overwrite ``delta``).
Custom activations keep ``z`` and ``a`` in separate arrays and need neither.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np

from ._settings_equality import Configured

__all__ = [
    "Activation",
    "ActivationShape",
    "Sigmoid",
    "Tanh",
    "ReLU",
    "LeakyReLU",
    "Softplus",
    "Identity",
    "BUILT_IN_ACTIVATIONS",
    "built_in_name",
]


_FUNCTION_ULPS = 4.0
"""Assumed accuracy of numpy's ``exp``, ``tanh``, ``log1p``, ``expm1`` (ulps; as in ``export/bound.py``)."""


@dataclass(frozen=True)
class ActivationShape:
    """What :mod:`tinyprop.bounds` must know about ``f`` to bound it soundly over an interval.

    ``breakpoints`` (strictly increasing) cut the real line into
    ``len(breakpoints) + 1`` pieces; ``curvature[i]`` says what ``f`` is on
    piece ``i``: ``1`` convex, ``-1`` concave, ``0`` linear. Put a breakpoint
    at every inflection point and every kink. Everything else is derived from
    this: on a piece, ``f'`` is monotone (non-decreasing where convex,
    non-increasing where concave), so the extremes of ``f`` and ``f'`` over an
    interval lie at its ends, at breakpoints inside it, or (for ``f``) where a
    tangent is horizontal, and a line lies below a convex piece exactly when
    it lies below some tangent.

    Assumed, and the user's promise for a custom activation: ``f`` is
    continuous; next to a breakpoint ``f'`` equals its one-sided limit (true
    when ``f'`` is constant or continuous near it); ``value`` is within
    ``value_error * (u |f(z)| + s)`` of ``f(z)`` and ``derivative`` within
    ``derivative_error * (u max(1, |f'(z)|) + s)`` of ``f'(z)``, where ``u`` is
    the unit roundoff and ``s`` the smallest subnormal of the dtype; and
    ``derivative`` is never negative where ``f'`` is not. The built-in figures
    count the operations of each stable formula, with 4 ulps per call of
    ``exp``, ``tanh``, ``log1p`` or ``expm1`` (as ``export/bound.py`` does).
    """

    breakpoints: tuple[float, ...]
    curvature: tuple[int, ...]
    value_error: float
    derivative_error: float

    def __post_init__(self) -> None:
        points = tuple(float(b) for b in self.breakpoints)
        if not all(np.isfinite(points)) or any(b >= c for b, c in zip(points, points[1:])):
            raise ValueError(f"breakpoints must be finite and strictly increasing, got {self.breakpoints!r}")
        if len(self.curvature) != len(points) + 1 or any(c not in (-1, 0, 1) for c in self.curvature):
            raise ValueError(
                f"curvature needs one entry of 1 (convex), -1 (concave) or 0 (linear) per piece, "
                f"{len(points) + 1} for {len(points)} breakpoints; got {self.curvature!r}"
            )
        for name in ("value_error", "derivative_error"):
            figure = getattr(self, name)
            if not (np.isfinite(figure) and figure >= 0):
                raise ValueError(f"{name} must be a finite number >= 0, got {figure!r}")
        object.__setattr__(self, "breakpoints", points)
        object.__setattr__(self, "curvature", tuple(int(c) for c in self.curvature))


class Activation(Configured):
    """Base class of elementwise activations ``a = f(z)``.

    Subclasses implement :meth:`value` and :meth:`derivative`. Both take and
    return arrays of the same shape and dtype as ``z`` and must not modify
    their arguments.

    ``kinks`` lists the points where ``f`` is not twice differentiable: where
    ``f`` itself has a corner (ReLU at 0) or where ``f'`` has one (softsign
    ``z / (1 + |z|)`` at 0). The derivative returned at a corner of ``f`` is a
    convention of the subclass. Numerical checks keep their difference steps
    from straddling a kink and, exactly on one, accept either one-sided
    derivative.
    """

    kinks: tuple[float, ...] = ()

    def declared_shape(self) -> ActivationShape | None:
        """Pieces, curvature and rounding of ``f`` for :func:`tinyprop.output_bounds`; ``None`` if undeclared."""
        return None

    def value(self, z: np.ndarray) -> np.ndarray:
        """Return ``f(z)`` elementwise."""
        raise NotImplementedError(f"{type(self).__name__} must implement value(z)")

    def derivative(self, z: np.ndarray, a: np.ndarray) -> np.ndarray:
        """Return ``f'(z)`` elementwise; ``a`` is ``value(z)``, already computed."""
        raise NotImplementedError(
            f"{type(self).__name__} must implement derivative(z, a)"
        )


class Sigmoid(Activation):
    """Logistic sigmoid.

    ``f(z) = 1 / (1 + exp(-z))``, ``f'(z) = f(z) (1 - f(z)) = a (1 - a)``.

    Evaluated as ``1 / (1 + e)`` for ``z >= 0`` and ``e / (1 + e)`` for ``z < 0``
    with ``e = exp(-|z|) <= 1``, so no exponential can overflow and large
    negative ``z`` gives a tiny positive number (or 0), never NaN.
    """

    def declared_shape(self) -> ActivationShape:
        """Convex below 0, concave above; ``exp``, one addition, one division; ``a (1 - a)``."""
        return ActivationShape((0.0,), (1, -1), 3 * _FUNCTION_ULPS + 2, 3 * _FUNCTION_ULPS + 4)

    def value(self, z: np.ndarray) -> np.ndarray:
        e = np.exp(-np.abs(z))
        return np.where(z >= 0, 1.0, e) / (1.0 + e)

    def derivative(self, z: np.ndarray, a: np.ndarray) -> np.ndarray:
        return a * (1.0 - a)

    def _value_in_place(self, z: np.ndarray) -> np.ndarray:
        z[...] = self.value(z)
        return z

    def _delta_in_place(self, a: np.ndarray, delta: np.ndarray) -> np.ndarray:
        delta *= a  # a delta
        np.subtract(1.0, a, out=a)  # 1 - a
        a *= delta  # a (1 - a) delta
        return a


class Tanh(Activation):
    """Hyperbolic tangent.

    ``f(z) = tanh(z)``, ``f'(z) = 1 - tanh(z)**2 = 1 - a**2``.
    """

    def declared_shape(self) -> ActivationShape:
        """Convex below 0, concave above; ``1 - a**2`` with ``a`` off by ``2k`` ulps."""
        return ActivationShape((0.0,), (1, -1), 2 * _FUNCTION_ULPS, 4 * _FUNCTION_ULPS + 2)

    def value(self, z: np.ndarray) -> np.ndarray:
        return np.tanh(z)

    def derivative(self, z: np.ndarray, a: np.ndarray) -> np.ndarray:
        return 1.0 - a * a

    def _value_in_place(self, z: np.ndarray) -> np.ndarray:
        return np.tanh(z, out=z)

    def _delta_in_place(self, a: np.ndarray, delta: np.ndarray) -> np.ndarray:
        np.multiply(a, a, out=a)
        np.subtract(1.0, a, out=a)  # 1 - a**2
        a *= delta
        return a


class ReLU(Activation):
    """Rectified linear unit.

    ``f(z) = max(z, 0)``, ``f'(z) = 1 if z > 0 else 0``.

    Convention at the kink: ``f'(0) = 0`` (the left derivative), so a unit
    whose pre-activation is exactly zero passes no gradient. From the output:
    ``f'(z) = 1`` exactly where ``a > 0``.
    """

    kinks = (0.0,)

    def declared_shape(self) -> ActivationShape:
        """Linear on each side of the kink; exact."""
        return ActivationShape((0.0,), (0, 0), 0.0, 0.0)

    def value(self, z: np.ndarray) -> np.ndarray:
        return np.maximum(z, 0.0, dtype=z.dtype)

    def derivative(self, z: np.ndarray, a: np.ndarray) -> np.ndarray:
        return (a > 0).astype(a.dtype)

    def _value_in_place(self, z: np.ndarray) -> np.ndarray:
        return np.maximum(z, 0.0, out=z)

    def _delta_in_place(self, a: np.ndarray, delta: np.ndarray) -> np.ndarray:
        np.greater(a, 0.0, out=a)  # 1.0 where a > 0, else 0.0
        a *= delta
        return a


class LeakyReLU(Activation):
    """Rectifier with a small slope for negative inputs.

    ``f(z) = z if z > 0 else slope * z``, ``f'(z) = 1 if z > 0 else slope``.

    Convention at the kink: ``f'(0) = slope`` (the left derivative). From the
    output (``slope >= 0``, so ``a > 0`` exactly where ``z > 0``):
    ``f'(z) = 1 if a > 0 else slope``.
    """

    kinks = (0.0,)

    def declared_shape(self) -> ActivationShape:
        """Linear on each side of the kink; ``slope`` rounded to the dtype, one multiplication."""
        return ActivationShape((0.0,), (0, 0), 2.0, 1.0)

    def __init__(self, slope: float = 0.01) -> None:
        slope = float(slope)
        if not np.isfinite(slope) or slope < 0.0:
            raise ValueError(f"LeakyReLU slope must be a finite number >= 0, got {slope!r}")
        self.slope = slope

    def value(self, z: np.ndarray) -> np.ndarray:
        return np.where(z > 0, z, z * z.dtype.type(self.slope))

    def derivative(self, z: np.ndarray, a: np.ndarray) -> np.ndarray:
        one, slope = a.dtype.type(1.0), a.dtype.type(self.slope)
        return np.where(a > 0, one, slope)

    def _value_in_place(self, z: np.ndarray) -> np.ndarray:
        z[...] = self.value(z)
        return z

    def _delta_in_place(self, a: np.ndarray, delta: np.ndarray) -> np.ndarray:
        a[...] = self.derivative(a, a)
        a *= delta
        return a

    def settings(self) -> dict[str, float]:
        return {"slope": self.slope}


class Softplus(Activation):
    """Smooth rectifier.

    ``f(z) = log(1 + exp(z))``, ``f'(z) = 1 / (1 + exp(-z))`` (the sigmoid).

    Evaluated as ``max(z, 0) + log1p(exp(-|z|))``, which cannot overflow and
    keeps full precision for large negative ``z``. From the output:
    ``exp(-a) = 1 / (1 + exp(z))``, so ``f'(z) = 1 - exp(-a) = -expm1(-a)``,
    accurate for tiny ``a`` too.
    """

    def declared_shape(self) -> ActivationShape:
        """Convex; ``log1p`` of ``exp`` plus one addition; ``-expm1(-a)``."""
        return ActivationShape((), (1,), 4 * _FUNCTION_ULPS + 1, 3 * _FUNCTION_ULPS + 2)

    def value(self, z: np.ndarray) -> np.ndarray:
        return np.maximum(z, 0.0, dtype=z.dtype) + np.log1p(np.exp(-np.abs(z)))

    def derivative(self, z: np.ndarray, a: np.ndarray) -> np.ndarray:
        return -np.expm1(-a)

    def _value_in_place(self, z: np.ndarray) -> np.ndarray:
        z[...] = self.value(z)
        return z

    def _delta_in_place(self, a: np.ndarray, delta: np.ndarray) -> np.ndarray:
        np.negative(a, out=a)
        np.expm1(a, out=a)  # -f'(z)
        np.negative(a, out=a)
        a *= delta
        return a


class Identity(Activation):
    """Identity (linear output).

    ``f(z) = z``, ``f'(z) = 1``.
    """

    def declared_shape(self) -> ActivationShape:
        """Linear; exact."""
        return ActivationShape((), (0,), 0.0, 0.0)

    def value(self, z: np.ndarray) -> np.ndarray:
        return z.copy()

    def derivative(self, z: np.ndarray, a: np.ndarray) -> np.ndarray:
        return np.ones_like(z)

    def _value_in_place(self, z: np.ndarray) -> np.ndarray:
        return z

    def _delta_in_place(self, a: np.ndarray, delta: np.ndarray) -> np.ndarray:
        np.copyto(a, delta)
        return a


BUILT_IN_ACTIVATIONS: tuple[type[Activation], ...] = (Sigmoid, Tanh, ReLU, LeakyReLU, Softplus, Identity)
"""The built-in activations, listed once. The model-file registry, the command line's
choices and the names in generated code are derived from it; ``tests/test_activations.py``
checks that every other table (generated code, the agreement bound, the fixed-point
export, the uncertainty hint) covers every entry. Every built-in evaluates in place."""


def built_in_name(cls: type[Activation]) -> str:
    """The short snake-case name of a built-in class: ``"leaky_relu"`` for LeakyReLU.

    >>> [built_in_name(cls) for cls in BUILT_IN_ACTIVATIONS]
    ['sigmoid', 'tanh', 'relu', 'leaky_relu', 'softplus', 'identity']
    """
    if cls not in BUILT_IN_ACTIVATIONS:
        raise ValueError(f"{cls!r} is not a built-in activation")
    return re.sub(r"(?<=[a-z])(?=[A-Z][a-z])", "_", cls.__name__).lower()


def works_in_place(activation: Activation) -> bool:
    """True for the built-in classes themselves (not subclasses, which may redefine ``value``)."""
    return type(activation) in BUILT_IN_ACTIVATIONS
