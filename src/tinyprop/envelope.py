"""The operating envelope of a model: the range of every input it was fitted on, or that its user vouches for.

An :class:`Envelope` holds, per input ``j``, a closed interval
``[low[j], high[j]]`` (float64, finite, ``low <= high``), optional input names
and a ``source`` saying where the limits came from (``"training data"``,
``"set by user"``, ...). The recipes record the envelope of their training
rows, in the inputs' own units (before any scaling layer); the user can widen
it or set any input's limits. Outside the envelope no statement tinyprop makes
about a model holds: its errors were measured, and its bounds proven, on
rows inside it (``docs/guarantees.md``).

A model file keeps the envelope in its metadata under the key ``"envelope"``
(``docs/model-file.md``)::

    {"low": [float, ...], "high": [float, ...], "source": str, "names": [str, ...]}

``"names"`` is optional. :meth:`Envelope.to_metadata` returns ``{"envelope":
{...}}``, ready to merge into the metadata passed to ``tinyprop.save``, and
:meth:`Envelope.from_metadata` reads it back exactly (JSON keeps every float64
digit), or raises :class:`EnvelopeError` naming what is malformed.

:meth:`Envelope.check` compares rows with the envelope and returns an
:class:`EnvelopeCheck`: for every input outside on some row, how many rows
and the largest distance beyond the nearer limit, absolute and in units of
the input's width ``high - low``.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._validate import as_float_array, real_in_range
from ._words import count

__all__ = ["Envelope", "EnvelopeCheck", "InputOutside", "EnvelopeError", "OutsideEnvelope", "ENVELOPE_KEY"]

ENVELOPE_KEY = "envelope"
"""The key of the model file's metadata that holds the envelope."""

_ENTRY_KEYS = ("low", "high", "source", "names")


class EnvelopeError(ValueError):
    """A stored envelope (model metadata) is malformed: the message says what was expected and what was found."""


class OutsideEnvelope(UserWarning):
    """Issued by :meth:`Envelope.warn_outside` when rows lie outside the envelope."""


