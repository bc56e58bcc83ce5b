"""The ``metadata`` argument of the exporters: names and units of inputs and outputs, a description."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

__all__ = ["Port", "Metadata", "check_metadata"]


@dataclass(frozen=True)
class Port:
    """One input or output of the model: its name and unit ("" when not given)."""

    name: str
    unit: str = ""


@dataclass(frozen=True)
class Metadata:
    """Checked metadata: input and output descriptions (or empty) and a description."""

    inputs: tuple[Port, ...] = ()
    outputs: tuple[Port, ...] = ()
    description: str = ""


_METADATA_KEYS = ("inputs", "outputs", "description")
_PORT_KEYS = ("name", "unit")


def check_metadata(metadata: Any, n_in: int, n_out: int) -> Metadata:
    """Check and normalise the ``metadata`` argument of the exporters.

    Accepted form (every key optional)::

        {"inputs":  [{"name": str, "unit": str}, ...],   # n_in entries, in input order
         "outputs": [{"name": str, "unit": str}, ...],   # n_out entries, in output order
         "description": str}

    ``"unit"`` may be left out of an entry. Any other key is refused, so a
    misspelt key is not silently ignored. The strings may contain anything;
    they are escaped where they are written.
    """
    if metadata is None:
        return Metadata()
    if not isinstance(metadata, Mapping):
        raise TypeError(f"metadata must be a dict or None, got {type(metadata).__name__}")
    unknown = sorted(str(k) for k in metadata if k not in _METADATA_KEYS)
    if unknown:
        raise ValueError(f"metadata keys must be among {_METADATA_KEYS}, got unknown {unknown}")
    description = metadata.get("description", "")
    if not isinstance(description, str):
        raise TypeError(f"metadata['description'] must be a str, got {type(description).__name__}")
    return Metadata(
        inputs=_check_ports(metadata.get("inputs"), "inputs", n_in),
        outputs=_check_ports(metadata.get("outputs"), "outputs", n_out),
        description=description,
    )


def _check_ports(entries: Any, key: str, count: int) -> tuple[Port, ...]:
    if entries is None:
        return ()
    if isinstance(entries, (str, bytes)) or not isinstance(entries, Sequence):
        raise TypeError(f"metadata[{key!r}] must be a list of dicts, got {type(entries).__name__}")
    if len(entries) != count:
        raise ValueError(
            f"metadata[{key!r}] must have one entry per network {key[:-1]} ({count}), "
            f"got {len(entries)}"
        )
    ports = []
    for index, entry in enumerate(entries):
        where = f"metadata[{key!r}][{index}]"
        if not isinstance(entry, Mapping):
            raise TypeError(f"{where} must be a dict with 'name' and optionally 'unit', got {entry!r}")
        unknown = sorted(str(k) for k in entry if k not in _PORT_KEYS)
        if unknown or "name" not in entry:
            raise ValueError(
                f"{where} must have the key 'name' and optionally 'unit', got keys {sorted(map(str, entry))}"
            )
        values = [entry["name"], entry.get("unit", "")]
        for field, value in zip(_PORT_KEYS, values):
            if not isinstance(value, str):
                raise TypeError(f"{where}[{field!r}] must be a str, got {type(value).__name__}")
        ports.append(Port(*values))
    return tuple(ports)
