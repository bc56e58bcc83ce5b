"""Verification of closed-form derivatives against numerical differentiation.

The reference is ``scipy.differentiate`` (``derivative`` for activations,
``jacobian`` for network gradients). It was chosen over
``scipy.optimize.approx_fprime`` because it extrapolates central differences of
order 8 over a shrinking sequence of steps (Richardson) and stops when two
estimates agree, which makes it accurate to roughly 1e-10 relative on smooth
functions; a single forward difference is only good to about ``sqrt(eps)``
(1e-8), too coarse to confirm a 1e-6 agreement.

**The gradient reference** of :func:`check_gradient` is built from two purely
numerical pieces, by the chain rule::

    r = J_num^T  g_num
    J_num = d output / d theta   (scipy, on an extended-precision copy of the network)
    g_num = d E / d output       (scipy, on loss.value)

Neither piece uses a closed-form derivative, so a wrong activation
derivative, a wrong backward rule or a wrong loss gradient all show. The
output Jacobian is taken on a ``np.longdouble`` copy (80-bit on x86; plain
float64 elsewhere, which only makes the reference noisier) and scipy is handed
``output(theta) - output(theta0)``, so the differences it forms are nearly free
of float64 rounding. Float32 networks are compared with this same reference,
computed from their (exactly representable) weights: differencing in float32
would be far too coarse.

**Error metric**: for analytic value ``g`` and reference ``r`` of one entry::

    error = |g - r| / max(|r|, floor)

- :func:`check_gradient`: ``floor = max(1e-3 * max |r|, 1e-5 * max(1, |E|))``
  with ``max |r|`` over *all* parameters and ``E`` the loss value. Entries a
  thousand times smaller than the largest gradient (vanishing gradients in
  early layers), or all entries when the gradient is zero (dead units), are
  judged on that absolute scale instead of on their own tiny size.
  Default tolerance: 1e-6 for float64 networks; 1e-3 for float32 ones, whose
  own forward and backward rounding (unit roundoff 6e-8, accumulated over
  sums of up to a few hundred terms and several layers) reaches 1e-4.
- :func:`check_activation`: ``floor = 1``; relative for large derivatives,
  absolute for small ones.

**Steps.** Differences start from a step ``h = 0.05`` and shrink by halves.
A difference that straddles a kink (ReLU at 0) is meaningless, so when an
activation with ``kinks`` sees a pre-activation within ``m`` of a kink, the
starting step becomes ``0.1 m / max(1, max |layer input|)``. The loss gradient
is treated alike, row by row, where the loss's second derivative jumps (Huber
at ``|r| = c``, see :meth:`tinyprop.Loss.kink_distance`). The report records
``h`` and, as ``kink_margin``, the smallest distance from any kink (of an
activation or of the loss); below about ``1e-4`` the differences carry enough
rounding noise that a float64 comparison at ``1e-6`` is no longer meaningful.
A pre-activation *exactly* on a kink (``m = 0``) cannot be checked by
differences; the check refuses it and asks for other points.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np

from ._validate import as_samples, as_targets, kind_of, real_in_range, seed_value
from .activations import Activation
from .layers import Affine
from .losses import Loss
from .network import Network, Trace

__all__ = [
    "check_gradient",
    "check_activation",
    "GradientReport",
    "ArrayError",
    "ActivationReport",
    "DEFAULT_POINTS",
]

_GRADIENT_TOLERANCE = {np.dtype(np.float64): 1e-6, np.dtype(np.float32): 1e-3}
_GRADIENT_FLOOR = 1e-3
_INITIAL_STEP = 0.05
_KINK_FRACTION = 0.1

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

    ``max_rel_error`` is the largest error (module docstring metric) over the
    checked parameters; ``arrays`` holds one :class:`ArrayError` per entry of
    ``net.params``; ``passed`` is ``max_rel_error <= tolerance``. ``indices``
    are the checked positions in ``net.get_vector()`` (all of them unless a
    sample was asked for), and ``analytic`` / ``numerical`` the two gradients
    there; ``n_params`` is the network's total.
    """

    max_rel_error: float
    tolerance: float
    arrays: tuple[ArrayError, ...]
    analytic: np.ndarray = field(repr=False)
    numerical: np.ndarray = field(repr=False)
    indices: np.ndarray = field(repr=False)
    n_params: int
    initial_step: float = _INITIAL_STEP
    kink_margin: float = float("inf")
    reference: str = "scipy.differentiate (output Jacobian in extended precision x loss gradient)"

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
            f"(max relative error {self.max_rel_error:.2e}, tolerance {self.tolerance:.0e}, "
            f"initial step {self.initial_step:.1e})"
        ]
        if self.indices.size < self.n_params:
            lines.append(f"  checked a random sample of {self.indices.size} of {self.n_params} parameters")
        for a in self.arrays:
            flag = "ok  " if a.max_rel_error <= self.tolerance else "FAIL"
            lines.append(
                f"  {flag} {a.name:<18} {str(a.shape):<10} max rel error {a.max_rel_error:.2e}"
                f"  worst at {list(a.worst_index)}: analytic {a.analytic:.10g}, numerical {a.numerical:.10g}"
            )
        return "\n".join(lines)