@dataclass(frozen=True, eq=False)
class Envelope:
    """Per-input limits ``low[j] <= x[j] <= high[j]``, optional input ``names``, and their ``source``.

    ``low`` and ``high`` are converted to read-only float64 copies (the
    caller's arrays are not kept); both must be 1-D, of the same length
    ``n_in >= 1``, finite, with ``low <= high``. ``names``: ``None`` or one
    string per input. ``source``: where the limits came from, in words.

    >>> import tinyprop as tp
    >>> env = tp.Envelope.of_rows([[1.0, 10.0], [3.0, 30.0]], names=["a", "b"])
    >>> env.low.tolist(), env.high.tolist(), env.source
    ([1.0, 10.0], [3.0, 30.0], 'training data')
    >>> env.widened(0.5).low.tolist()
    [0.0, 0.0]
    """

    low: np.ndarray
    high: np.ndarray
    names: tuple[str, ...] | None = None
    source: str = "set by user"

    def __post_init__(self) -> None:
        low, high = _limits(self.low, "low"), _limits(self.high, "high")
        if low.shape != high.shape:
            raise ValueError(f"low and high must have one entry per input each, got {low.size} and {high.size}")
        reversed_ = np.flatnonzero(low > high)
        if reversed_.size:
            j = int(reversed_[0])
            raise ValueError(f"low must not exceed high; input {j} has low {float(low[j])!r} > high {float(high[j])!r}"
                             + (f" (and {reversed_.size - 1} more inputs)" if reversed_.size > 1 else ""))
        names = self.names
        if names is not None:
            if isinstance(names, str) or not isinstance(names, Sequence):
                raise TypeError(f"names must be None or a sequence of strings, got {type(names).__name__}")
            names = tuple(names)
            if len(names) != low.size or not all(isinstance(name, str) for name in names):
                raise ValueError(f"names must hold one string per input ({low.size}), got {list(names)!r}")
        if not isinstance(self.source, str) or not self.source:
            raise TypeError(f"source must be a non-empty string, got {self.source!r}")
        for array in (low, high):
            array.flags.writeable = False
        object.__setattr__(self, "low", low)
        object.__setattr__(self, "high", high)
        object.__setattr__(self, "names", names)

    # ------------------------------------------------------------------ construction
    @classmethod
    def of_rows(cls, X: Any, *, names: Sequence[str] | None = None, source: str = "training data") -> "Envelope":
        """The smallest envelope holding every row of ``X`` ``(n, n_in)``: the column minima and maxima.

        ``X`` is not modified; it must be finite and hold at least one row.
        """
        rows = as_float_array(X, "X", np.dtype(np.float64))
        if rows.ndim != 2:
            raise ValueError(f"X must have shape (n_rows, n_inputs), got shape {rows.shape}")
        return cls(rows.min(axis=0), rows.max(axis=0), names, source)

    @property
    def n_in(self) -> int:
        """The number of inputs."""
        return int(self.low.size)

    @property
    def width(self) -> np.ndarray:
        """``high - low`` per input (``inf`` where the difference exceeds the float64 range)."""
        with np.errstate(over="ignore"):
            return self.high - self.low

    def label(self, j: int) -> str:
        """``"input 'name'"`` when the envelope has names, else ``"input j"``."""
        return f"input {j}" if self.names is None else f"input {self.names[j]!r}"

    def widened(self, fraction: float) -> "Envelope":
        """Each input's range grown by ``fraction`` of its width on both sides.

        ``low - fraction * w`` to ``high + fraction * w`` with ``w = high - low``;
        an input of zero width (one value ``v`` in the data) grows by
        ``fraction * max(|v|, 1)`` on both sides instead, so it gets a range of
        its own. ``fraction >= 0``; ``0`` gives an equal envelope.
        """
        fraction = real_in_range(fraction, "fraction", low=0.0)
        if fraction == 0.0:
            return self
        grow = fraction * np.where(self.width > 0, self.width, np.maximum(np.abs(self.low), 1.0))
        with np.errstate(over="ignore"):
            low, high = self.low - grow, self.high + grow
        if not (np.isfinite(low).all() and np.isfinite(high).all()):
            raise ValueError(f"widening by {fraction:g} of each width leaves the float64 range; use a smaller fraction")
        return Envelope(low, high, self.names, f"{self.source}, widened by {fraction:g} of each width on both sides")

    def with_limits(self, which: int | str, low: float, high: float) -> "Envelope":
        """A copy with input ``which`` (its index, or its name) limited to ``[low, high]`` instead."""
        j = self._index(which)
        lows, highs = self.low.copy(), self.high.copy()
        lows[j] = real_in_range(low, "low", low=-math.inf)
        highs[j] = real_in_range(high, "high", low=-math.inf)
        name = self.names[j] if self.names is not None else f"input {j}"
        return Envelope(lows, highs, self.names, f"{self.source}; {name} set by user")

    def _index(self, which: int | str) -> int:
        if isinstance(which, str):
            if self.names is None or which not in self.names:
                known = "the envelope has no names" if self.names is None else f"names are {list(self.names)!r}"
                raise ValueError(f"no input named {which!r}; {known}")
            return self.names.index(which)
        if isinstance(which, bool) or not isinstance(which, (int, np.integer)):
            raise TypeError(f"which must be an input index or name, got {which!r}")
        if not 0 <= which < self.n_in:
            raise ValueError(f"input index must be in 0 .. {self.n_in - 1}, got {which}")
        return int(which)

    # ------------------------------------------------------------------ checking rows
    def check(self, X: Any) -> "EnvelopeCheck":
        """Compare the rows of ``X`` (``(n, n_in)``, or one row ``(n_in,)``) with the envelope.

        A value is outside when it lies below ``low`` or above ``high`` (the
        limits themselves are inside). ``X`` must be finite; it is not modified.
        """
        rows = as_float_array(X, "X", np.dtype(np.float64))
        if rows.ndim == 1:
            rows = rows.reshape(1, -1)
        if rows.ndim != 2 or rows.shape[1] != self.n_in:
            raise ValueError(f"X must have shape (n_rows, {self.n_in}) for an envelope of {self.n_in} inputs, "
                             f"got shape {rows.shape}")
        with np.errstate(over="ignore"):  # a distance beyond the float64 range is reported as inf
            distance = np.maximum(np.maximum(self.low - rows, rows - self.high), 0.0)
        outside = distance > 0
        found = []
        for j in np.flatnonzero(outside.any(axis=0)):
            largest = float(distance[:, j].max())
            width = float(self.width[j])
            found.append(InputOutside(
                index=int(j), name=None if self.names is None else self.names[j],
                rows=int(outside[:, j].sum()), largest=largest,
                largest_in_widths=largest / width if width > 0 else math.inf,
                lowest=float(rows[:, j].min()), highest=float(rows[:, j].max()),
            ))
        rows_outside = outside.any(axis=1)
        rows_outside.flags.writeable = False
        return EnvelopeCheck(self, int(rows.shape[0]), rows_outside, tuple(found))

    def contains(self, X: Any) -> bool:
        """Whether every row of ``X`` lies inside the envelope (limits included)."""
        return self.check(X).inside

    def warn_outside(self, X: Any, *, units: Sequence[str] | None = None) -> "EnvelopeCheck":
        """:meth:`check`, and an :class:`OutsideEnvelope` warning listing every input outside on some row.

        ``units``: one unit per input (``""`` for none), used in the message.
        Returns the check either way.
        """
        result = self.check(X)
        if not result.inside:
            warnings.warn("; ".join(result.lines(units)), OutsideEnvelope, stacklevel=2)
        return result

    # ------------------------------------------------------------------ metadata
    def to_metadata(self) -> dict[str, Any]:
        """``{"envelope": {"low": [...], "high": [...], "source": ..., "names": [...]}}`` (``names`` if any).

        Merge it into a model's metadata before saving:
        ``tp.save(net, path, metadata={**metadata, **env.to_metadata()})``.
        """
        entry: dict[str, Any] = {"low": [float(v) for v in self.low], "high": [float(v) for v in self.high],
                                 "source": self.source}
        if self.names is not None:
            entry["names"] = list(self.names)
        return {ENVELOPE_KEY: entry}

    @classmethod
    def from_metadata(cls, metadata: Mapping[str, Any], *, n_in: int | None = None) -> "Envelope | None":
        """The envelope stored in a model's ``metadata`` (``None`` when it has no ``"envelope"`` key).

        ``n_in``: when given, the stored envelope must have that many inputs.
        :class:`EnvelopeError` for a malformed entry, saying what was
        expected and what was found.
        """
        if not isinstance(metadata, Mapping):
            raise TypeError(f"metadata must be a dict, got {type(metadata).__name__}")
        if ENVELOPE_KEY not in metadata:
            return None
        entry = metadata[ENVELOPE_KEY]
        expected = ("an object {\"low\": [numbers], \"high\": [numbers], \"source\": text, optionally "
                    "\"names\": [texts]}")
        if not isinstance(entry, Mapping):
            raise EnvelopeError(f"metadata['envelope'] must be {expected}, found {type(entry).__name__}")
        unknown = sorted(str(key) for key in entry if key not in _ENTRY_KEYS)
        missing = [key for key in ("low", "high", "source") if key not in entry]
        if unknown or missing:
            raise EnvelopeError(f"metadata['envelope'] must be {expected}; found keys {sorted(map(str, entry))}"
                                + (f" (missing {missing})" if missing else "")
                                + (f" (unknown {unknown})" if unknown else ""))
        limits = [_stored_numbers(entry[key], key) for key in ("low", "high")]
        if len(limits[0]) != len(limits[1]):
            raise EnvelopeError(f"metadata['envelope'] must list as many 'low' as 'high' limits, found "
                                f"{len(limits[0])} and {len(limits[1])}")
        if n_in is not None and len(limits[0]) != n_in:
            raise EnvelopeError(f"metadata['envelope'] must give limits for each of the model's {n_in} inputs, "
                                f"found {len(limits[0])}")
        names = entry.get("names")
        if names is not None and not (isinstance(names, list) and all(isinstance(n, str) for n in names)):
            raise EnvelopeError(f"metadata['envelope']['names'] must be a list of texts, found {names!r}")
        if not isinstance(entry["source"], str) or not entry["source"]:
            raise EnvelopeError(f"metadata['envelope']['source'] must be a non-empty text, found {entry['source']!r}")
        try:
            return cls(np.array(limits[0]), np.array(limits[1]), names, entry["source"])
        except (TypeError, ValueError) as exc:
            raise EnvelopeError(f"metadata['envelope'] is not a valid envelope: {exc}") from None

    # ------------------------------------------------------------------ comparison, text
    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Envelope):
            return NotImplemented
        return (np.array_equal(self.low, other.low) and np.array_equal(self.high, other.high)
                and self.names == other.names and self.source == other.source)

    __hash__ = None  # type: ignore[assignment]

    def __str__(self) -> str:
        lines = [f"envelope ({self.source}):"]
        for j in range(self.n_in):
            lines.append(f"  {self.label(j)}: {float(self.low[j])!r} .. {float(self.high[j])!r}")
        return "\n".join(lines)


