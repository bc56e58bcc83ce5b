"""Every bound rule of tinyprop.bounds._rules encloses what it claims to (property tests, synthetic intervals).

For each built-in activation and two custom ones with declared shapes, on
intervals drawn by hypothesis: the linear relaxation lines enclose ``f`` on a
dense grid, at the tangent points and at the interval's ends; the value range
encloses ``f``; the derivative range encloses the activation's own derivative
and scipy's numerical derivative (``scipy.differentiate.derivative``, the
external reference), in float64 and as evaluated in float32.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st

import tinyprop as tp
from net_strategies import BUILT_IN_ACTIVATIONS
from tinyprop.bounds._arith import Rounding
from tinyprop.bounds._rules import rules_for


class Bump(tp.Activation):
    """Synthetic test activation ``f(z) = exp(-z**2)``, ``f'(z) = -2 z f(z)``: not monotone.

    Convex for ``|z| > 1/sqrt(2)``, concave between (``f'' = (4 z**2 - 2) f``).
    Rounding: ``exp`` amplifies the rounding of ``z * z`` by ``z**2``, so one
    evaluation is within about ``(z**2 + 6) u`` relative; declared for the
    intervals drawn here (``|z| <= 32``), with room to spare.
    """

    def value(self, z):
        return np.exp(-z * z)

    def derivative(self, z, a):
        return -2.0 * z * a

    def declared_shape(self):
        h = float(np.sqrt(0.5))
        return tp.ActivationShape((-h, h), (1, -1, 1), value_error=2100.0, derivative_error=2100.0)


class Softsign(tp.Activation):
    """Synthetic test activation ``f(z) = z / (1 + |z|)``, ``f'(z) = 1 / (1 + |z|)**2``.

    Convex below 0, concave above.
    """

    kinks = (0.0,)

    def value(self, z):
        return z / (1.0 + np.abs(z))

    def derivative(self, z, a):
        return 1.0 / ((1.0 + np.abs(z)) * (1.0 + np.abs(z)))

    def declared_shape(self):
        return tp.ActivationShape((0.0,), (1, -1), value_error=4.0, derivative_error=6.0)


ACTIVATIONS = (*BUILT_IN_ACTIVATIONS, tp.LeakyReLU(0.37), Bump(), Softsign())
NAMES = [repr(a) for a in ACTIVATIONS]


@st.composite
def intervals(draw):
    """Synthetic intervals: centres in [-12, 12], widths from 1e-9 to 20, sometimes on a breakpoint."""
    centre = draw(st.floats(-12, 12) | st.sampled_from([0.0, 0.7071067811865476, -0.7071067811865476]))
    width = draw(st.floats(1e-9, 20.0) | st.just(0.0))
    shift = draw(st.floats(0.0, 1.0))
    low = centre - shift * width
    return low, low + width


def _grid(low: float, high: float) -> np.ndarray:
    """2001 points of ``[low, high]`` with both ends and the middle (kept inside: halving subnormals underflows)."""
    points = np.concatenate([np.linspace(low, high, 2001), [low, high, low + 0.5 * (high - low)]])
    return np.unique(np.clip(points, low, high))


@pytest.mark.parametrize("activation", ACTIVATIONS, ids=NAMES)
@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@settings(max_examples=25, deadline=None)
@given(box=intervals())
def test_lines_and_ranges_enclose_f(activation, dtype, box):
    low, high = box
    rules = rules_for(activation, Rounding(np.dtype(dtype)), "test")
    z_lo, z_hi = np.array([low]), np.array([high])
    alpha_l, beta_l, alpha_u, beta_u = rules.lines(z_lo, z_hi)
    v_lo, v_hi = rules.value_range(z_lo, z_hi)
    z = _grid(low, high)
    # the tangent points: where f' equals a line's slope (on the grid, the nearest points)
    d = activation.derivative(z, activation.value(z))
    touching = [z[np.argmin(np.abs(d - alpha_l[0]))], z[np.argmin(np.abs(d - alpha_u[0]))]]
    z = np.concatenate([z, touching])
    rounded = z.astype(dtype)
    at = rounded.astype(np.float64)  # (a float32 array compares with a Python float in float32)
    rounded = rounded[(at >= low) & (at <= high)]  # points the network may see, as it evaluates f
    evaluated = [(z, activation.value(z)), (rounded.astype(np.float64), activation.value(rounded).astype(np.float64))]
    for at, f in evaluated:
        assert np.all(f >= alpha_l[0] * at + beta_l[0])
        assert np.all(f <= alpha_u[0] * at + beta_u[0])
        assert np.all((f >= v_lo[0]) & (f <= v_hi[0]))


@pytest.mark.parametrize("activation", ACTIVATIONS, ids=NAMES)
@settings(max_examples=25, deadline=None)
@given(box=intervals())
def test_derivative_range_encloses_derivatives(activation, box):
    from scipy.differentiate import derivative

    low, high = box
    for dtype in (np.float64, np.float32):
        rules = rules_for(activation, Rounding(np.dtype(dtype)), "test")
        d_lo, d_hi = rules.derivative_range(np.array([low]), np.array([high]))
        z = _grid(low, high)
        if dtype == np.float32:
            z = z.astype(dtype)
            z = z[(z.astype(np.float64) >= low) & (z.astype(np.float64) <= high)]
        own = activation.derivative(z, activation.value(z)).astype(np.float64)
        assert np.all((own >= d_lo[0]) & (own <= d_hi[0]))
    # scipy's numerical derivative, away from kinks (the reference is meaningless on one)
    z = np.linspace(low, high, 41)
    far = np.all(np.abs(z[:, None] - np.array(activation.kinks + (np.inf,))[None, :]) > 1e-3, axis=1)
    assume(far.any())
    reference = derivative(activation.value, z[far], initial_step=1e-4)
    slack = 1e-7 * np.maximum(1.0, np.abs(reference.df))
    assert np.all(reference.df >= d_lo[0] - slack) and np.all(reference.df <= d_hi[0] + slack)


def test_lines_are_tight_on_narrow_intervals():
    """The relaxation's gap shrinks like the square of the width (what makes branch and bound converge)."""
    rules = rules_for(tp.Tanh(), Rounding(np.dtype(np.float64)), "test")
    gaps = []
    for width in (1e-1, 1e-2, 1e-3):
        z_lo, z_hi = np.array([0.3]), np.array([0.3 + width])
        alpha_l, beta_l, alpha_u, beta_u = rules.lines(z_lo, z_hi)
        z = np.linspace(z_lo[0], z_hi[0], 101)
        gaps.append(np.max((alpha_u * z + beta_u) - (alpha_l * z + beta_l)))
    assert gaps[1] < gaps[0] / 50 and gaps[2] < gaps[1] / 50