def check_gradient(
    net: Network,
    X: Any,
    y: Any,
    loss: Loss,
    *,
    tolerance: float | None = None,
    parameters: int | None = None,
    seed: int = 0,
) -> GradientReport:
    """Compare ``net.backward`` with scipy's numerical gradient of ``loss`` over the parameters.

    Parameters are the network's own; nothing is modified. ``tolerance``
    defaults to 1e-6 for float64 networks and 1e-3 for float32 ones.

    The numerical reference costs a few dozen forward passes per parameter, so
    a network of thousands of parameters takes minutes (5,313 parameters and
    16 rows: about 30 s). ``parameters=k`` checks a random sample of ``k``
    parameters instead, drawn with ``numpy.random.default_rng(seed)``: one
    from every parameter array, the rest uniformly from all others. The floor
    of the error metric then uses the largest reference entry of the sample.

    >>> import numpy as np, tinyprop as tp
    >>> net = tp.Network([tp.Affine(2, 3), tp.Tanh(), tp.Affine(3, 1)], seed=1)
    >>> X = np.array([[0.1, -0.4], [0.7, 0.2]]); y = np.array([0.5, -0.3])
    >>> tp.check_gradient(net, X, y, tp.SquaredError()).passed
    True
    """
    if not isinstance(net, Network):
        raise TypeError(f"net must be a tinyprop Network, got {kind_of(net)}")
    if not isinstance(loss, Loss):
        raise TypeError(f"loss must be a tinyprop Loss (e.g. tp.SquaredError()), got {kind_of(loss)}")
    if tolerance is None:
        tolerance = _GRADIENT_TOLERANCE[net.dtype]
    tolerance = real_in_range(tolerance, "tolerance", low=0.0, low_open=True)
    X = as_samples(X, "X", net.n_in, net.dtype)
    y = as_targets(y, "y", X.shape[0], net.n_out, net.dtype)

    indices = _sample(net, parameters, seed)

    out, trace = net.forward(X)
    grads, _ = net.backward(trace, loss.gradient(out, y), need_input=False)
    analytic = np.concatenate([g.ravel() for g in grads]).astype(np.float64)[indices]

    margin, input_scale = _kink_margin(net, trace)
    if margin == 0.0:
        raise ValueError(
            "a pre-activation lies exactly on a kink of an activation (e.g. ReLU at 0), where "
            "numerical differentiation is undefined; check the gradient on other X"
        )
    step = min(_INITIAL_STEP, _KINK_FRACTION * margin / max(1.0, input_scale))
    output_jacobian = _numerical_output_jacobian(net, X, step, indices)
    loss_gradient = _numerical_loss_gradient(loss, out.astype(np.float64), y.astype(np.float64))
    numerical = output_jacobian.T @ loss_gradient

    loss_scale = max(1.0, abs(loss.value(out, y)))
    floor = max(_GRADIENT_FLOOR * float(np.max(np.abs(numerical))), 1e-5 * loss_scale)
    errors = np.abs(analytic - numerical) / np.maximum(np.abs(numerical), floor)
    return GradientReport(
        max_rel_error=float(errors.max()),
        tolerance=float(tolerance),
        arrays=tuple(_per_array(net, indices, errors, analytic, numerical)),
        analytic=analytic,
        numerical=numerical,
        indices=indices,
        n_params=net.n_params,
        initial_step=step,
        kink_margin=min(margin, loss.kink_distance(out, y)),
    )


def _sample(net: Network, parameters: int | None, seed: int) -> np.ndarray:
    """Sorted positions in ``net.get_vector()`` to check: all, or a sample (see :func:`check_gradient`)."""
    if parameters is None:
        return np.arange(net.n_params)
    n_arrays = len(net.params)
    if isinstance(parameters, bool) or not isinstance(parameters, (int, np.integer)) or parameters < n_arrays:
        raise ValueError(
            f"parameters must be an integer of at least {n_arrays} (one per parameter array) or None for all, "
            f"got {parameters!r}"
        )
    if parameters >= net.n_params:
        return np.arange(net.n_params)
    rng = np.random.default_rng(seed_value(seed))
    starts = np.cumsum([0] + [p.size for p in net.params])
    one_per_array = np.array([rng.integers(lo, hi) for lo, hi in zip(starts[:-1], starts[1:])])
    others = np.setdiff1d(np.arange(net.n_params), one_per_array)
    rest = rng.choice(others, size=int(parameters) - n_arrays, replace=False)
    return np.sort(np.concatenate([one_per_array, rest]))


