"""Full-batch least-squares fitting of all parameters through ``scipy.optimize``.

:func:`solve` minimises the residual sum of squares

    ``RSS(theta) = sum_{i,k} (f(x_i; theta)_k - y_ik)**2 = ||r(theta)||**2``

over the parameter vector ``theta`` (the order of ``net.get_vector()``), with
the residual vector ``r`` ordered like the rows of ``net.jacobian``:
``r[i * n_out + k] = f(x_i)_k - y_ik``.

- ``method="levenberg-marquardt"``: ``scipy.optimize.least_squares`` with
  ``method="lm"`` (MINPACK's ``lmder``; Moré (1978), "The Levenberg-Marquardt
  algorithm: implementation and theory", in G. A. Watson (ed.), Numerical Analysis, Springer,
  pp. 105-116, pages from memory),
  given the residuals and the exact Jacobian ``dr/dtheta = net.jacobian(X)``
  from backpropagation. Each iteration solves
  ``(J^T J + mu D^T D) delta = -J^T r`` with a trust-region choice of ``mu``
  and MINPACK's diagonal scaling ``D`` (column norms of ``J``).
  Needs at least as many residuals as parameters.
- ``method="lbfgs"``: ``scipy.optimize.minimize`` with ``method="L-BFGS-B"``
  (no bounds; Byrd, Lu, Nocedal & Zhu (1995), SIAM J. Sci. Comput. 16(5)),
  given ``E = RSS / 2`` (:class:`~tinyprop.losses.SquaredError`) and its
  gradient ``J^T r`` from one backward pass.

Both run in float64: the network is copied to float64, the copy is fitted, and
the result is written back into ``net`` (rounded to float32 for a float32
network; ``result.theta`` keeps the float64 solution). ``net`` is changed only
when :func:`solve` returns, whether or not the solver reports success.

Levenberg-Marquardt is the method of choice for small networks (up to a few
hundred parameters and a Jacobian that fits in memory): it converges in few
iterations to many digits. L-BFGS needs only gradients and suits larger
networks, but converges slowly on badly scaled problems.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ._progress import ProgressLine
from ._validate import as_samples, as_targets, positive_int, real_in_range
from .losses import SquaredError
from .network import Network

__all__ = ["solve", "SolveResult", "METHODS"]

METHODS = ("levenberg-marquardt", "lbfgs")

_DEFAULT_TOLERANCE = 1e-15


@dataclass(frozen=True, kw_only=True)
class SolveResult:
    """What :func:`solve` returns.

    ``method``: the method used. ``success``, ``status`` and ``message``:
    scipy's verdict (``status`` as documented by ``least_squares`` or
    ``minimize``). ``theta``: the float64 solution, in the order of
    ``net.get_vector()``. ``rss``: residual sum of squares ``||r||**2`` at
    ``theta``; ``loss``: ``rss / 2`` (the :class:`~tinyprop.losses.SquaredError`
    value, scipy's "cost"). ``residuals``: ``r`` at ``theta`` (length
    ``n * n_out``). ``jacobian``: ``dr/dtheta`` at ``theta``, shape
    ``(n * n_out, n_params)``, for later uncertainty estimates
    (``J^T J`` approximates the Hessian of ``rss / 2``;
    ``tinyprop.uncertainty.parameter_uncertainty(net, result=result)``).
    ``gradient_norm``: max-norm of ``J^T r``. ``iterations``: outer
    iterations (Levenberg-Marquardt: one Jacobian per iteration).
    ``function_evaluations`` and ``jacobian_evaluations``: residual and
    Jacobian (L-BFGS: gradient) evaluations made by the solver.
    """

    method: str
    success: bool
    status: int
    message: str
    theta: np.ndarray = field(repr=False)
    rss: float
    loss: float
    residuals: np.ndarray = field(repr=False)
    jacobian: np.ndarray = field(repr=False)
    gradient_norm: float
    iterations: int
    function_evaluations: int
    jacobian_evaluations: int


def solve(
    net: Network,
    X: Any,
    y: Any,
    *,
    method: str = "levenberg-marquardt",
    tolerance: float = _DEFAULT_TOLERANCE,
    max_evaluations: int | None = None,
    progress: bool = False,
) -> SolveResult:
    """Least-squares fit of all parameters of ``net`` to ``(X, y)``; see the module docstring.

    Parameters
    ----------
    net:
        Any network built from tinyprop layers (custom activations, layers
        without bias, fixed scalings included). Its current weights are the
        starting point; it receives the solution.
    X, y:
        Inputs ``(n, n_in)`` and targets ``(n, n_out)`` (1-D for one output).
    method:
        ``"levenberg-marquardt"`` (default) or ``"lbfgs"``.
    tolerance:
        Convergence tolerance. Levenberg-Marquardt: ``xtol``, ``ftol`` and
        ``gtol`` of MINPACK (relative change of ``theta``, relative reduction of
        ``rss``, cosine between ``r`` and the columns of ``J``). L-BFGS-B:
        ``gtol`` (largest gradient component); its relative-reduction test
        ``ftol`` is set to 0, because on badly scaled problems one short step
        can trigger it long before the minimum (an example: ``docs/training.md``,
        "Tolerance"), so L-BFGS stops when an iteration no longer reduces ``E`` at all, usually with scipy's message
        ``ABNORMAL_TERMINATION_IN_LNSRCH`` and ``success=False`` once float64
        precision is exhausted. The default 1e-15 asks for convergence to the
        limits of float64; MINPACK needs it above machine epsilon (2.2e-16).
    max_evaluations:
        Limit on residual (LM) or function-and-gradient (L-BFGS) evaluations;
        default ``1000 * (n_params + 1)`` (L-BFGS: ``10000 * (n_params + 1)``).
    progress:
        Show on stderr, at most twice a second and once at the end, the
        evaluations so far, the lowest residual sum of squares seen and the
        elapsed time (one line rewritten in place on a terminal).

    >>> import numpy as np, tinyprop as tp
    >>> x = np.linspace(-2, 2, 20).reshape(-1, 1)
    >>> y = 3.0 / (1.0 + np.exp(0.5 - 1.5 * x[:, 0]))  # synthetic: 3 * sigmoid(1.5 x - 0.5)
    >>> net = tp.Network([tp.Affine(1, 1), tp.Sigmoid(), tp.Affine(1, 1, bias=False)], seed=0)
    >>> result = tp.solve(net, x, y)
    >>> result.success, np.round(result.theta, 6).tolist()
    (True, [1.5, -0.5, 3.0])
    """
    if not isinstance(net, Network):
        raise TypeError(f"net must be a tinyprop Network, got {type(net).__name__}")
    if method not in METHODS:
        raise ValueError(f"method must be one of {METHODS}, got {method!r}")
    tolerance = real_in_range(tolerance, "tolerance", low=np.finfo(np.float64).eps, low_open=True)
    work = net.copy(np.float64)
    X64 = as_samples(X, "X", net.n_in, work.dtype)
    y64 = as_targets(y, "y", X64.shape[0], net.n_out, work.dtype).ravel()
    theta0 = work.get_vector()
    residuals0 = work.predict(X64).ravel() - y64
    if not np.all(np.isfinite(residuals0)):
        raise ValueError("the residuals at the starting weights are not finite; choose other starting weights")
    n_params = work.n_params
    if max_evaluations is None:
        max_evaluations = (1000 if method == "levenberg-marquardt" else 10000) * (n_params + 1)
    max_evaluations = positive_int(max_evaluations, "max_evaluations")
    if not isinstance(progress, bool):
        raise TypeError(f"progress must be True or False, got {progress!r}")
    fit = _levenberg_marquardt if method == "levenberg-marquardt" else _lbfgs
    report = _Progress(method, max_evaluations) if progress else None
    try:
        theta, counts = fit(work, X64, y64, theta0, tolerance, max_evaluations, report)
    finally:
        if report is not None:
            report.finish()
    work.set_vector(theta)
    residuals = work.predict(X64).ravel() - y64
    jacobian = work.jacobian(X64)
    net.set_vector(theta)
    rss = float(residuals @ residuals)
    return SolveResult(
        method=method,
        theta=theta,
        rss=rss,
        loss=rss / 2,
        residuals=residuals,
        jacobian=jacobian,
        gradient_norm=float(np.max(np.abs(jacobian.T @ residuals))),
        **counts,
    )


class _Progress:
    """What ``progress=True`` shows: the solver's evaluations so far and the lowest ``rss`` seen."""

    def __init__(self, method: str, max_evaluations: int) -> None:
        self.method, self.max_evaluations = method, max_evaluations
        self.evaluations = self.derivatives = 0
        self.lowest = math.inf
        self.started = time.perf_counter()
        self.line = ProgressLine(every=0.5)

    def evaluated(self, rss: float, *, with_derivative: bool = False) -> None:
        self.evaluations += 1
        self.derivatives += with_derivative
        self.lowest = min(self.lowest, rss)
        self._show()

    def differentiated(self) -> None:
        self.derivatives += 1
        self._show()

    def finish(self) -> None:
        if self.evaluations:  # nothing to report when the solver refused to start
            self._show(force=True)
        self.line.finish()

    def _show(self, force: bool = False) -> None:
        what = "Jacobians" if self.method == "levenberg-marquardt" else "gradients"
        self.line.show(
            f"{self.method}: {self.evaluations} of at most {self.max_evaluations} evaluations, "
            f"{self.derivatives} {what}, lowest rss {self.lowest:.6g}, "
            f"elapsed {time.perf_counter() - self.started:.1f} s",
            force=force,
        )


