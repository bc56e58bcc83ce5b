"""Weight initialisation schemes.

Each scheme draws an ``(n_out, n_in)`` weight matrix from a zero-mean uniform
distribution ``U(-r, r)`` whose limit ``r`` keeps the variance of the signal
roughly constant from layer to layer; biases start at zero.

- ``"glorot"``: ``r = sqrt(6 / (n_in + n_out))``. Glorot & Bengio (2010),
  "Understanding the difficulty of training deep feedforward neural networks",
  AISTATS. Suited to sigmoid, tanh and linear units; the default.
- ``"he"``: ``r = sqrt(6 / n_in)``. He, Zhang, Ren & Sun (2015), "Delving Deep
  into Rectifiers", ICCV. Suited to ReLU-family units.
- ``"lecun"``: ``r = sqrt(3 / n_in)``. LeCun, Bottou, Orr & Müller (1998),
  "Efficient BackProp", in Neural Networks: Tricks of the Trade.
"""

from __future__ import annotations

import math

import numpy as np

SCHEMES = ("glorot", "he", "lecun")


def uniform_limit(scheme: str, n_in: int, n_out: int) -> float:
    """The half-width ``r`` of ``U(-r, r)`` for ``scheme`` (see the module docstring)."""
    if scheme == "glorot":
        return math.sqrt(6.0 / (n_in + n_out))
    if scheme == "he":
        return math.sqrt(6.0 / n_in)
    if scheme == "lecun":
        return math.sqrt(3.0 / n_in)
    raise ValueError(f"unknown initialisation scheme {scheme!r}; expected one of {SCHEMES}")


def draw_weight(
    rng: np.random.Generator, scheme: str, n_in: int, n_out: int, dtype: np.dtype
) -> np.ndarray:
    """An ``(n_out, n_in)`` weight matrix drawn from ``U(-r, r)`` in float64, then cast."""
    r = uniform_limit(scheme, n_in, n_out)
    return rng.uniform(-r, r, size=(n_out, n_in)).astype(dtype)
