"""The Gauss-Newton normal equations of a network's least-squares fit, summed over row blocks.

For residuals ``r_ik = f(x_i; theta)_k - y_ik`` (``n`` rows, ``m`` targets,
``p`` parameters) and ``g_ik = d f(x_i)_k / d theta`` (row ``i * m + k`` of
:meth:`~tinyprop.network.Network.jacobian`), this module forms, per target
``k``::

    A_k = sum_i g_ik g_ik^T        (= J_k^T J_k, p x p)
    b_k = sum_i g_ik r_ik          (= J_k^T r_k, the gradient of E_k)
    E_k = 1/2 sum_i r_ik^2         (half the residual sum of squares of target k)

where ``J_k`` holds the Jacobian rows of target ``k``. The sums run over
blocks of rows: only one block's Jacobian (``rows_per_block * m * p``
numbers) exists at a time, so the memory is ``m p^2`` for the matrices plus
one block, whatever ``n`` is. The work is ``n m p^2`` multiply-adds for the
``A_k`` plus one backpropagation per target and row for the Jacobian.

Forming ``J^T J`` squares the condition number of ``J`` (Golub & Van Loan,
"Matrix Computations", 4th ed., section 5.3.7): a fit that needs more than
about half of float64's 16 digits in the parameters should factor ``J``
itself (QR, as MINPACK does) instead; see ``docs/training.md``.

The targets are kept apart because the evidence framework gives each target
its own noise precision ``beta_k`` (:mod:`tinyprop.evidence`); the weighted
system of the whole fit is ``sum_k beta_k A_k``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .network import Network

__all__ = ["NormalEquations", "accumulate", "half_squares", "rows_per_block"]

_BLOCK_BYTES = 16 * 2**20  # one block's Jacobian: at most about 16 MB


@dataclass(frozen=True, eq=False)
class NormalEquations:
    """``A_k``, ``b_k`` and ``E_k`` of the module docstring, stacked over the targets.

    ``matrices`` ``(m, p, p)``; ``gradients`` ``(m, p)``; ``half_squares``
    ``(m,)``; ``n_rows``: the number of rows ``n`` summed over.
    """

    matrices: np.ndarray
    gradients: np.ndarray
    half_squares: np.ndarray
    n_rows: int


def rows_per_block(n_out: int, n_params: int) -> int:
    """Rows whose Jacobian (``rows * n_out * n_params`` float64 numbers) takes about 16 MB; at least 1."""
    return max(1, _BLOCK_BYTES // (8 * n_out * n_params))


def accumulate(net: Network, X: np.ndarray, Y: np.ndarray, block: int | None = None) -> NormalEquations:
    """The sums of the module docstring at ``net``'s current parameters.

    ``X`` ``(n, n_in)`` and ``Y`` ``(n, n_out)`` must already have ``net``'s
    dtype (the callers check and convert them once). ``block`` rows are
    differentiated at a time (default :func:`rows_per_block`).
    """
    n, m, p = X.shape[0], net.n_out, net.n_params
    block = rows_per_block(m, p) if block is None else block
    matrices = np.zeros((m, p, p), dtype=net.dtype)
    gradients = np.zeros((m, p), dtype=net.dtype)
    squares = np.zeros(m, dtype=net.dtype)
    for start in range(0, n, block):
        rows = slice(start, start + block)
        residuals = net.predict(X[rows]) - Y[rows]
        jacobian = net.jacobian(X[rows]).reshape(residuals.shape[0], m, p)
        for k in range(m):
            J_k = jacobian[:, k, :] if m == 1 else np.ascontiguousarray(jacobian[:, k, :])
            matrices[k] += J_k.T @ J_k
            gradients[k] += residuals[:, k] @ J_k
        squares += 0.5 * np.einsum("ik,ik->k", residuals, residuals)
    return NormalEquations(matrices, gradients, squares, n)


def half_squares(net: Network, X: np.ndarray, Y: np.ndarray) -> np.ndarray:
    """``E_k = 1/2 sum_i r_ik^2`` per target, ``(n_out,)``, from one forward pass (no Jacobian)."""
    residuals = net.predict(X) - Y
    return 0.5 * np.einsum("ik,ik->k", residuals, residuals)
