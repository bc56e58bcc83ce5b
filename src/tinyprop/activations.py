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

import math
import re
from dataclasses import dataclass
from typing import Any, Callable

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
    "IntegerTable",
    "declaration",
    "declared",
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


@dataclass(frozen=True)
class IntegerTable:
    """How the fixed-point export tabulates ``f`` (``export/_fixed_tables.py``): ``kind`` names the C
    function and the symmetry (``"tanh"``: odd; ``"sigmoid"``: ``f(-u) = 1 - f(u)``), the knots are
    ``0, h, ..., intervals h`` with ``h = 2**-step_bits``, ``function`` is ``f`` on Python floats and
    ``max_second_derivative`` bounds ``|f''|`` (the interpolation error ``h**2/8 max|f''|``)."""

    kind: str
    step_bits: int
    intervals: int
    function: Callable[[float], float]
    max_second_derivative: float


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

    positively_homogeneous: bool = False
    """True when ``f(c z) = c f(z)`` for every ``c > 0`` (read by the uncertainty report's hint)."""

    suggested_init: str = "glorot"
    """The weight initialisation ``build_mlp(init="auto")`` picks for hidden layers of this activation."""

    def declared_shape(self) -> ActivationShape | None:
        """Pieces, curvature and rounding of ``f`` for :func:`tinyprop.output_bounds`; ``None`` if undeclared."""
        return None

    # What the exporters need, declared by each built-in (see DEVELOPERS.md, "Adding an activation").
    # ``None`` means undeclared: export then asks for the custom-activation protocol or refuses.
    # They are read through :func:`declaration`, so a subclass does not inherit them.

    def _c_statements(self, ctype: str, literal: Callable[[float], str]) -> str | None:
        """The statements of ``static ctype f(ctype z)``, the stable form operation for operation;
        ``literal`` writes a number as a C constant of ``ctype``."""
        return None

    def _c_input_limit(self, ctype: str) -> float | None:
        """The bound the generated C clamps ``z`` to (``|z| <= limit``) before calling the C function."""
        return None

    def _python_statements(self) -> str | None:
        """The statements of ``def f(z)`` on Python floats (``math`` imported)."""
        return None

    def _rounding(self, function_ulps: float) -> tuple[float, float] | None:
        """``(L, c)`` for ``agreement_bound``: the Lipschitz constant of ``f`` and the relative error
        of one evaluation in units of the unit roundoff, with ``function_ulps`` ulps per call of
        ``exp``, ``tanh`` or ``log1p`` (``export/bound.py``)."""
        return None

    def _fixed_point_form(self) -> IntegerTable | str | None:
        """The fixed-point export's form of ``f``: an :class:`IntegerTable`, or ``"identity"``,
        ``"relu"``, ``"leaky_relu"`` (computed in the input's format); ``None``: not supported."""
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

    def _c_statements(self, ctype: str, literal: Callable[[float], str]) -> str:
        f = "f" if ctype == "float" else ""
        zero, one = literal(0.0), literal(1.0)
        return (
            f"const {ctype} e = exp{f}(-fabs{f}(z));\n"
            f"return (z >= {zero} ? {one} : e) / ({one} + e);"
        )

    def _python_statements(self) -> str:
        return "e = math.exp(-abs(z))\nreturn (1.0 if z >= 0.0 else e) / (1.0 + e)"

    def _rounding(self, function_ulps: float) -> tuple[float, float]:
        """``L = 1/4``; ``e = exp(-|z|)``, then ``1 + e`` and one division: ``3k + 2``."""
        return 0.25, 3 * function_ulps + 2

    def _fixed_point_form(self) -> IntegerTable:
        """Knots 1/32 apart on ``[0, 16]``; ``max|f''| = 0.0963`` (``_fixed_tables.py``)."""
        return IntegerTable("sigmoid", 5, 512, _logistic, 0.0963)

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

    def _c_statements(self, ctype: str, literal: Callable[[float], str]) -> str:
        """``tanh(z)`` in ``double``; in ``float`` the rational form of ``export/_activations.py``."""
        return _float_tanh_statements(literal) if ctype == "float" else "return tanh(z);"

    def _c_input_limit(self, ctype: str) -> float | None:
        """The float form holds for ``|z| <= 9.5`` only; the clamp is a loop of its own (``docs/export.md``)."""
        return _TANH_FLOAT_LIMIT if ctype == "float" else None

    def _python_statements(self) -> str:
        return "return math.tanh(z)"

    def _rounding(self, function_ulps: float) -> tuple[float, float]:
        """``L = 1``; one call of ``tanh``: ``2k``."""
        return 1.0, 2 * function_ulps

    def _fixed_point_form(self) -> IntegerTable:
        """Knots 1/64 apart on ``[0, 8]``; ``max|f''| = 0.7699`` (``_fixed_tables.py``)."""
        return IntegerTable("tanh", 6, 512, math.tanh, 0.7699)

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
    positively_homogeneous = True
    suggested_init = "he"  # He et al. 2015, derived for rectifiers

    def declared_shape(self) -> ActivationShape:
        """Linear on each side of the kink; exact."""
        return ActivationShape((0.0,), (0, 0), 0.0, 0.0)

    def _c_statements(self, ctype: str, literal: Callable[[float], str]) -> str:
        """``z < 0 ? 0 : z``: a NaN input stays NaN."""
        return f"return z < {literal(0.0)} ? {literal(0.0)} : z;"

    def _python_statements(self) -> str:
        return "return 0.0 if z < 0.0 else z"

    def _rounding(self, function_ulps: float) -> tuple[float, float]:
        """``L = 1``; exact."""
        return 1.0, 0.0

    def _fixed_point_form(self) -> str:
        return "relu"

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
    positively_homogeneous = True
    suggested_init = "he"  # He et al. 2015, derived for rectifiers

    def declared_shape(self) -> ActivationShape:
        """Linear on each side of the kink; ``slope`` rounded to the dtype, one multiplication."""
        return ActivationShape((0.0,), (0, 0), 2.0, 1.0)

    def _c_statements(self, ctype: str, literal: Callable[[float], str]) -> str:
        """``z > 0 ? z : z * slope`` (slope rounded to the export dtype)."""
        return f"return z > {literal(0.0)} ? z : z * {literal(self.slope)};"

    def _python_statements(self) -> str:
        return f"return z if z > 0.0 else z * {float(self.slope)!r}"

    def _rounding(self, function_ulps: float) -> tuple[float, float]:
        """``L = max(1, slope)``; one multiplication."""
        return max(1.0, self.slope), 1.0

    def _fixed_point_form(self) -> str:
        """``z > 0 ? z : z * slope_q`` with the slope in Q15 (slope < 1)."""
        return "leaky_relu"

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

    def _c_statements(self, ctype: str, literal: Callable[[float], str]) -> str:
        f = "f" if ctype == "float" else ""
        zero = literal(0.0)
        return f"return (z < {zero} ? {zero} : z) + log1p{f}(exp{f}(-fabs{f}(z)));"

    def _python_statements(self) -> str:
        return "return (0.0 if z < 0.0 else z) + math.log1p(math.exp(-abs(z)))"

    def _rounding(self, function_ulps: float) -> tuple[float, float]:
        """``L = 1``; ``log1p`` of ``exp`` (condition <= 1), plus one addition: ``4k + 1``."""
        return 1.0, 4 * function_ulps + 1

    def _fixed_point_form(self) -> None:
        """Not supported: no integer form yet (``DEVELOPERS.md``, "Adding an activation")."""
        return None

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

    positively_homogeneous = True

    def declared_shape(self) -> ActivationShape:
        """Linear; exact."""
        return ActivationShape((), (0,), 0.0, 0.0)

    def _c_statements(self, ctype: str, literal: Callable[[float], str]) -> str:
        """``return z;`` (the exporters skip Identity steps altogether)."""
        return "return z;"

    def _python_statements(self) -> str:
        """``return z`` (the exporters skip Identity steps altogether)."""
        return "return z"

    def _rounding(self, function_ulps: float) -> tuple[float, float]:
        """``L = 1``; exact."""
        return 1.0, 0.0

    def _fixed_point_form(self) -> str:
        return "identity"

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
choices and the names in generated code are derived from it; everything else the library
knows about one is declared on its class (shape for bounds, C and Python forms, rounding for
the agreement bound, fixed-point form, positive homogeneity), and ``tests/test_activations.py``
checks that every entry declares all of it. Every built-in evaluates in place."""


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


def declaration(activation: Activation, method: str) -> Callable[..., Any] | None:
    """``activation``'s bound method ``method`` (an export declaration such as ``_c_statements``), or ``None``.

    Only the activation's own class counts: a subclass inherits no declaration, since it may
    change ``f`` (a subclass of Tanh is not exported as tanh). The method itself may still
    return ``None``: undeclared.
    """
    return getattr(activation, method) if method in type(activation).__dict__ else None


def declared(activation: Activation, method: str, *args: Any) -> Any:
    """What ``activation`` declares through ``method`` called with ``args``; ``None`` when undeclared
    (see :func:`declaration`)."""
    found = declaration(activation, method)
    return None if found is None else found(*args)


def _logistic(u: float) -> float:
    return 1.0 / (1.0 + math.exp(-u))


# Tanh in float C (see export/_activations.py): the clamp and the coefficients of
# D(w) = D0 + D1 w + D2 w^2 and Q(w) = 1 + Q1 w + Q2 w^2 + Q3 w^3; each is a float32 value.
_TANH_FLOAT_LIMIT = 9.5
_TANH_FLOAT_D = (0.0833332762, 0.0012311805, 2.61138166e-06)
_TANH_FLOAT_Q = (1.0, 0.114773773, 0.00138974877, 2.6951293e-06)


def _horner(coefficients: tuple[float, ...], variable: str, literal: Callable[[float], str]) -> str:
    """``c0 + v * (c1 + v * (c2 + ...))`` (at least two coefficients), each written by ``literal``."""
    text = f"{literal(coefficients[-2])} + {variable} * {literal(coefficients[-1])}"
    for c in reversed(coefficients[:-2]):
        text = f"{literal(c)} + {variable} * ({text})"
    return text


def _float_tanh_statements(literal: Callable[[float], str]) -> str:
    return "\n".join([
        f"/* tanh(z) for |z| <= {_TANH_FLOAT_LIMIT:g}: the caller clamps z to that range first (beyond 9.02",
        " * the float nearest to tanh(z) is +-1). h = 2 tanh(z/2) from a rational fit, then the",
        " * double-angle formula tanh(z) = 2 tanh(z/2) / (1 + tanh(z/2)^2) = h - h h^2 / (4 + h^2).",
        " * Error at most 2.06 ulp, tested at every float input against the C library's double",
        " * tanh (see tinyprop.export._activations). */",
        "const float w = z * z;",
        f"const float h = z - z * w * ({_horner(_TANH_FLOAT_D, 'w', literal)})",
        f"    / ({_horner(_TANH_FLOAT_Q, 'w', literal)});",
        "const float hh = h * h;",
        f"return h - h * (hh / ({literal(4.0)} + hh));",
    ])
