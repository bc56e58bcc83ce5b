"""The record of prediction intervals at new inputs, shared by both kinds of fitted-network uncertainty.

:mod:`tinyprop.uncertainty` (a least-squares fit: covariance ``s^2 (J^T J)^-1``,
Student's t) and :mod:`tinyprop.posterior` (a regularised fit: covariance
``H^-1``, one noise variance per target, the normal quantile) both return a
:class:`PredictionIntervals`; the formulas are in those modules.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from ._validate import as_targets

__all__ = ["PredictionIntervals"]


@dataclass(frozen=True, kw_only=True, eq=False)
class PredictionIntervals:
    """Intervals at new inputs (formulas in :mod:`tinyprop.uncertainty` and :mod:`tinyprop.posterior`).

    Arrays have shape ``(m, n_out)`` for ``m`` new inputs. ``prediction``:
    the network output ``f(x0)``. ``mean_standard_error``: ``sqrt(g^T C g)``.
    ``prediction_standard_error``: ``sqrt(s^2 + g^T C g)``. ``mean_lower`` /
    ``mean_upper``: confidence interval of the fitted mean. ``lower`` /
    ``upper``: prediction interval for a new observation. ``level``: the
    confidence level; ``t_quantile``: ``t_{(1 + level)/2, dof}``;
    ``degrees_of_freedom``: ``N - p``. For the posterior of a regularised
    fit (:mod:`tinyprop.posterior`) ``t_quantile`` is the normal quantile
    ``z_{(1 + level)/2}``, ``degrees_of_freedom`` is ``None`` and
    ``s^2`` is the noise variance ``1 / beta_k`` of each target.
    """

    level: float
    t_quantile: float
    degrees_of_freedom: int | None
    prediction: np.ndarray
    mean_standard_error: np.ndarray
    prediction_standard_error: np.ndarray
    mean_lower: np.ndarray
    mean_upper: np.ndarray
    lower: np.ndarray
    upper: np.ndarray

    @classmethod
    def from_variances(
        cls, level: float, quantile: float, degrees_of_freedom: int | None, prediction: np.ndarray,
        mean_variance: np.ndarray, noise_variance: float | np.ndarray,
    ) -> "PredictionIntervals":
        """Intervals ``prediction +- quantile * sqrt(variance)`` for the mean (``mean_variance``, ``g^T C g``)
        and for a new observation (``noise_variance + mean_variance``; a scalar, or one per output)."""
        mean_se = np.sqrt(mean_variance)
        prediction_se = np.sqrt(noise_variance + mean_variance)
        return cls(
            level=level,
            t_quantile=quantile,
            degrees_of_freedom=degrees_of_freedom,
            prediction=prediction,
            mean_standard_error=mean_se,
            prediction_standard_error=prediction_se,
            mean_lower=prediction - quantile * mean_se,
            mean_upper=prediction + quantile * mean_se,
            lower=prediction - quantile * prediction_se,
            upper=prediction + quantile * prediction_se,
        )

    @property
    def half_width(self) -> np.ndarray:
        """Half-width of the prediction interval, ``t * sqrt(s^2 + g^T C g)``."""
        return self.t_quantile * self.prediction_standard_error

    def contains(self, y: Any) -> np.ndarray:
        """Boolean ``(m, n_out)``: ``lower <= y <= upper`` (1-D ``y`` for one output)."""
        m, n_out = self.prediction.shape
        target = as_targets(y, "y", m, n_out, np.dtype(np.float64))
        return (self.lower <= target) & (target <= self.upper)
