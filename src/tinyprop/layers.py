"""Layers other than activations: the trainable affine map and fixed scalings.

A network is a list of layers applied in order to a batch whose rows are
samples. Three kinds exist:

- :class:`Affine`, the only layer with parameters: ``z = x W^T + b``;
- :class:`~tinyprop.activations.Activation` subclasses, elementwise;
- fixed column scalings (:class:`Standardize`, :class:`Unstandardize`), which
  carry preprocessing inside the model so that a saved or exported network
  cannot be used without it. They have no trainable parameters.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ._validate import as_float_array, positive_int

__all__ = ["Affine", "ColumnScaling", "Standardize", "Unstandardize"]


class Affine:
    """Affine map ``z = x W^T + b`` from ``n_in`` inputs to ``n_out`` units.

    ``weight`` has shape ``(n_out, n_in)``: ``weight[k, j]`` connects input
    ``j`` to unit ``k``. ``bias`` has shape ``(n_out,)``, or is ``None`` when
    built with ``bias=False``. Both start at zero; :class:`~tinyprop.Network`
    draws the initial weights from its seed.

    Derivatives, for a batch ``x`` of shape ``(n, n_in)`` and the delta
    ``d = dE/dz`` of shape ``(n, n_out)``::

        dE/dW = d^T x        (n_out, n_in)
        dE/db = sum_i d[i]   (n_out,)
        dE/dx = d W          (n, n_in)
    """

    def __init__(self, n_in: int, n_out: int, *, bias: bool = True) -> None:
        self.n_in = positive_int(n_in, "n_in")
        self.n_out = positive_int(n_out, "n_out")
        self.weight = np.zeros((self.n_out, self.n_in))
        self.bias: np.ndarray | None = np.zeros(self.n_out) if bias else None

    @property
    def params(self) -> list[np.ndarray]:
        """The live parameter arrays: ``[weight, bias]`` or ``[weight]``."""
        return [self.weight] if self.bias is None else [self.weight, self.bias]

    def value(self, x: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """``x W^T + b``, written into ``out`` when given."""
        # no explicit out=None: it costs numpy 0.04 us a call
        z = np.matmul(x, self.weight.T) if out is None else np.matmul(x, self.weight.T, out=out)
        if self.bias is not None:
            z += self.bias
        return z

    def settings(self) -> dict[str, Any]:
        return {"n_in": self.n_in, "n_out": self.n_out, "bias": self.bias is not None}

    def __repr__(self) -> str:
        return f"Affine({self.n_in}, {self.n_out}, bias={self.bias is not None})"


_SMALLEST_SCALE = 1.0 / np.finfo(np.float64).max  # below this, 1 / scale overflows


class ColumnScaling:
    """Fixed per-column rescaling ``y = x * gain + offset`` built from a mean and a scale.

    No trainable parameters. Derivative: ``dE/dx = dE/dy * gain`` (columnwise).
    Use the two subclasses, which say what the numbers mean.
    """

    def __init__(self, mean: Any, scale: Any) -> None:
        mean = as_float_array(mean, "mean", np.dtype(np.float64))
        scale = as_float_array(scale, "scale", np.dtype(np.float64))
        if mean.ndim != 1 or scale.shape != mean.shape:
            raise ValueError(
                f"mean and scale must be 1-D of equal length, got shapes {mean.shape} and {scale.shape}"
            )
        if np.any(scale <= 0):
            raise ValueError(f"scale must be positive, got {scale.min()} at column {int(np.argmin(scale))}")
        if np.any(scale < _SMALLEST_SCALE):
            column = int(np.argmin(scale))
            raise ValueError(
                f"scale must be at least {_SMALLEST_SCALE:.4g} (so that 1 / scale is finite), got "
                f"{float(scale[column])!r} at column {column}"
            )
        with np.errstate(over="ignore", divide="ignore"):
            gain, offset = self._gain_offset(mean, scale)
        if not (np.isfinite(gain).all() and np.isfinite(offset).all()):
            column = int(np.flatnonzero(~(np.isfinite(gain) & np.isfinite(offset)))[0])
            raise ValueError(
                f"mean {float(mean[column])!r} and scale {float(scale[column])!r} at column {column} give a non-finite "
                f"{type(self).__name__} gain or offset"
            )
        self.mean, self.scale = mean, scale
        self.gain, self.offset = gain, offset

    @staticmethod
    def _gain_offset(mean: np.ndarray, scale: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        raise NotImplementedError

    @classmethod
    def from_data(cls, data: Any) -> "ColumnScaling":
        """Mean and population standard deviation of each column; a constant column gets scale 1.

        Columns whose values are so large that the plain sums overflow (say
        ``+-1e308``) are divided by their largest magnitude ``m`` first:
        ``mean = m * mean(x / m)``, ``std = m * std(x / m)``.
        """
        array = as_float_array(data, "data", np.dtype(np.float64))
        if array.ndim == 1:
            array = array.reshape(-1, 1)
        if array.ndim != 2:
            raise ValueError(f"data must be 1-D or 2-D, got shape {array.shape}")
        with np.errstate(over="ignore", invalid="ignore"):
            mean, scale = array.mean(axis=0), array.std(axis=0)
        for column in np.flatnonzero(~(np.isfinite(mean) & np.isfinite(scale))):
            largest = float(np.max(np.abs(array[:, column])))
            mean[column], scale[column] = _scaled_moments(array[:, column], largest)
        scale[scale == 0] = 1.0  # a computed positive std is at least sqrt(5e-324) ~ 2e-162: 1 / std is finite
        return cls(mean, scale)

    @property
    def width(self) -> int:
        return int(self.mean.shape[0])

    def value(self, x: np.ndarray) -> np.ndarray:
        """``x * gain + offset``."""
        return x * self.gain + self.offset

    def input_gradient(self, d_y: np.ndarray) -> np.ndarray:
        """``dE/dx = dE/dy * gain``."""
        return d_y * self.gain

    def settings(self) -> dict[str, Any]:
        return {"mean": self.mean.tolist(), "scale": self.scale.tolist()}

    def __repr__(self) -> str:
        return f"{type(self).__name__}(width={self.width})"


def _scaled_moments(column: np.ndarray, largest: float) -> tuple[float, float]:
    """Mean and population standard deviation of ``column`` computed on ``column / largest`` (no overflow)."""
    scaled = column / largest
    return float(scaled.mean()) * largest, float(scaled.std()) * largest  # both at most `largest`: finite


class Standardize(ColumnScaling):
    """Input standardisation ``y = (x - mean) / scale``, stored inside the model.

    ``gain = 1 / scale``, ``offset = -mean / scale``. Build it from the
    training inputs with ``Standardize.from_data(X_train)``.
    """

    @staticmethod
    def _gain_offset(mean: np.ndarray, scale: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        return 1.0 / scale, -mean / scale


class Unstandardize(ColumnScaling):
    """Output un-standardisation ``y = x * scale + mean``, stored inside the model.

    The network learns standardised targets while predicting in the targets'
    own units. Build it from the training targets with
    ``Unstandardize.from_data(y_train)``.
    """

    @staticmethod
    def _gain_offset(mean: np.ndarray, scale: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        return scale.copy(), mean.copy()
