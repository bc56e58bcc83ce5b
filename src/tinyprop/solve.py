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

- ``method="blocked-levenberg-marquardt"``: tinyprop's own Levenberg-Marquardt
  (:mod:`tinyprop.blocked_lm`) on the normal equations ``J^T J``, ``J^T r``
  summed over blocks of rows (:mod:`tinyprop.normal_equations`), solved by
  Cholesky: memory ``n_out p^2`` plus one block, whatever the number of rows,
  and about ``n n_out p^2`` work per iteration. The only method that takes
  ``regularization``.

``regularization`` (blocked method only): ``None`` (plain least squares),
``"evidence"`` (minimise ``sum_k beta_k E_k + alpha/2 ||theta||^2`` with
``alpha`` and one noise precision ``beta_k`` per target re-estimated by the
evidence framework, :mod:`tinyprop.evidence`), or a number: a fixed
``alpha`` (the prior precision of the parameters) with the ``beta_k``
re-estimated.

Which method by default (``method=None``): MINPACK's ``"levenberg-marquardt"``
for plain least squares whose Jacobian (``n * n_out * p`` float64 numbers)
takes at most 256 MB, because it factors ``J`` itself by QR and so keeps the
digits that forming ``J^T J`` loses (the normal equations square the
condition number: ``cond(J^T J) = cond(J)^2``); it is the method that meets
the NIST StRD certified values (``tests/test_solve_nist.py``).
``"blocked-levenberg-marquardt"`` whenever ``regularization`` is given or
the Jacobian would be larger than that. ``method="levenberg-marquardt"``
with ``regularization`` runs the blocked engine too (MINPACK cannot add the
penalty; it is the same method). ``result.method`` says which ran.

All run in float64: the network is copied to float64, the copy is fitted, and
the result is written back into ``net`` (rounded to float32 for a float32
network; ``result.theta`` keeps the float64 solution). ``net`` is changed only
when :func:`solve` returns, whether or not the solver reports success.

