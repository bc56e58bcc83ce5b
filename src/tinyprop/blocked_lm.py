"""Levenberg-Marquardt on normal equations summed over row blocks (memory independent of the rows).

Minimises ``F(theta) = sum_k beta_k E_k + alpha/2 ||theta||^2`` (plain least
squares: ``alpha = 0``, ``beta_k = 1``, ``F = RSS / 2``; the evidence
framework of :mod:`tinyprop.evidence` re-estimates ``alpha`` and ``beta``
after every successful step). Each iteration:

1. ``A_k``, ``b_k``, ``E_k`` from :func:`tinyprop.normal_equations.accumulate`
   (one Jacobian pass over the rows, block by block), giving the
   Gauss-Newton Hessian and gradient of ``F``::

       H = sum_k beta_k A_k + alpha I,      g = sum_k beta_k b_k + alpha theta

2. the damped step, from the Cholesky factor of a ``p x p`` matrix
   (``scipy.linalg.cho_factor`` / ``cho_solve``)::

       (H + mu D) delta = -g

   with Marquardt's diagonal scaling ``D = diag(d_j)``, ``d_j`` the largest
   ``H_jj`` seen so far (Moré (1978), "The Levenberg-Marquardt algorithm:
   implementation and theory", in G. A. Watson (ed.), Numerical Analysis, Springer, eq. 6.4: the
   running maximum keeps the scaling from shrinking), which makes the step
   independent of the units of the parameters;

3. the gain ratio of the actual to the predicted reduction of ``F``::

       rho = (F(theta) - F(theta + delta)) / L,   L = 1/2 delta^T (mu D delta - g)

   (``L`` is the reduction of the quadratic model
   ``F + g^T delta + 1/2 delta^T H delta`` at the damped step). A step with
   ``rho > 0`` is taken and ``mu <- mu max(1/3, 1 - (2 rho - 1)^3)``,
   ``nu <- 2``; otherwise ``theta`` stays, ``mu <- mu nu``, ``nu <- 2 nu``.
   This is the update of Nielsen (1999), "Damping parameter in Marquardt's
   method", IMM-REP-1999-05, Technical University of Denmark, eq. 2.10 and
   section 3 (also Madsen, Nielsen & Tingleff (2004), "Methods for
   non-linear least squares problems", IMM, Algorithm 3.16), started at
   ``mu = 1e-3`` (relative to ``D``, Nielsen's ``tau``).

Stopping rules (whichever comes first; the reason is returned):

- scaled gradient: ``max_j |g_j| / sqrt(d_j 2 F) <= tolerance`` (MINPACK's
  ``gtol`` measure, the cosine between the residuals and a column of ``J``,
  for plain least squares);
- step: ``||D^1/2 delta|| <= tolerance (||D^1/2 theta|| + tolerance)``
  (MINPACK's ``xtol``);
- reduction: a taken step with actual and predicted relative reduction of
  ``F`` both at most ``tolerance`` (MINPACK's ``ftol``);
- stall: the taken steps of the last ``window`` iterations together reduced
  ``F`` by less than ``progress_tolerance`` of its value (and, with
  re-estimated ``alpha``/``beta``, neither moved by more than 1 % in any of
  them): an over-parameterised fit that creeps towards interpolating the
  noise is ended instead of running for thousands of evaluations;
- ``mu`` above ``1e16``: no step reduces ``F`` any more (float64 exhausted);
- the evaluation limit.

An "evaluation" is one forward pass over all rows; each taken step adds one
Jacobian pass.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass
from typing import Any

import numpy as np

from . import evidence
from .network import Network
from .normal_equations import NormalEquations, accumulate, half_squares

__all__ = ["EngineResult", "minimise"]

_MU_START = 1e-3
_MU_LIMIT = 1e16
_HYPER_STEADY = 0.01  # largest relative change of alpha or a beta_k counted as settled


@dataclass(frozen=True, eq=False)
class EngineResult:
    """What :func:`minimise` returns; ``normal`` and ``hyper`` are at ``theta``."""

    theta: np.ndarray
    normal: NormalEquations
    hyper: evidence.Hyperparameters
    objective: float
    scaled_gradient: float
    success: bool
    reason: str
    iterations: int
    function_evaluations: int
    jacobian_evaluations: int


def minimise(
    work: Network,
    X: np.ndarray,
    Y: np.ndarray,
    *,
    regularization: str | float | None,
    tolerance: float,
    progress_tolerance: float,
    window: int,
    max_evaluations: int,
    report: Any = None,
    block: int | None = None,
) -> EngineResult:
    """Run the iteration of the module docstring from ``work``'s current parameters.

    ``work`` is a float64 network (changed: it ends at the solution); ``X``
    ``(n, n_in)`` and ``Y`` ``(n, n_out)`` float64. ``regularization``:
    ``None`` (plain least squares), ``"evidence"`` or a fixed ``alpha``.
    ``report``: an object with ``evaluated(rss, with_derivative=False)`` and
    ``differentiated()``, told about every evaluation (the progress line).
    """
    from scipy import linalg  # imported where used: `import tinyprop` stays numpy-only

    theta = work.get_vector().copy()
    normal = accumulate(work, X, Y, block)
    counts = {"function_evaluations": 1, "jacobian_evaluations": 1}
    _tell(report, normal.half_squares, derivative=True)
    hyper = _start(normal, theta, regularization)
    p = theta.size
    mu, nu = _MU_START, 2.0
    scale = np.zeros(p)
    recent: deque[tuple[float, float]] = deque(maxlen=window)  # (relative reduction, hyperparameter change)
    iterations, reason, success = 0, "", False
    while True:
        H = evidence.hessian(normal, hyper)
        g = np.einsum("k,kj->j", hyper.beta, normal.gradients) + hyper.alpha * theta
        F = hyper.objective(normal.half_squares, theta)
        scale = np.maximum(scale, np.diag(H))
        root = np.sqrt(np.where(scale > 0, scale, 1.0))
        gradient_measure = _scaled_gradient(g, root, F)
        if gradient_measure <= tolerance:
            reason, success = "the scaled gradient is below the tolerance", True
            break
        while True:  # damped steps until one is taken or a rule stops the fit
            if counts["function_evaluations"] >= max_evaluations:
                reason = f"reached the limit of {max_evaluations} evaluations"
                break
            if mu > _MU_LIMIT:
                reason = "no step reduces the objective any more (damping above 1e16)"
                success = True  # the point is a minimum to working precision
                break
            try:
                factor = linalg.cho_factor(H + np.diag(mu * scale))
            except linalg.LinAlgError:  # H singular and mu too small to make H + mu D definite
                mu, nu = mu * nu, 2.0 * nu
                continue
            delta = -linalg.cho_solve(factor, g)
            if np.linalg.norm(root * delta) <= tolerance * (np.linalg.norm(root * theta) + tolerance):
                reason, success = "the step is below the tolerance", True
                break
            work.set_vector(theta + delta)
            with np.errstate(over="ignore", invalid="ignore"):
                squares = half_squares(work, X, Y)
            counts["function_evaluations"] += 1
            _tell(report, squares)
            F_new = hyper.objective(squares, theta + delta)
            predicted = 0.5 * float(delta @ (mu * scale * delta - g))
            rho = (F - F_new) / predicted if predicted > 0 and math.isfinite(F_new) else -1.0
            if rho > 0:
                break
            mu, nu = mu * nu, 2.0 * nu
        if reason:
            work.set_vector(theta)
            break
        iterations += 1
        theta = theta + delta
        normal = accumulate(work, X, Y, block)
        counts["function_evaluations"] += 1
        counts["jacobian_evaluations"] += 1
        _tell(report, normal.half_squares, derivative=True)
        mu *= max(1.0 / 3.0, 1.0 - (2.0 * rho - 1.0) ** 3)
        nu = 2.0
        relative = (F - F_new) / F if F > 0 else 0.0
        before = hyper
        if regularization is not None:
            hyper = evidence.reestimate(normal, theta, hyper)
        change = _relative_change(before, hyper)
        if relative <= tolerance and predicted <= tolerance * F and change <= _HYPER_STEADY:
            reason, success = "the relative reduction of the objective is below the tolerance", True
            break
        recent.append((relative, change))
        if len(recent) == window and sum(r for r, _ in recent) <= progress_tolerance and all(
            c <= _HYPER_STEADY for _, c in recent
        ):
            reason = (
                f"the objective fell by less than {progress_tolerance:g} of its value in the last {window} steps"
            )
            success = True
            break
    H = evidence.hessian(normal, hyper)
    g = np.einsum("k,kj->j", hyper.beta, normal.gradients) + hyper.alpha * theta
    F = hyper.objective(normal.half_squares, theta)
    scale = np.maximum(scale, np.diag(H))
    return EngineResult(
        theta=theta, normal=normal, hyper=hyper, objective=F,
        scaled_gradient=_scaled_gradient(g, np.sqrt(np.where(scale > 0, scale, 1.0)), F),
        success=success, reason=reason, iterations=iterations, **counts,
    )


def _start(normal: NormalEquations, theta: np.ndarray, regularization: str | float | None) -> evidence.Hyperparameters:
    if regularization is None:  # plain least squares: F = RSS / 2
        m = normal.half_squares.size
        return evidence.Hyperparameters(0.0, np.ones(m), np.full(m, theta.size / m), True)
    penalty = None if regularization == "evidence" else float(regularization)
    return evidence.reestimate(normal, theta, evidence.initial(normal, theta, penalty))


def _scaled_gradient(g: np.ndarray, root: np.ndarray, F: float) -> float:
    """``max_j |g_j| / sqrt(d_j 2F)``; 0 when ``F`` is 0 (an exact fit)."""
    if F <= 0:
        return 0.0
    return float(np.max(np.abs(g) / root) / math.sqrt(2.0 * F))


def _relative_change(before: evidence.Hyperparameters, after: evidence.Hyperparameters) -> float:
    ratios = np.concatenate([[after.alpha / before.alpha] if before.alpha > 0 else [1.0], after.beta / before.beta])
    return float(np.max(np.abs(ratios - 1.0)))


def _tell(report: Any, squares: np.ndarray, derivative: bool = False) -> None:
    if report is not None:
        report.evaluated(float(2.0 * squares.sum()), with_derivative=derivative)
