"""JSON chores shared by model files, ensembles, sweeps, optimizers and training state.

- :func:`canonical_json`: the one text of a JSON value (keys sorted, no spaces,
  ASCII only, no NaN or infinity), so equal values give equal bytes;
- :func:`sha256_hex`: the SHA-256 hex digest of such a text;
- :func:`json_copy`: a deep copy of nested dicts and lists (tuples become lists,
  as in a JSON round trip), without going through text;
- :func:`finite_or_none`: a number JSON can hold, or ``None`` (JSON has no NaN
  or infinity).
"""

from __future__ import annotations

import hashlib
import json
import math
from typing import Any


def canonical_json(value: Any) -> str:
    """``value`` as JSON with sorted keys, no whitespace, ASCII only; ``ValueError`` for NaN or infinity.

    >>> canonical_json({"b": [1, 2.5], "a": "\u00e9"})
    '{"a":"\\\\u00e9","b":[1,2.5]}'
    """
    return json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=True, allow_nan=False)


def sha256_hex(text: str) -> str:
    """SHA-256 (64 lowercase hex digits) of an ASCII text such as :func:`canonical_json` gives."""
    return hashlib.sha256(text.encode("ascii")).hexdigest()


def json_copy(value: Any) -> Any:
    """A deep copy of nested dicts and lists of scalars; tuples become lists.

    >>> original = {"state": {"inc": 3}, "shape": (2, 1)}
    >>> copied = json_copy(original)
    >>> copied, copied["state"] is original["state"]
    ({'state': {'inc': 3}, 'shape': [2, 1]}, False)
    """
    if isinstance(value, dict):
        return {key: json_copy(item) for key, item in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_copy(item) for item in value]
    return value


def finite_or_none(value: float | None) -> float | None:
    """``value`` when it is a finite number, else ``None`` (written as ``null``).

    >>> finite_or_none(1.5), finite_or_none(float("inf")), finite_or_none(None)
    (1.5, None, None)
    """
    return value if value is not None and math.isfinite(value) else None
