"""argparse value types: each turns the text of one option into a value or names what is wrong."""

from __future__ import annotations

import argparse
import math


def positive_int(text: str) -> int:
    """A whole number >= 1."""
    return _whole(text, 1, "a positive whole number")


def seed(text: str) -> int:
    """A whole number >= 0."""
    return _whole(text, 0, "a whole number >= 0")


def positive_float(text: str) -> float:
    value = _float(text)
    if value <= 0:
        raise argparse.ArgumentTypeError(f"expected a positive number, got {text!r}")
    return value


def non_negative_float(text: str) -> float:
    value = _float(text)
    if value < 0:
        raise argparse.ArgumentTypeError(f"expected a number >= 0, got {text!r}")
    return value


def numbers(text: str) -> list[float]:
    """Comma-separated finite numbers."""
    return [_float(part.strip()) for part in text.split(",")]


def fraction(text: str) -> float:
    """A number in ``[0, 1)``."""
    return _below_one(text, "a fraction")


def momentum(text: str) -> float:
    """A number in ``[0, 1)``."""
    return _below_one(text, "a momentum")


def widths(text: str) -> tuple[int, ...]:
    """Comma-separated hidden-layer widths, e.g. ``16,16``."""
    parts = [part.strip() for part in text.split(",")]
    try:
        values = tuple(int(part) for part in parts)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"expected comma-separated positive whole numbers such as 16,16, got {text!r}"
        ) from None
    if any(v < 1 for v in values):
        raise argparse.ArgumentTypeError(f"every hidden-layer width must be at least 1, got {text!r}")
    return values


def names(text: str) -> list[str]:
    """Comma-separated column names; the option may also be repeated."""
    parts = [part.strip() for part in text.split(",")]
    if not all(parts):
        raise argparse.ArgumentTypeError(f"expected comma-separated column names, got an empty name in {text!r}")
    return parts


def number(text: str) -> float:
    """A finite number."""
    return _float(text)


def _float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not math.isfinite(value):
        raise argparse.ArgumentTypeError(f"expected a finite number, got {text!r}")
    return value


def _whole(text: str, lowest: int, expected: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected {expected}, got {text!r}") from None
    if value < lowest:
        raise argparse.ArgumentTypeError(f"expected {expected}, got {value}")
    return value


def _below_one(text: str, expected: str) -> float:
    value = _float(text)
    if not 0.0 <= value < 1.0:
        raise argparse.ArgumentTypeError(f"expected {expected} from 0 up to (not including) 1, got {text!r}")
    return value