def _levenberg_marquardt(
    work: Network, X: np.ndarray, y: np.ndarray, theta0: np.ndarray, tolerance: float, max_evaluations: int,
    report: _Progress | None,
) -> tuple[np.ndarray, dict[str, Any]]:
    if y.size < theta0.size:
        raise ValueError(
            f"Levenberg-Marquardt needs at least as many residuals as parameters: "
            f"{y.size} residuals (samples x outputs) for {theta0.size} parameters; use method='lbfgs'"
        )

    def residuals(theta: np.ndarray) -> np.ndarray:
        work.set_vector(theta)
        r = work.predict(X).ravel() - y
        if report is not None:
            report.evaluated(float(r @ r))
        return r

    def jacobian(theta: np.ndarray) -> np.ndarray:
        work.set_vector(theta)
        if report is not None:
            report.differentiated()
        return work.jacobian(X)

    from scipy import optimize  # imported where used: `import tinyprop` stays numpy-only

    fit = optimize.least_squares(
        residuals, theta0, jac=jacobian, method="lm",
        xtol=tolerance, ftol=tolerance, gtol=tolerance, max_nfev=max_evaluations,
    )
    return np.asarray(fit.x, dtype=np.float64), _counts(fit, iterations=fit.njev, jacobian_evaluations=fit.njev)