Levenberg-Marquardt is the method of choice for small networks (up to a few
hundred parameters and a Jacobian that fits in memory): it converges in few
iterations to many digits. The blocked variant keeps the memory independent
of the rows and is much faster per iteration for many rows and parameters
(``J^T J`` by matrix products instead of MINPACK's column-by-column QR), at
the price of about half the attainable digits on ill-conditioned problems.
L-BFGS needs only gradients and suits larger networks, but converges slowly
on badly scaled problems.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ._progress import ProgressLine
from ._validate import as_samples, as_targets, positive_int, real_in_range
from .blocked_lm import minimise
from .evidence import log_evidence
from .losses import SquaredError
from .network import Network

__all__ = ["solve", "SolveResult", "METHODS"]

METHODS = ("levenberg-marquardt", "blocked-levenberg-marquardt", "lbfgs")

_DEFAULT_TOLERANCE = 1e-15
_MINPACK_JACOBIAN_BYTES = 256 * 2**20  # default method: MINPACK while its Jacobian takes at most this
_STALL_FRACTION = 1e-4  # blocked method: stop when 10 taken steps together reduced F by less than this fraction
# (measured: 1e-3 ends NIST Lanczos3 from start 2 at LRE 5.2, 1e-4 keeps it at 6.5; 1e-6 let an over-parameterised
# fit creep for thousands of steps)
_STALL_WINDOW = 10
_BLOCKED_MAX_EVALUATIONS = 2000


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

    The blocked method never forms the whole Jacobian: ``jacobian`` is
    ``None`` and ``normal_matrices`` ``(n_out, p, p)`` holds
    ``A_k = J_k^T J_k`` per target at ``theta`` instead (``None`` for the
    other methods); its ``status`` is 1 when a stopping rule of
    :mod:`tinyprop.blocked_lm` ended the fit and 0 at the evaluation limit,
    and ``gradient_norm`` is the max-norm of the gradient of the minimised
    objective (``J^T r`` without regularisation).

    Regularised fits (``regularization`` given; otherwise these are ``None``):
    ``penalty``: ``alpha``; ``noise_sd``: ``1 / sqrt(beta_k)`` per target,
    shape ``(n_out,)``; ``effective_parameters``: ``gamma = p - alpha
    tr(H^-1)``; ``effective_parameters_per_target``: ``gamma_k``;
    ``log_evidence``: ``log p(D | alpha, beta)`` (:mod:`tinyprop.evidence`).
    ``regularization`` echoes the argument.
    """

    method: str
    success: bool
    status: int
    message: str
    theta: np.ndarray = field(repr=False)
    rss: float
    loss: float
    residuals: np.ndarray = field(repr=False)
    jacobian: np.ndarray | None = field(repr=False)
    gradient_norm: float
    iterations: int
    function_evaluations: int
    jacobian_evaluations: int
    normal_matrices: np.ndarray | None = field(default=None, repr=False)
    regularization: str | float | None = None
    penalty: float | None = None
    noise_sd: np.ndarray | None = None
    effective_parameters: float | None = None
    effective_parameters_per_target: np.ndarray | None = field(default=None, repr=False)
    log_evidence: float | None = None


def solve(
    net: Network,
    X: Any,
    y: Any,
    *,
    method: str | None = None,
    regularization: str | float | None = None,
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
        ``"levenberg-marquardt"`` (MINPACK), ``"blocked-levenberg-marquardt"``,
        ``"lbfgs"``, or ``None`` (default): the choice of the module
        docstring, MINPACK for plain least squares that fits in 256 MB.
    regularization:
        ``None`` (default), ``"evidence"`` or a fixed penalty ``alpha > 0``;
        see the module docstring. Needs the blocked method.
    tolerance:
        Convergence tolerance. Levenberg-Marquardt: ``xtol``, ``ftol`` and
        ``gtol`` of MINPACK (relative change of ``theta``, relative reduction of
        ``rss``, cosine between ``r`` and the columns of ``J``). L-BFGS-B:
        ``gtol`` (largest gradient component); the blocked method: its
        scaled-gradient, step and reduction rules (:mod:`tinyprop.blocked_lm`;
        it also stops when 10 taken steps together reduced the objective by
        less than a fraction 1e-4 of it). L-BFGS-B: its relative-reduction test
        ``ftol`` is set to 0, because on badly scaled problems one short step
        can trigger it long before the minimum (an example: ``docs/training.md``,
        "Tolerance"), so L-BFGS stops when an iteration no longer reduces ``E`` at all, usually with scipy's message
        ``ABNORMAL_TERMINATION_IN_LNSRCH`` and ``success=False`` once float64
        precision is exhausted. The default 1e-15 asks for convergence to the
        limits of float64; MINPACK needs it above machine epsilon (2.2e-16).
    max_evaluations:
        Limit on residual (LM) or function-and-gradient (L-BFGS) evaluations;
        default ``1000 * (n_params + 1)`` (L-BFGS: ``10000 * (n_params + 1)``;
        blocked: 2000 forward passes, each taken step counting one more).
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
    if method is not None and method not in METHODS:
        raise ValueError(f"method must be one of {METHODS} or None, got {method!r}")
    regularization = _regularization(regularization)
    tolerance = real_in_range(tolerance, "tolerance", low=np.finfo(np.float64).eps, low_open=True)
    work = net.copy(np.float64)
    X64 = as_samples(X, "X", net.n_in, work.dtype)
    y64 = as_targets(y, "y", X64.shape[0], net.n_out, work.dtype).ravel()
    theta0 = work.get_vector()
    residuals0 = work.predict(X64).ravel() - y64
    if not np.all(np.isfinite(residuals0)):
        raise ValueError("the residuals at the starting weights are not finite; choose other starting weights")
    n_params = work.n_params
    method = _method(method, regularization, y64.size, n_params)
    if max_evaluations is None:
        max_evaluations = {
            "levenberg-marquardt": 1000 * (n_params + 1), "lbfgs": 10000 * (n_params + 1),
        }.get(method, _BLOCKED_MAX_EVALUATIONS)
    max_evaluations = positive_int(max_evaluations, "max_evaluations")
    if not isinstance(progress, bool):
        raise TypeError(f"progress must be True or False, got {progress!r}")
    report = _Progress(method, max_evaluations) if progress else None
    try:
        if method == "blocked-levenberg-marquardt":
            return _blocked(net, work, X64, y64, regularization, tolerance, max_evaluations, report)
        fit = _levenberg_marquardt if method == "levenberg-marquardt" else _lbfgs
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


def _regularization(value: Any) -> str | float | None:
    if value is None or value == "evidence":
        return value
    if isinstance(value, (str, bool)) or not isinstance(value, (int, float, np.floating, np.integer)):
        raise ValueError(f"regularization must be None, 'evidence' or a penalty > 0, got {value!r}")
    return real_in_range(value, "regularization (the fixed penalty alpha)", low=0.0, low_open=True)


def _method(method: str | None, regularization: str | float | None, n_residuals: int, n_params: int) -> str:
    """The default choice of the module docstring; refuses regularization with a method that cannot take it."""
    if method is None:
        small = n_residuals * n_params * 8 <= _MINPACK_JACOBIAN_BYTES
        return "levenberg-marquardt" if regularization is None and small else "blocked-levenberg-marquardt"
    if regularization is not None and method == "levenberg-marquardt":
        return "blocked-levenberg-marquardt"  # MINPACK cannot add a penalty; the blocked engine is the same method
    if regularization is not None and method != "blocked-levenberg-marquardt":
        raise ValueError(
            f"regularization={regularization!r} needs a Levenberg-Marquardt method "
            f"('levenberg-marquardt', 'blocked-levenberg-marquardt' or None), got method={method!r}"
        )
    return method


def _blocked(
    net: Network, work: Network, X: np.ndarray, y: np.ndarray, regularization: str | float | None,
    tolerance: float, max_evaluations: int, report: _Progress | None,
) -> SolveResult:
    """Fit with :func:`tinyprop.blocked_lm.minimise`; the result keeps ``A_k`` instead of the Jacobian."""
    Y = y.reshape(X.shape[0], work.n_out)
    fit = minimise(
        work, X, Y, regularization=regularization, tolerance=tolerance,
        progress_tolerance=_STALL_FRACTION, window=_STALL_WINDOW,
        max_evaluations=max_evaluations, report=report,
    )
    work.set_vector(fit.theta)
    residuals = work.predict(X).ravel() - y
    net.set_vector(fit.theta)
    rss = float(residuals @ residuals)
    hyper, normal = fit.hyper, fit.normal
    gradient = np.einsum("k,kj->j", hyper.beta, normal.gradients) + hyper.alpha * fit.theta
    regularised = regularization is not None
    return SolveResult(
        method="blocked-levenberg-marquardt",
        success=fit.success,
        status=int(fit.success),
        message=fit.reason,
        theta=fit.theta,
        rss=rss,
        loss=rss / 2,
        residuals=residuals,
        jacobian=None,
        gradient_norm=float(np.max(np.abs(gradient))),
        iterations=fit.iterations,
        function_evaluations=fit.function_evaluations,
        jacobian_evaluations=fit.jacobian_evaluations,
        normal_matrices=normal.matrices,
        regularization=regularization,
        penalty=hyper.alpha if regularised else None,
        noise_sd=1.0 / np.sqrt(hyper.beta) if regularised else None,
        effective_parameters=hyper.gamma if regularised else None,
        effective_parameters_per_target=hyper.gamma_per_target if regularised else None,
        log_evidence=log_evidence(normal, fit.theta, hyper) if regularised else None,
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
        what = "gradients" if self.method == "lbfgs" else "Jacobians"
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
