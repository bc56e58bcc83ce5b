"""Losses: a value ``E(y_hat, y)`` and its gradient ``dE/dy_hat``.

``y_hat`` is the network output ``(n, n_out)``; ``y`` the targets, same shape
(a 1-D ``y`` is accepted when ``n_out == 1``). The gradient is what
:meth:`tinyprop.Network.backward` takes as ``d_out``.

The two cross-entropies take the network output as *logits* (the network ends
in an affine layer with no activation) and apply the sigmoid or softmax
themselves. This keeps them finite for any logit and makes the output delta
the simple ``p - y``; their :meth:`probabilities` method turns outputs into
probabilities.
"""

from __future__ import annotations

import numpy as np

from ._settings_equality import Configured
from .activations import Sigmoid, Softplus

__all__ = [
    "Loss",
    "SquaredError",
    "MeanSquaredError",
    "CrossEntropyOnSigmoid",
    "CrossEntropyOnSoftmax",
    "HuberError",
]


class Loss(Configured):
    """Base class: ``value(y_hat, y) -> float`` and ``gradient(y_hat, y) -> array``.

    ``sums_over_samples`` says how the value grows with the rows: ``False``
    (the default) for a mean over samples, ``True`` for a sum
    (:class:`SquaredError`). :func:`tinyprop.train` uses it to assemble an
    epoch's training loss from its mini-batch losses.
    """

    sums_over_samples: bool = False

    def value(self, y_hat: np.ndarray, y: np.ndarray) -> float:
        raise NotImplementedError

    def gradient(self, y_hat: np.ndarray, y: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def kink_distance(self, y_hat: np.ndarray, y: np.ndarray) -> float:
        """Distance of the outputs from a point where the loss is not twice differentiable.

        Infinite for smooth losses; numerical checks keep their steps below it.
        """
        return float("inf")


def _pair(y_hat: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Check shapes; bring a 1-D target to ``(n, 1)``; match ``y``'s dtype to ``y_hat``."""
    if (
        type(y_hat) is np.ndarray and type(y) is np.ndarray and y_hat.ndim == 2 and y.shape == y_hat.shape
        and y.dtype == y_hat.dtype and y_hat.dtype.kind == "f"
    ):
        return y_hat, y  # already right: the common case in a training loop
    y_hat = np.asarray(y_hat)
    y = np.asarray(y)
    if y.ndim == 1 and y_hat.ndim == 2 and y_hat.shape[1] == 1:
        y = y.reshape(-1, 1)
    if y.shape != y_hat.shape or y_hat.ndim != 2:
        raise ValueError(
            f"targets must have the output's shape {y_hat.shape} (n_samples, n_outputs), got {y.shape}"
        )
    if y_hat.dtype.kind != "f":
        raise TypeError(f"y_hat must be a float array, got dtype {y_hat.dtype}")
    return y_hat, y.astype(y_hat.dtype, copy=False)


_softplus = Softplus().value
_sigmoid = Sigmoid().value


class SquaredError(Loss):
    """Half the sum of squared residuals over all samples and outputs.

    ``E = 1/2 sum_{i,k} (y_hat[i,k] - y[i,k])**2``, ``dE/dy_hat = y_hat - y``.

    The classical backpropagation error; its value grows with the batch size.
    """

    sums_over_samples = True

    def value(self, y_hat: np.ndarray, y: np.ndarray) -> float:
        y_hat, y = _pair(y_hat, y)
        r = y_hat - y
        return 0.5 * float(np.vdot(r, r))

    def gradient(self, y_hat: np.ndarray, y: np.ndarray) -> np.ndarray:
        y_hat, y = _pair(y_hat, y)
        return y_hat - y


class MeanSquaredError(Loss):
    """Mean over samples of the sum over outputs of squared residuals.

    ``E = (1/n) sum_{i,k} (y_hat[i,k] - y[i,k])**2``,
    ``dE/dy_hat = (2/n) (y_hat - y)``.
    """

    def value(self, y_hat: np.ndarray, y: np.ndarray) -> float:
        y_hat, y = _pair(y_hat, y)
        r = y_hat - y
        return float(np.vdot(r, r)) / y_hat.shape[0]

    def gradient(self, y_hat: np.ndarray, y: np.ndarray) -> np.ndarray:
        y_hat, y = _pair(y_hat, y)
        r = np.subtract(y_hat, y)
        r *= 2.0 / y_hat.shape[0]  # a Python float keeps the array's dtype
        return r


class CrossEntropyOnSigmoid(Loss):
    """Binary cross-entropy of targets ``y`` in [0, 1] and ``p = sigmoid(z)``, from logits ``z``.

    ``E = (1/n) sum_{i,k} [-y log p - (1 - y) log(1 - p)]
        = (1/n) sum_{i,k} [softplus(z) - y z]``,
    ``dE/dz = (sigmoid(z) - y) / n``.

    The second form is evaluated; ``softplus(z) = max(z, 0) + log1p(exp(-|z|))``
    is finite for every finite ``z``. Each output column is an independent
    yes/no probability.

    ``target_weights = (w0, w1)`` (default ``(1, 1)``) weighs the term of
    target 0 by ``w0`` and that of target 1 by ``w1`` (class weights for a
    yes/no column): with ``-log p = softplus(-z)`` and
    ``-log(1 - p) = softplus(z)``,
    ``E = (1/n) sum_{i,k} [w1 y softplus(-z) + w0 (1 - y) softplus(z)]``,
    ``dE/dz = (w0 (1 - y) p - w1 y (1 - p)) / n``,
    which is the unweighted loss and gradient when ``w0 = w1 = 1``.
    """

    def __init__(self, target_weights: tuple[float, float] = (1.0, 1.0)) -> None:
        try:
            weights = tuple(float(w) for w in target_weights)
        except (TypeError, ValueError):
            weights = ()
        if len(weights) != 2 or not all(np.isfinite(w) and w > 0 for w in weights):
            raise ValueError(f"target_weights must be two finite numbers > 0 (for targets 0 and 1), "
                             f"got {target_weights!r}")
        self.target_weights = weights

    def settings(self) -> dict[str, tuple[float, ...]]:
        return {} if self.target_weights == (1.0, 1.0) else {"target_weights": self.target_weights}

    def value(self, y_hat: np.ndarray, y: np.ndarray) -> float:
        z, y = _pair(y_hat, y)
        if self.target_weights == (1.0, 1.0):
            return float(np.sum(_softplus(z) - y * z)) / z.shape[0]
        w0, w1 = self.target_weights
        return float(np.sum(w1 * y * _softplus(-z) + w0 * (1.0 - y) * _softplus(z))) / z.shape[0]

    def gradient(self, y_hat: np.ndarray, y: np.ndarray) -> np.ndarray:
        z, y = _pair(y_hat, y)
        p = _sigmoid(z)
        if self.target_weights == (1.0, 1.0):
            return (p - y) * z.dtype.type(1.0 / z.shape[0])
        w0, w1 = (z.dtype.type(w) for w in self.target_weights)
        return (w0 * (1 - y) * p - w1 * y * (1 - p)) * z.dtype.type(1.0 / z.shape[0])

    def probabilities(self, y_hat: np.ndarray) -> np.ndarray:
        """``sigmoid(z)``: the probability of each output being 1."""
        return _sigmoid(np.asarray(y_hat))


class CrossEntropyOnSoftmax(Loss):
    """Categorical cross-entropy of target rows ``y`` and ``p = softmax(z)``, from logits ``z``.

    With ``lse(z_i) = log sum_k exp(z_ik)`` and ``log p_ik = z_ik - lse(z_i)``:
    ``E = (1/n) sum_{i,k} y_ik (lse(z_i) - z_ik)``,
    ``dE/dz_ik = (p_ik sum_k' y_ik' - y_ik) / n``, which is ``(p - y) / n``
    for target rows that sum to one (one-hot or class probabilities).

    ``lse`` is computed after subtracting each row's maximum, so no
    exponential overflows.
    """

    def value(self, y_hat: np.ndarray, y: np.ndarray) -> float:
        z, y = _pair(y_hat, y)
        shifted = z - z.max(axis=1, keepdims=True)
        log_p = shifted - np.log(np.exp(shifted).sum(axis=1, keepdims=True))
        return -float(np.sum(y * log_p)) / z.shape[0]

    def gradient(self, y_hat: np.ndarray, y: np.ndarray) -> np.ndarray:
        z, y = _pair(y_hat, y)
        p = self.probabilities(z)
        return (p * y.sum(axis=1, keepdims=True) - y) * z.dtype.type(1.0 / z.shape[0])

    def probabilities(self, y_hat: np.ndarray) -> np.ndarray:
        """``softmax(z)`` per row: class probabilities."""
        z = np.asarray(y_hat)
        e = np.exp(z - z.max(axis=1, keepdims=True))
        return e / e.sum(axis=1, keepdims=True)


class HuberError(Loss):
    """Huber's robust loss (Huber 1964, Ann. Math. Statist. 35(1)), mean over samples.

    With residual ``r = y_hat - y`` and threshold ``c > 0``:
    ``rho(r) = r**2 / 2`` if ``|r| <= c`` else ``c (|r| - c/2)``;
    ``E = (1/n) sum_{i,k} rho(r_ik)``, ``dE/dy_hat = clip(r, -c, c) / n``.

    Quadratic near zero, linear in the tails, so outliers pull with bounded force.
    """

    def __init__(self, threshold: float = 1.0) -> None:
        threshold = float(threshold)
        if not np.isfinite(threshold) or threshold <= 0:
            raise ValueError(f"HuberError threshold must be a finite number > 0, got {threshold!r}")
        self.threshold = threshold

    def value(self, y_hat: np.ndarray, y: np.ndarray) -> float:
        y_hat, y = _pair(y_hat, y)
        a = np.abs(y_hat - y)
        c = self.threshold
        rho = np.where(a <= c, 0.5 * a * a, c * (a - 0.5 * c))
        return float(np.sum(rho)) / y_hat.shape[0]

    def gradient(self, y_hat: np.ndarray, y: np.ndarray) -> np.ndarray:
        y_hat, y = _pair(y_hat, y)
        c = y_hat.dtype.type(self.threshold)
        return np.clip(y_hat - y, -c, c) * y_hat.dtype.type(1.0 / y_hat.shape[0])

    def settings(self) -> dict[str, float]:
        return {"threshold": self.threshold}

    def kink_distance(self, y_hat: np.ndarray, y: np.ndarray) -> float:
        """``min | |r| - c |``: rho switches from quadratic to linear at ``|r| = c``."""
        y_hat, y = _pair(y_hat, y)
        return float(np.min(np.abs(np.abs(y_hat - y) - self.threshold)))
