"""The input box: checking it, the points to start from, the time shares, the local optimiser."""

from __future__ import annotations

import time
from typing import Any, Callable

import numpy as np

from .._validate import as_float_array, real_in_range, seed_value

_RANDOM_STARTS = 256
_MAX_CORNERS = 1024  # all 2**n corners up to n = 10 inputs
_LOCAL_ITERATIONS = 60


def checked_box(low: Any, high: Any, n_in: int, dtype: np.dtype) -> tuple[np.ndarray, np.ndarray]:
    """``low``, ``high`` as float64 arrays ``(n_in,)`` with ``low <= high``; a scalar is accepted for ``n_in == 1``.

    Both must also be finite in the network's ``dtype`` (as ``predict`` requires of its inputs).
    """
    box = []
    for name, value in (("low", low), ("high", high)):
        array = as_float_array(value, name, np.dtype(np.float64)).reshape(-1) if np.ndim(value) <= 1 else None
        if array is None or array.shape != (n_in,):
            shape = np.shape(value)
            raise ValueError(f"{name} must hold one number per network input ({n_in}), got shape {shape}")
        as_float_array(array, name, dtype)
        box.append(array.copy())
    low, high = box
    if np.any(low > high):
        j = int(np.argmax(low > high))
        raise ValueError(f"low must not exceed high, got low[{j}] = {low[j]} > high[{j}] = {high[j]}")
    return low, high


def starting_points(low: np.ndarray, high: np.ndarray, seed: int | None) -> np.ndarray:
    """The centre, the corners (up to 10 inputs) and uniform random points of the box."""
    n = low.size
    points = [0.5 * low + 0.5 * high]
    if 2**n <= _MAX_CORNERS:
        bits = (np.arange(2**n)[:, None] >> np.arange(n)) & 1
        points.extend(np.where(bits == 1, high, low))
    rng = np.random.default_rng(seed_value(seed))
    points.extend(low + rng.uniform(size=(_RANDOM_STARTS, n)) * (high - low))
    return np.clip(np.array(points), low, high)


def resolution(dtype: np.dtype) -> Callable[[np.ndarray, np.ndarray], np.ndarray]:
    """Boxes narrower than a few spacings of the network's dtype are not worth splitting."""

    def narrowest(lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
        return 4.0 * np.spacing(np.maximum(np.abs(lo), np.abs(hi)).astype(dtype)).astype(np.float64)

    return narrowest


class Clock:
    """Shares ``max_seconds`` among ``runs`` searches: each gets an equal part of what is left."""

    def __init__(self, max_seconds: float, runs: int) -> None:
        seconds = real_in_range(max_seconds, "max_seconds", low=0.0, low_open=True)
        self.start = time.monotonic()
        self.end = self.start + seconds
        self.runs_left = runs

    def next_deadline(self) -> float:
        now = time.monotonic()
        share = max(self.end - now, 0.0) / max(self.runs_left, 1)
        self.runs_left -= 1
        return now + share

    @property
    def seconds(self) -> float:
        return time.monotonic() - self.start


def local_minimiser(
    value_and_gradient: Callable[[np.ndarray], tuple[float, np.ndarray]], low: np.ndarray, high: np.ndarray
) -> Callable[[np.ndarray], tuple[np.ndarray, float]]:
    """``polish(x0) -> (x, value)``: L-BFGS-B (scipy.optimize) within the box from ``x0``.

    The returned value is re-evaluated at the returned point, so it is what
    the network computes there, whatever the optimiser reported.
    """
    from scipy.optimize import minimize  # scipy only when bounds are computed

    bounds = list(zip(low, high))

    def polish(x0: np.ndarray) -> tuple[np.ndarray, float]:
        result = minimize(value_and_gradient, x0, jac=True, method="L-BFGS-B", bounds=bounds,
                          options={"maxiter": _LOCAL_ITERATIONS})
        x = np.clip(np.asarray(result.x, np.float64), low, high)
        return x, float(value_and_gradient(x)[0])

    return polish


def check_tolerance(tolerance: Any) -> float:
    return real_in_range(tolerance, "tolerance", low=0.0)


def check_max_splits(max_splits: Any) -> int | None:
    if max_splits is None:
        return None
    if isinstance(max_splits, bool) or not isinstance(max_splits, (int, np.integer)) or max_splits < 0:
        raise ValueError(f"max_splits must be None or an integer >= 0, got {max_splits!r}")
    return int(max_splits)
