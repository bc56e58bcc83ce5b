"""Equality, hashing and repr from a ``settings()`` dict (activations and losses share them)."""

from __future__ import annotations

from typing import Any


class Configured:
    """Two objects are equal when they are of the same class with the same ``settings()``."""

    def settings(self) -> dict[str, Any]:
        """The constructor arguments that recreate this object (for saving and for ``repr``)."""
        return {}

    def __eq__(self, other: object) -> bool:
        return type(self) is type(other) and self.settings() == other.settings()  # type: ignore[attr-defined]

    def __hash__(self) -> int:
        return hash((type(self).__name__, tuple(sorted(self.settings().items()))))

    def __repr__(self) -> str:
        args = ", ".join(f"{k}={v!r}" for k, v in self.settings().items())
        return f"{type(self).__name__}({args})"