def test_undeclared_activation_is_refused_naming_what_to_declare():
    class Cube(tp.Activation):
        def value(self, z):
            return z**3

        def derivative(self, z, a):
            return 3 * z**2

    net = tp.Network([tp.Affine(1, 2), Cube(), tp.Affine(2, 1)], seed=0)
    expected = r"layer 1 is Cube.*declared_shape\(\).*ActivationShape.*curvature"
    with pytest.raises(tp.UndeclaredActivation, match=expected):
        tp.output_bounds(net, [0.0], [1.0])
    assert issubclass(tp.UndeclaredActivation, TypeError)


def test_a_subclass_that_changes_the_function_must_declare_again():
    class SteeperTanh(tp.Tanh):
        def value(self, z):
            return np.tanh(2.0 * z)

        def derivative(self, z, a):
            return 2.0 * (1.0 - a * a)

    net = tp.Network([tp.Affine(1, 2), SteeperTanh(), tp.Affine(2, 1)], seed=0)
    with pytest.raises(tp.UndeclaredActivation, match="SteeperTanh, which redefines value.* inherits declared_shape"):
        tp.output_bounds(net, [0.0], [1.0])

    class DeclaredSteeperTanh(SteeperTanh):
        def declared_shape(self):
            return tp.ActivationShape((0.0,), (1, -1), value_error=10.0, derivative_error=20.0)

    net = tp.Network([tp.Affine(1, 2), DeclaredSteeperTanh(), tp.Affine(2, 1)], seed=0)
    assert tp.output_bounds(net, [0.0], [1.0], max_splits=10).lower.shape == (1,)


@pytest.mark.parametrize(
    "arguments, message",
    [
        (((1.0, 0.0), (1, -1, 1), 1.0, 1.0), "strictly increasing"),
        (((0.0,), (1,), 1.0, 1.0), "one entry"),
        (((0.0,), (1, 2), 1.0, 1.0), "one entry"),
        (((), (0,), -1.0, 1.0), "value_error"),
        (((), (0,), 1.0, float("nan")), "derivative_error"),
    ],
)
def test_activation_shape_refuses_bad_declarations(arguments, message):
    with pytest.raises(ValueError, match=message):
        tp.ActivationShape(*arguments)


def test_every_built_in_activation_declares_a_shape():
    """The one list of built-ins (activations.BUILT_IN_ACTIVATIONS): each can be bounded."""
    from tinyprop.activations import BUILT_IN_ACTIVATIONS as CLASSES

    for cls in CLASSES:
        assert isinstance(cls().declared_shape(), tp.ActivationShape), cls.__name__
        assert "declared_shape" in cls.__dict__, f"{cls.__name__} must declare its own shape"
