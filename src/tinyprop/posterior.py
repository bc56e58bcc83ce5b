"""Uncertainty of a regularised fit: the Gaussian posterior of the evidence framework.

For a network fitted by ``solve(..., regularization=...)`` (minimising
``sum_k beta_k E_k + alpha/2 ||theta||^2``, :mod:`tinyprop.evidence`), the
Laplace (Gauss-Newton) approximation of the posterior of the parameters is
Gaussian with mean ``theta`` and covariance ``H^-1``, where

    H = sum_k beta_k J_k^T J_k + alpha I

(MacKay (1992), "A practical Bayesian framework for backpropagation
networks", Neural Computation 4(3), 448-472, section 4, with one noise
precision ``beta_k`` per target). For a new input ``x0`` and target ``k``,
with ``g = d f_k(x0) / d theta``, the predictive distribution of a new
observation is Gaussian with (MacKay 1992, eq. 4.4 there, "error bars")

    variance of the fitted mean      g^T H^-1 g
    predictive variance              1 / beta_k + g^T H^-1 g

and the interval at level ``L`` is ``f_k(x0) +- z sqrt(...)`` with
``z = Phi^-1((1 + L)/2)``, the standard normal quantile (the noise
precision is a point estimate, as in MacKay's treatment; no Student-t
widening). ``H`` is positive definite whenever ``alpha > 0``, so unlike the
unregularised covariance ``s^2 (J^T J)^-1`` it exists for any network,
over-parameterised ones included: the prior fills the directions the data do
not determine.

Assumptions: the network is locally linear in ``theta`` over the posterior's
width, the noise of each target is independent, Gaussian and of constant
variance, and the fit has converged (see ``docs/uncertainty.md``).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ._validate import as_samples, real_in_range
from .intervals import PredictionIntervals
from .network import Network

__all__ = ["PosteriorUncertainty", "posterior_uncertainty"]


@dataclass(frozen=True, kw_only=True, eq=False)
class PosteriorUncertainty:
    """What :func:`posterior_uncertainty` returns (module docstring formulas).

    ``theta``: the float64 parameters; ``labels``: one per parameter.
    ``covariance``: ``H^-1``; ``standard_errors``: ``sqrt(diag H^-1)``;
    ``correlation``: ``H^-1`` scaled to unit diagonal. ``noise_sd``:
    ``1 / sqrt(beta_k)`` per target, ``(n_out,)``; ``penalty``: ``alpha``;
    ``effective_parameters``: ``gamma``; ``n_params``: ``p``;
    ``n_residuals``: ``n * n_out``. ``network``: a float64 copy at ``theta``.
    """

    theta: np.ndarray = field(repr=False)
    labels: tuple[str, ...] = field(repr=False)
    covariance: np.ndarray = field(repr=False)
    standard_errors: np.ndarray = field(repr=False)
    correlation: np.ndarray = field(repr=False)
    noise_sd: np.ndarray
    penalty: float
    effective_parameters: float
    n_params: int
    n_residuals: int
    network: Network = field(repr=False)
    _factor: Any = field(repr=False)

    def prediction_intervals(self, X: Any, *, level: float = 0.95) -> PredictionIntervals:
        """Intervals of the fitted mean and of a new observation at inputs ``X`` ``(m, n_in)``, per target.

        Returns a :class:`~tinyprop.intervals.PredictionIntervals` whose
        ``t_quantile`` is the normal quantile ``z`` and whose
        ``degrees_of_freedom`` is ``None``. ``g^T H^-1 g`` is evaluated as
        ``||L^-1 g||^2`` with the Cholesky factor ``H = L L^T``, never
        negative.
        """
        from scipy import linalg, stats

        level = real_in_range(level, "level", low=0.0, high=1.0, low_open=True, high_open=True)
        X64 = as_samples(X, "X", self.network.n_in, self.network.dtype)
        out = self.network.predict(X64)
        G = self.network.jacobian(X64)  # (m * n_out, p), row i * n_out + k
        B = linalg.solve_triangular(self._factor, G.T, lower=True)
        mean_variance = np.einsum("ij,ij->j", B, B).reshape(out.shape)
        z = float(stats.norm.ppf(0.5 + level / 2))
        return PredictionIntervals.from_variances(level, z, None, out, mean_variance, self.noise_sd**2)

    def to_dict(self) -> dict[str, Any]:
        """JSON-able summary: the hyperparameters and, per parameter, its value and posterior standard deviation."""
        return {
            "rank_deficient": False,
            "posterior": True,
            "noise_sd": [float(s) for s in self.noise_sd],
            "penalty": self.penalty,
            "effective_parameters": self.effective_parameters,
            "n_params": self.n_params,
            "n_residuals": self.n_residuals,
            "parameters": [
                {"label": label, "value": float(value), "standard_error": float(se)}
                for label, value, se in zip(self.labels, self.theta, self.standard_errors)
            ],
        }


def posterior_uncertainty(work: Network, result: Any, labels: tuple[str, ...]) -> PosteriorUncertainty:
    """The posterior of the module docstring for ``work`` (a float64 copy at ``result.theta``).

    ``labels``: one per parameter (:func:`tinyprop.uncertainty.parameter_labels`).
    ``result`` is the :class:`~tinyprop.solve.SolveResult` of a regularised
    fit (its ``normal_matrices``, ``noise_sd`` and ``penalty`` are used).
    """
    from scipy import linalg

    beta = 1.0 / np.asarray(result.noise_sd, dtype=np.float64) ** 2
    A = np.asarray(result.normal_matrices, dtype=np.float64)
    H = np.einsum("k,kij->ij", beta, A)
    H[np.diag_indices_from(H)] += float(result.penalty)
    L = linalg.cholesky(H, lower=True)
    L_inv = linalg.solve_triangular(L, np.eye(H.shape[0]), lower=True)
    covariance = L_inv.T @ L_inv
    root = np.sqrt(np.diag(covariance))
    correlation = covariance / root[:, None] / root[None, :]
    np.fill_diagonal(correlation, 1.0)
    return PosteriorUncertainty(
        theta=work.get_vector(),
        labels=labels,
        covariance=covariance,
        standard_errors=root,
        correlation=correlation,
        noise_sd=np.asarray(result.noise_sd, dtype=np.float64),
        penalty=float(result.penalty),
        effective_parameters=float(result.effective_parameters),
        n_params=int(H.shape[0]),
        n_residuals=int(np.size(result.residuals)),
        network=work,
        _factor=L,
    )