def _numerical_output_jacobian(net: Network, X: np.ndarray, step: float, indices: np.ndarray) -> np.ndarray:
    """``d output / d theta[indices]`` by ``scipy.differentiate.jacobian``, shape ``(n * n_out, len(indices))``.

    The network is evaluated on an extended-precision copy (``np.longdouble``)
    and the function handed to scipy returns ``output(theta) - output(theta0)``,
    so the differences scipy forms carry almost none of float64's rounding.
    The parameters outside ``indices`` stay at their values.
    """
    reference = net.copy(np.longdouble)
    X_ref = X.astype(np.longdouble)
    theta0 = reference.get_vector().astype(np.float64)  # exact: the weights are float32/64
    out0 = reference.predict(X_ref).ravel()
    theta = theta0.copy()

    def output_change(chosen: np.ndarray) -> np.ndarray:
        columns = chosen.reshape(chosen.shape[0], -1)
        values = np.empty((out0.size, columns.shape[1]))
        for j in range(columns.shape[1]):
            theta[indices] = columns[:, j]
            reference.set_vector(theta)
            values[:, j] = reference.predict(X_ref).ravel() - out0
        return values.reshape((out0.size,) + chosen.shape[1:])

    from scipy import differentiate  # scipy is imported where it is used, keeping `import tinyprop` light

    return differentiate.jacobian(output_change, theta0[indices], initial_step=step).df


def _numerical_loss_gradient(loss: Loss, out: np.ndarray, y: np.ndarray) -> np.ndarray:
    """``dE / d output`` by ``scipy.differentiate.jacobian``, flattened like the output.

    Each row (sample) gets its own step, short of that row's distance from a
    kink of the loss: one residual near Huber's threshold then shortens the
    steps of its own row only, not (with rounding noise growing like
    ``eps |E| / h``) those of every output.
    """
    distance = np.array([loss.kink_distance(out[i:i + 1], y[i:i + 1]) for i in range(out.shape[0])])
    if np.any(distance == 0.0):
        raise ValueError(
            f"an output sits exactly where {loss!r} switches form; check the gradient on other X"
        )
    step = np.repeat(np.minimum(_INITIAL_STEP, _KINK_FRACTION * distance), out.shape[1])  # like out.ravel()
    base = loss.value(out, y)

    def loss_change(flat: np.ndarray) -> np.ndarray:
        columns = flat.reshape(flat.shape[0], -1)
        values = [loss.value(columns[:, j].reshape(out.shape), y) - base for j in range(columns.shape[1])]
        return np.asarray(values).reshape(flat.shape[1:])

    from scipy import differentiate

    return differentiate.jacobian(loss_change, out.ravel(), initial_step=step).df


def _kink_margin(net: Network, trace: Trace) -> tuple[float, float]:
    """Smallest distance of a pre-activation from a declared kink, and the largest |layer input|."""
    margin = float("inf")
    for layer, z in zip(net.layers, trace.values):
        if isinstance(layer, Activation):
            for k in layer.kinks:
                margin = min(margin, float(np.min(np.abs(z.astype(np.float64) - k))))
    input_scale = max(float(np.max(np.abs(v))) for v in trace.values[:-1])
    return margin, input_scale


def _per_array(
    net: Network, indices: np.ndarray, errors: np.ndarray, analytic: np.ndarray, numerical: np.ndarray
) -> list[ArrayError]:
    """The worst checked entry of each parameter array (``indices`` are sorted positions in the vector)."""
    result, start = [], 0
    for index, layer in enumerate(net.layers):
        if not isinstance(layer, Affine):
            continue
        for kind, p in zip(("weight", "bias"), layer.params):
            first, stop = np.searchsorted(indices, [start, start + p.size])
            local = first + int(np.argmax(errors[first:stop]))
            result.append(
                ArrayError(
                    name=f"layer {index} {kind}",
                    shape=p.shape,
                    max_rel_error=float(errors[local]),
                    worst_index=tuple(int(i) for i in np.unravel_index(int(indices[local]) - start, p.shape)),
                    analytic=float(analytic[local]),
                    numerical=float(numerical[local]),
                )
            )
            start += p.size
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
        raise TypeError(f"activation must be an instance of a tp.Activation subclass, got {kind_of(activation)}")
    tolerance = real_in_range(tolerance, "tolerance", low=0.0, low_open=True)
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
    from scipy import differentiate

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