@dataclass(frozen=True)
class InputOutside:
    """One input that lies outside the envelope on some rows.

    ``index`` and ``name`` (``None`` without names); ``rows``: how many rows;
    ``largest``: the largest distance beyond the nearer limit, in the input's
    units; ``largest_in_widths``: the same divided by the input's width
    ``high - low`` (infinite for a zero-width range); ``lowest`` /
    ``highest``: the smallest and largest value of the input in the rows checked.
    """

    index: int
    name: str | None
    rows: int
    largest: float
    largest_in_widths: float
    lowest: float
    highest: float


@dataclass(frozen=True, eq=False)
class EnvelopeCheck:
    """What :meth:`Envelope.check` found: ``rows`` checked, ``outside_rows`` (a bool per row), ``inputs`` outside.

    ``inside`` is true when no row lies outside. ``lines(units)`` gives one
    line per input outside; ``str()`` a summary.
    """

    envelope: Envelope
    rows: int
    outside_rows: np.ndarray
    inputs: tuple[InputOutside, ...]

    @property
    def inside(self) -> bool:
        """No value of any row lies outside the envelope."""
        return not self.inputs

    def lines(self, units: Sequence[str] | None = None) -> list[str]:
        """One line per input outside: its name, rows outside, the limits, and the largest distance beyond them.

        ``units``: one unit per input (``""`` for none); distances and limits
        are then given in it.
        """
        env = self.envelope
        if units is not None and len(units) != env.n_in:
            raise ValueError(f"units must give one entry per input ({env.n_in}), got {len(units)}")
        lines = []
        for entry in self.inputs:
            j = entry.index
            unit = f" {units[j]}" if units is not None and units[j] else ""
            relative = (f"{entry.largest_in_widths:.3g} of its width" if math.isfinite(entry.largest_in_widths)
                        else "its range has zero width")
            lines.append(f"{env.label(j)}: {entry.rows} of {count(self.rows, 'row')} outside the envelope "
                         f"[{env.low[j]:.6g}, {env.high[j]:.6g}]{unit}, up to {entry.largest:.4g}{unit} beyond "
                         f"({relative}; values seen {entry.lowest:.6g} .. {entry.highest:.6g}{unit})")
        return lines

    def __str__(self) -> str:
        if self.inside:
            return f"all {count(self.rows, 'row')} inside the envelope ({self.envelope.source})"
        head = (f"{int(self.outside_rows.sum())} of {count(self.rows, 'row')} outside the envelope "
                f"({self.envelope.source}):")
        return "\n".join([head] + [f"  {line}" for line in self.lines()])


def _limits(value: Any, name: str) -> np.ndarray:
    array = as_float_array(value, name, np.dtype(np.float64))
    if array.ndim != 1:
        raise ValueError(f"{name} must be 1-D, one entry per input, got shape {array.shape}")
    return array.copy()


def _stored_numbers(value: Any, key: str) -> list[float]:
    numbers = isinstance(value, list) and value and all(
        isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) for v in value)
    if not numbers:
        raise EnvelopeError(f"metadata['envelope'][{key!r}] must be a non-empty list of finite numbers, "
                            f"found {value!r}")
    return [float(v) for v in value]
