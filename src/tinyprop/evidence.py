"""Regularisation strengths from the evidence framework (Bayesian regularisation).

A network with parameters ``theta`` (``p`` of them) and ``m`` targets is
fitted by minimising

    F(theta) = sum_k beta_k E_k + alpha E_W,
    E_k = 1/2 sum_i (f(x_i)_k - y_ik)^2,    E_W = 1/2 ||theta||^2

where ``beta_k = 1 / sigma_k^2`` is the noise precision of target ``k`` and
``alpha`` the precision of a zero-mean Gaussian prior on the parameters. With
the Gauss-Newton Hessian of ``F``

    H = sum_k beta_k A_k + alpha I,     A_k = J_k^T J_k

(:mod:`tinyprop.normal_equations`), the evidence framework (MacKay (1992), "A
practical Bayesian framework for backpropagation networks", Neural
Computation 4(3), 448-472; MacKay (1992), "Bayesian interpolation", Neural
Computation 4(3), 415-447) maximises the marginal likelihood of the data over
``alpha`` and ``beta`` at the minimum of ``F``. Setting its derivatives to
zero gives the re-estimation formulas

    gamma   = p - alpha tr(H^-1)            effective number of parameters
    alpha   = gamma / (2 E_W)
    beta_k  = (n - gamma_k) / (2 E_k),      gamma_k = beta_k tr(A_k H^-1)

``gamma_k`` is the share of the well-determined parameters taken by target
``k``; ``sum_k gamma_k + alpha tr(H^-1) = tr(H H^-1) = p``, so
``sum_k gamma_k = gamma``. With one target this is MacKay's
``beta = (N - gamma) / (2 E_D)``; the per-target form follows from the same
derivative, ``d/d beta_k log p(D | alpha, beta)
= -E_k - 1/2 tr(A_k H^-1) + n / (2 beta_k) = 0`` (MacKay's treatment of
several regularisers, "Bayesian interpolation" section 6, applied to the
noise terms instead). Foresee & Hagan (1997), "Gauss-Newton approximation to
Bayesian learning", Proc. IEEE Int. Conf. on Neural Networks, 1930-1935,
re-estimate after every Levenberg-Marquardt step with this Gauss-Newton
``H``, which is what :mod:`tinyprop.blocked_lm` does.

The log evidence, up to a constant that does not depend on the model
(MacKay 1992, "Bayesian interpolation", eq. 30, per-target noise):

    log p(D | alpha, beta) = -F - 1/2 log det H + p/2 log alpha
                             + n/2 sum_k log beta_k - n m/2 log(2 pi)

used to choose between restarts (the larger, the better the model is
supported by the data).

With a fixed penalty (``regularization=<number>`` in
:func:`tinyprop.solve.solve`), ``alpha`` is that number and only the
``beta_k`` are re-estimated.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from .normal_equations import NormalEquations

__all__ = ["Hyperparameters", "initial", "reestimate", "hessian", "log_evidence"]


@dataclass(frozen=True, eq=False)
class Hyperparameters:
    """``alpha``, ``beta_k`` and the effective parameters ``gamma_k`` of the module docstring.

    ``fixed_alpha``: ``alpha`` is the user's fixed penalty, not re-estimated.
    ``gamma``: ``sum_k gamma_k`` (``p`` before the first re-estimation).
    """

    alpha: float
    beta: np.ndarray
    gamma_per_target: np.ndarray
    fixed_alpha: bool

    @property
    def gamma(self) -> float:
        return float(self.gamma_per_target.sum())

    def objective(self, half_squares: np.ndarray, theta: np.ndarray) -> float:
        """``F = sum_k beta_k E_k + alpha / 2 ||theta||^2``."""
        return float(self.beta @ half_squares + 0.5 * self.alpha * (theta @ theta))


_ALPHA_ROOM = 1e12  # largest ratio of alpha to the mean diagonal of sum_k beta_k A_k (see reestimate)
_ALPHA_FLOOR = 1e-10  # smallest ratio of alpha to that mean diagonal: keeps H's Cholesky factor computable


def initial(normal: NormalEquations, theta: np.ndarray, penalty: float | None) -> Hyperparameters:
    """Starting values: ``beta_k = n / (2 E_k)`` (noise = the starting residuals' rms) and
    ``alpha = p / ||theta||^2`` (prior variance = the starting weights' mean square), or the fixed ``penalty``.
    """
    p = theta.size
    tiny = np.finfo(np.float64).tiny
    beta = normal.n_rows / np.maximum(2.0 * normal.half_squares, tiny)
    alpha = float(penalty) if penalty is not None else p / max(float(theta @ theta), tiny)
    share = np.full(beta.size, p / beta.size)
    alpha, beta = _conditioned(normal, alpha, beta, penalty is not None)
    return Hyperparameters(alpha, beta, share, penalty is not None)


def _conditioned(
    normal: NormalEquations, alpha: float, beta: np.ndarray, fixed_alpha: bool
) -> tuple[float, np.ndarray]:
    """``alpha`` within ``[1e-10, 1e12]`` times the mean diagonal ``c`` of ``sum_k beta_k A_k``.

    Above: weights driven to zero (``||theta|| -> 0``, a few rows) would make
    ``alpha = gamma / ||theta||^2`` overflow. Below: noise-free targets
    (``E_k -> 0``, ``beta_k`` growing by orders of magnitude per round) would
    leave ``H = sum_k beta_k A_k + alpha I``, positive definite in exact
    arithmetic, not so in float64, and its Cholesky factor would fail; with
    the floor its condition number is at most about ``p / 1e-10``. A fixed
    ``alpha`` (the user's penalty) is kept and ``beta`` scaled down instead.
    """
    p = normal.matrices.shape[1]
    data_curvature = float(np.einsum("k,kii->", beta, normal.matrices)) / p
    if not data_curvature > 0:
        return alpha, beta
    if fixed_alpha:
        if alpha > 0 and data_curvature * _ALPHA_FLOOR > alpha:
            beta = beta * (alpha / (data_curvature * _ALPHA_FLOOR))
        return alpha, beta
    return min(max(alpha, _ALPHA_FLOOR * data_curvature), _ALPHA_ROOM * data_curvature), beta


def hessian(normal: NormalEquations, hyper: Hyperparameters) -> np.ndarray:
    """``H = sum_k beta_k A_k + alpha I`` (a new array)."""
    H = np.einsum("k,kij->ij", hyper.beta, normal.matrices)
    H[np.diag_indices_from(H)] += hyper.alpha
    return H


def reestimate(normal: NormalEquations, theta: np.ndarray, hyper: Hyperparameters) -> Hyperparameters:
    """One application of the re-estimation formulas of the module docstring at ``theta``.

    ``H^-1`` comes from the Cholesky factor of ``H`` (positive definite when
    ``alpha > 0``). ``n - gamma_k`` is kept at least ``1e-3 n`` so that
    ``beta_k`` stays positive when ``gamma_k`` reaches ``n``, and ``E_k`` at
    least the smallest normal float so that it stays finite; ``alpha`` is
    kept within ``[1e-10, 1e12]`` times the data term's mean curvature
    (``_conditioned``), which keeps ``H`` factorable for noise-free targets.
    """
    from scipy import linalg  # imported where used: `import tinyprop` stays numpy-only

    p = theta.size
    H = hessian(normal, hyper)
    inverse = linalg.cho_solve(linalg.cho_factor(H), np.eye(p))
    gamma_k = hyper.beta * np.einsum("kij,ij->k", normal.matrices, inverse)  # tr(A_k H^-1), A_k and H^-1 symmetric
    n = normal.n_rows
    tiny = np.finfo(np.float64).tiny
    room = np.maximum(n - gamma_k, 1e-3 * n)
    beta = room / np.maximum(2.0 * normal.half_squares, tiny)
    alpha = hyper.alpha
    if not hyper.fixed_alpha:
        gamma = p - hyper.alpha * float(np.trace(inverse))
        alpha = max(gamma, 1e-3) / max(float(theta @ theta), tiny)
    alpha, beta = _conditioned(normal, alpha, beta, hyper.fixed_alpha)
    return replace(hyper, alpha=alpha, beta=beta, gamma_per_target=gamma_k)


def log_evidence(normal: NormalEquations, theta: np.ndarray, hyper: Hyperparameters) -> float:
    """``log p(D | alpha, beta)`` of the module docstring at ``theta``."""
    from scipy import linalg

    factor, _ = linalg.cho_factor(hessian(normal, hyper))
    log_det = 2.0 * float(np.sum(np.log(np.diag(factor))))
    n, m, p = normal.n_rows, hyper.beta.size, theta.size
    return (
        -hyper.objective(normal.half_squares, theta) - 0.5 * log_det + 0.5 * p * math.log(hyper.alpha)
        + 0.5 * n * float(np.sum(np.log(hyper.beta))) - 0.5 * n * m * math.log(2.0 * math.pi)
    )
