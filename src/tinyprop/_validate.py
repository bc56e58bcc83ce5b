"""Input checks shared by the public functions.

Every check raises ``TypeError`` or ``ValueError`` with a message that says
what was expected and what arrived (shape, dtype, the first non-finite row).
Arrays are converted once, to the network's dtype; the caller's array is never
modified (a conversion copies, and no function here writes into its input).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

_NUMERIC_KINDS = "fiu"


def as_float_array(value: Any, name: str, dtype: np.dtype) -> np.ndarray:
    """``value`` as an array of ``dtype``; refuse non-numeric, empty or non-finite data."""
    try:
        array = np.asarray(value)
    except (ValueError, TypeError) as exc:  # ragged nested lists and the like
        raise TypeError(f"{name} must be a numeric array, could not convert it: {exc}") from None
    if array.dtype.kind not in _NUMERIC_KINDS:
        raise TypeError(
            f"{name} must hold real numbers (float or int), got dtype {array.dtype}"
        )
    if array.size == 0:
        raise ValueError(f"{name} is empty (shape {array.shape}); at least one sample is needed")
    with np.errstate(over="ignore"):  # an overflow to inf is reported just below, by row
        converted = array.astype(dtype, copy=False)
    require_finite(converted, name, converted_from=array.dtype)
    return converted


def require_finite(array: np.ndarray, name: str, converted_from: np.dtype | None = None) -> None:
    """Raise ``ValueError`` naming the first row (entry, for 1-D) that holds NaN or infinity."""
    if _sum_is_finite(array):
        return  # a single NaN or inf would make the sum non-finite
    bad = ~np.isfinite(array)
    if not bad.any():
        return  # only the sum overflowed
    index = np.unravel_index(int(np.argmax(bad)), array.shape)
    if len(index) == 1:
        where = f"entry {index[0]}"
    else:
        where = f"row {index[0]}, column {index[1]}" if len(index) == 2 else f"index {tuple(map(int, index))}"
    note = ""
    if converted_from is not None and converted_from != array.dtype:
        note = f" after conversion from {converted_from} to {array.dtype}"
    raise ValueError(f"{name} has a non-finite value ({array[index]}) at {where}{note}")


def _sum_is_finite(array: np.ndarray) -> bool:
    """True when the sum is finite, which proves every entry finite (a False may be overflow only).

    Small arrays are tested entry by entry instead, which is quicker than
    setting up the error state for the sum (and never a False alarm).
    """
    if array.size <= 4096:
        return bool(np.isfinite(array).all())
    with np.errstate(over="ignore", invalid="ignore"):
        return math.isfinite(array.sum())


def _squares_are_finite(array: np.ndarray) -> bool:
    """True when the sum of squares is finite, which proves every entry finite (a False may be overflow only).

    One BLAS dot product of the contiguous ``array`` with itself, without a
    temporary array and without numpy's floating-point warnings: a NaN or an
    infinity makes the sum NaN or infinite; finite entries above about
    ``sqrt(finfo.max)`` may overflow it too, a false alarm that the caller's
    exact check settles.
    """
    return math.isfinite(np.vdot(array, array))


def as_samples(value: Any, name: str, n_columns: int, dtype: np.dtype) -> np.ndarray:
    """A 2-D ``(n, n_columns)`` sample matrix (samples are rows)."""
    if (
        type(value) is np.ndarray
        and value.dtype == dtype
        and value.ndim == 2
        and value.shape[1] == n_columns
        and value.shape[0] > 0
        and (_squares_are_finite(value) if value.flags.c_contiguous else _sum_is_finite(value))
    ):
        return value  # already right: the common case inside training loops, checked cheaply
    array = as_float_array(value, name, dtype)
    if array.ndim != 2 or array.shape[1] != n_columns:
        hint = ""
        if array.ndim == 1:
            hint = (
                f"; for one sample use {name}.reshape(1, -1), "
                f"for one input column use {name}.reshape(-1, 1)"
            )
        raise ValueError(
            f"{name} must have shape (n_samples, {n_columns}), got shape {array.shape}{hint}"
        )
    return array


def as_targets(value: Any, name: str, n_samples: int, n_outputs: int, dtype: np.dtype) -> np.ndarray:
    """Targets as ``(n_samples, n_outputs)``; a 1-D target is accepted when ``n_outputs == 1``."""
    array = as_float_array(value, name, dtype)
    if array.ndim == 1 and n_outputs == 1:
        array = array.reshape(-1, 1)
    if array.shape != (n_samples, n_outputs):
        raise ValueError(
            f"{name} must have shape ({n_samples}, {n_outputs}) to match the "
            f"{n_samples} samples and {n_outputs} network outputs, got shape {array.shape}"
        )
    return array


def positive_int(value: Any, name: str) -> int:
    """``value`` as a positive ``int``; bools and floats are refused."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise TypeError(f"{name} must be a positive integer, got {value!r}")
    if value < 1:
        raise ValueError(f"{name} must be a positive integer, got {value}")
    return int(value)


def real_in_range(
    value: Any, name: str, *, low: float, high: float = math.inf, low_open: bool = False, high_open: bool = False
) -> float:
    """``value`` as a finite ``float`` inside the stated interval, else ``TypeError``/``ValueError``."""
    try:
        number = float(value)
    except (TypeError, ValueError):
        number = None
    if number is None or isinstance(value, (bool, str, bytes)):
        raise TypeError(f"{name} must be a real number, got {value!r}")
    left = "(" if low_open else "["
    right = ")" if high_open else "]"
    inside = (number > low if low_open else number >= low) and (number < high if high_open else number <= high)
    if not math.isfinite(number) or not inside:
        raise ValueError(f"{name} must be a finite number in {left}{low}, {high}{right}, got {value!r}")
    return number


def seed_value(seed: Any, name: str = "seed", *, required: bool = False) -> int | None:
    """``None`` (unless ``required``) or a non-negative integer seed for ``numpy.random.default_rng``.

    ``TypeError`` for anything but an integer (bools included) or ``None``,
    ``ValueError`` for a negative integer.
    """
    expected = "an integer >= 0" if required else "None or an integer >= 0"
    if seed is None and not required:
        return None
    if seed is None or isinstance(seed, bool) or not isinstance(seed, (int, np.integer)):
        raise TypeError(f"{name} must be {expected}, got {seed!r}")
    if seed < 0:
        raise ValueError(f"{name} must be {expected}, got {seed}")
    return int(seed)


def kind_of(value: Any) -> str:
    """How to name what arrived: a class passed where an instance belongs is called out."""
    if isinstance(value, type):
        return f"the class {value.__name__}; pass an instance, {value.__name__}()"
    return f"a {type(value).__name__}"
