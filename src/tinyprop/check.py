"""Verification of closed-form derivatives against numerical differentiation.

The reference is ``scipy.differentiate`` (``derivative`` for activations,
``jacobian`` for network gradients). It was chosen over
``scipy.optimize.approx_fprime`` because it extrapolates central differences of
order 8 over a shrinking sequence of steps (Richardson) and stops when two
estimates agree, which makes it accurate to roughly 1e-10 relative on smooth
functions; a single forward difference is only good to about ``sqrt(eps)``
(1e-8), too coarse to confirm a 1e-6 agreement.

**Error metric** (both checks): for analytic value ``g`` and numerical
reference ``r`` of the same entry::

    error = |g - r| / max(|r|, floor)

- :func:`check_gradient`: ``floor = 1e-6 * max |r|`` over *all* parameters, so
  entries far smaller than the largest gradient are judged on an absolute
  scale instead of amplifying the reference's own rounding noise.
- :func:`check_activation`: ``floor = 1``; relative for large derivatives,
  absolute for small ones.

Float32 networks are checked against the reference computed on a float64 copy
with the same weights: numerical differentiation in float32 is too coarse to
be a reference. The default float32 tolerance (1e-3) allows for float32
rounding in the backward pass itself.

The reference is only meaningful where the function is smooth within the
difference steps; a pre-activation that sits closer to a kink (ReLU at 0) than
the step can produce a spurious failure. Use other points in that case.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np
from scipy import differentiate

from ._validate import as_samples, as_targets
from .activations import Activation
from .layers import Affine
from .losses import Loss
from .network import Network

__all__ = [
    "check_gradient",
    "check_activation",
    "GradientReport",
    "ArrayError",
    "ActivationReport",
    "DEFAULT_POINTS",
]

_GRADIENT_TOLERANCE = {np.dtype(np.float64): 1e-6, np.dtype(np.float32): 1e-3}
_GRADIENT_FLOOR = 1e-6
_INITIAL_STEP = 1e-2

DEFAULT_POINTS = np.unique(
    np.concatenate(
        [
            np.linspace(-6.0, 6.0, 49),
            [0.0, 1e-6, -1e-6, 1e-3, -1e-3],
            [10.0, -10.0, 20.0, -20.0, 50.0, -50.0, 1e2, -1e2, 1e3, -1e3, 1e4, -1e4],
        ]
    )
)
"""The default grid of :func:`check_activation`: a fine grid on [-6, 6], points
near 0, and large ``|z|`` up to 1e4."""


@dataclass(frozen=True)
class ArrayError:
    """The worst entry of one parameter array."""

    name: str
    shape: tuple[int, ...]
    max_rel_error: float
    worst_index: tuple[int, ...]
    analytic: float
    numerical: float


@dataclass(frozen=True)
class GradientReport:
    """Result of :func:`check_gradient`.

    ``max_rel_error`` is the largest error (module docstring metric) over all
    parameters; ``arrays`` holds one :class:`ArrayError` per entry of
    ``net.params``; ``passed`` is ``max_rel_error <= tolerance``.
    """

    max_rel_error: float
    tolerance: float
    arrays: tuple[ArrayError, ...]
    analytic: np.ndarray = field(repr=False)
    numerical: np.ndarray = field(repr=False)
    reference: str = "scipy.differentiate.jacobian in float64"

    @property
    def passed(self) -> bool:
        return bool(self.max_rel_error <= self.tolerance)

    @property
    def failures(self) -> tuple[ArrayError, ...]:
        return tuple(a for a in self.arrays if a.max_rel_error > self.tolerance)

    def __str__(self) -> str:
        lines = [
            f"gradient check against {self.reference}: "
            f"{'PASSED' if self.passed else 'FAILED'} "
            f"(max relative error {self.max_rel_error:.2e}, tolerance {self.tolerance:.0e})"
        ]
        for a in self.arrays:
            flag = "ok  " if a.max_rel_error <= self.tolerance else "FAIL"
            lines.append(
                f"  {flag} {a.name:<18} {str(a.shape):<10} max rel error {a.max_rel_error:.2e}"
                f"  worst at {list(a.worst_index)}: analytic {a.analytic:.10g}, numerical {a.numerical:.10g}"
            )
        return "\n".join(lines)


def check_gradient(
    net: Network, X: Any, y: Any, loss: Loss, *, tolerance: float | None = None
) -> GradientReport:
    """Compare ``net.backward`` with scipy's numerical gradient of ``loss`` over the parameters.

    Parameters are the network's own; nothing is modified. ``tolerance``
    defaults to 1e-6 for float64 networks and 1e-3 for float32 ones.

    >>> import numpy as np, tinyprop as tp
    >>> net = tp.Network([tp.Affine(2, 3), tp.Tanh(), tp.Affine(3, 1)], seed=1)
    >>> X = np.array([[0.1, -0.4], [0.7, 0.2]]); y = np.array([0.5, -0.3])
    >>> tp.check_gradient(net, X, y, tp.SquaredError()).passed
    True
    """
    if not isinstance(net, Network):
        raise TypeError(f"net must be a tinyprop Network, got {type(net).__name__}")
    if not isinstance(loss, Loss):
        raise TypeError(f"loss must be a tinyprop Loss (e.g. tp.SquaredError()), got {type(loss).__name__}")
    if tolerance is None:
        tolerance = _GRADIENT_TOLERANCE[net.dtype]
    X = as_samples(X, "X", net.n_in, net.dtype)
    y = as_targets(y, "y", X.shape[0], net.n_out, net.dtype)

    out, trace = net.forward(X)
    grads, _ = net.backward(trace, loss.gradient(out, y), need_input=False)
    analytic = np.concatenate([g.ravel() for g in grads]).astype(np.float64)

    reference = net.copy(np.float64)
    X64, y64 = X.astype(np.float64), y.astype(np.float64)

    def loss_of(theta: np.ndarray) -> np.ndarray:
        columns = theta.reshape(theta.shape[0], -1)
        values = np.empty(columns.shape[1])
        for j in range(columns.shape[1]):
            reference.set_vector(columns[:, j])
            values[j] = loss.value(reference.predict(X64), y64)
        return values.reshape(theta.shape[1:])

    theta0 = reference.get_vector()
    numerical = differentiate.jacobian(loss_of, theta0, initial_step=_INITIAL_STEP).df

    floor = _GRADIENT_FLOOR * max(float(np.max(np.abs(numerical))), np.finfo(np.float64).tiny)
    errors = np.abs(analytic - numerical) / np.maximum(np.abs(numerical), floor)
    return GradientReport(
        max_rel_error=float(errors.max()),
        tolerance=float(tolerance),
        arrays=tuple(_per_array(net, errors, analytic, numerical)),
        analytic=analytic,
        numerical=numerical,
    )


def _per_array(net: Network, errors: np.ndarray, analytic: np.ndarray, numerical: np.ndarray) -> list[ArrayError]:
    result, start = [], 0
    for index, layer in enumerate(net.layers):
        if not isinstance(layer, Affine):
            continue
        for kind, p in zip(("weight", "bias"), layer.params):
            stop = start + p.size
            local = int(np.argmax(errors[start:stop]))
            result.append(
                ArrayError(
                    name=f"layer {index} {kind}",
                    shape=p.shape,
                    max_rel_error=float(errors[start + local]),
                    worst_index=tuple(int(i) for i in np.unravel_index(local, p.shape)),
                    analytic=float(analytic[start + local]),
                    numerical=float(numerical[start + local]),
                )
            )
            start = stop
    return result


@dataclass(frozen=True)
class ActivationReport:
    """Result of :func:`check_activation`.

    ``errors[i]`` is the error (module docstring metric) at ``points[i]``;
    ``problems`` lists every failed point or other defect as a sentence.
    """

    name: str
    points: np.ndarray = field(repr=False)
    analytic: np.ndarray = field(repr=False)
    numerical: np.ndarray = field(repr=False)
    errors: np.ndarray = field(repr=False)
    tolerance: float
    problems: tuple[str, ...]

    @property
    def max_error(self) -> float:
        return float(np.nanmax(self.errors)) if self.errors.size else 0.0

    @property
    def passed(self) -> bool:
        return not self.problems

    def __str__(self) -> str:
        head = (
            f"activation check of {self.name} on {self.points.size} points: "
            f"{'PASSED' if self.passed else 'FAILED'} (max error {self.max_error:.2e}, "
            f"tolerance {self.tolerance:.0e})"
        )
        return "\n".join([head, *("  " + p for p in self.problems)])


def check_activation(
    activation: Activation,
    *,
    points: Sequence[float] | np.ndarray | None = None,
    tolerance: float = 1e-6,
) -> ActivationReport:
    """Compare ``activation.derivative`` with scipy's numerical derivative of ``value``.

    Checks, on ``points`` (default :data:`DEFAULT_POINTS`), in float64:
    the derivative agrees with the numerical one (at a declared kink, with
    either one-sided derivative); ``value`` and ``derivative`` are finite,
    raise no overflow or invalid-operation warning, keep the shape, and keep
    float32 input in float32.

    >>> import tinyprop as tp
    >>> tp.check_activation(tp.Tanh()).passed
    True
    """
    if not isinstance(activation, Activation):
        raise TypeError(
            f"activation must be an instance of a tp.Activation subclass, got {type(activation).__name__}"
        )
    z = DEFAULT_POINTS if points is None else np.asarray(points, dtype=np.float64).ravel()
    if z.size == 0 or not np.all(np.isfinite(z)):
        raise ValueError("points must be a non-empty list of finite numbers")
    name = repr(activation)
    problems: list[str] = []

    try:
        with np.errstate(over="raise", invalid="raise", divide="raise"):
            a = activation.value(z)
            analytic = activation.derivative(z, a)
    except FloatingPointError as exc:
        problems.append(f"value or derivative raised a floating-point error on the points: {exc}")
    if problems:
        nan = np.full(z.shape, np.nan)
        return ActivationReport(name, z, nan, nan, nan, tolerance, tuple(problems))

    for label, array in (("value", a), ("derivative", analytic)):
        array = np.asarray(array)
        if array.shape != z.shape:
            problems.append(f"{label} returned shape {array.shape} for input shape {z.shape}")
        elif not np.all(np.isfinite(array)):
            bad = z[~np.isfinite(array)]
            problems.append(f"{label} is not finite at z = {bad[:5].tolist()}")
    problems.extend(_dtype_problems(activation))
    if problems:
        nan = np.full(z.shape, np.nan)
        return ActivationReport(name, z, np.asarray(analytic), nan, nan, tolerance, tuple(problems))

    numerical, alternative = _numerical_derivative(activation, z)
    err = np.abs(analytic - numerical) / np.maximum(np.abs(numerical), 1.0)
    err_alt = np.abs(analytic - alternative) / np.maximum(np.abs(alternative), 1.0)
    errors = np.minimum(err, err_alt)
    for i in np.flatnonzero(errors > tolerance)[:10]:
        problems.append(
            f"derivative wrong at z = {z[i]:.6g}: closed form {analytic[i]:.10g}, "
            f"numerical {numerical[i]:.10g} (error {errors[i]:.2e})"
        )
    return ActivationReport(name, z, analytic, numerical, errors, tolerance, tuple(problems))


def _numerical_derivative(activation: Activation, z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Central differences, with steps kept short of declared kinks.

    Returns two estimates that differ only at points lying on a kink: there
    the first is the right derivative and the second the left one.
    """
    def f(x: np.ndarray) -> np.ndarray:
        with np.errstate(over="ignore", invalid="ignore", under="ignore"):
            return activation.value(x)

    step = np.full(z.shape, 0.5)
    on_kink = np.zeros(z.shape, dtype=bool)
    for k in activation.kinks:
        distance = np.abs(z - k)
        on_kink |= distance == 0
        step = np.where(distance > 0, np.minimum(step, distance / 2), step)
    direction = np.where(on_kink, 1, 0)
    right = differentiate.derivative(f, z, initial_step=step, step_direction=direction).df
    left = differentiate.derivative(f, z, initial_step=step, step_direction=-direction).df
    return right, left


def _dtype_problems(activation: Activation) -> list[str]:
    z32 = np.linspace(-3, 3, 7, dtype=np.float32)
    with np.errstate(all="ignore"):
        a32 = np.asarray(activation.value(z32))
        d32 = np.asarray(activation.derivative(z32, a32))
    return [
        f"{label} turns float32 input into {array.dtype} (should keep float32)"
        for label, array in (("value", a32), ("derivative", d32))
        if array.dtype != np.float32
    ]