def _lbfgs(
    work: Network, X: np.ndarray, y: np.ndarray, theta0: np.ndarray, tolerance: float, max_evaluations: int,
    report: _Progress | None,
) -> tuple[np.ndarray, dict[str, Any]]:
    loss = SquaredError()
    target = y.reshape(X.shape[0], work.n_out)

    def value_and_gradient(theta: np.ndarray) -> tuple[float, np.ndarray]:
        work.set_vector(theta)
        out, trace = work.forward(X)
        grads, _ = work.backward(trace, loss.gradient(out, target), need_input=False)
        value = loss.value(out, target)
        if report is not None:
            report.evaluated(2 * value, with_derivative=True)  # E = rss / 2
        return value, np.concatenate([g.ravel() for g in grads])

    from scipy import optimize

    fit = optimize.minimize(
        value_and_gradient, theta0, jac=True, method="L-BFGS-B",
        options={"ftol": 0.0, "gtol": tolerance, "maxfun": max_evaluations, "maxiter": max_evaluations},
    )
    # L-BFGS evaluates the gradient with every function value
    return np.asarray(fit.x, dtype=np.float64), _counts(fit, iterations=fit.nit, jacobian_evaluations=fit.nfev)


def _counts(fit: Any, *, iterations: int, jacobian_evaluations: int) -> dict[str, Any]:
    """scipy's verdict and the evaluation counts of an ``OptimizeResult``, as :class:`SolveResult` fields."""
    return {
        "success": bool(fit.success),
        "status": int(fit.status),
        "message": str(fit.message),
        "iterations": int(iterations),
        "function_evaluations": int(fit.nfev),
        "jacobian_evaluations": int(jacobian_evaluations),
    }
