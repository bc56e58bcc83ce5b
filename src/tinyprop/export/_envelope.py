"""The operating envelope in generated code: the ``envelope`` argument, its limits in C, its header lines.

With ``envelope=`` an :class:`~tinyprop.envelope.Envelope`, the generated
function also reports which inputs lie outside it (C: the count, as the
return value; Python: the list of indices, as the second item of the result).
An input is outside when it is below its low limit, above its high limit, or
not a number; the limits themselves are inside. The outputs are computed all
the same.

C ``float`` limits are rounded inward to ``float`` (the low limit up, the high
limit down, :func:`c_limits`), so that a ``float`` input is counted outside
exactly when its value lies outside the float64 envelope; ``double`` limits
are the envelope's numbers themselves.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ..envelope import Envelope
from ._metadata import Metadata
from ._source import comment_text

__all__ = ["check_envelope", "c_limits", "envelope_lines"]


def check_envelope(envelope: Any, n_in: int) -> Envelope | None:
    """``None``, or an :class:`Envelope` with one limit pair per network input."""
    if envelope is None:
        return None
    if not isinstance(envelope, Envelope):
        raise TypeError(f"envelope must be None or a tinyprop.Envelope, got {type(envelope).__name__}")
    if envelope.n_in != n_in:
        raise ValueError(f"envelope must have one range per network input ({n_in}), got {envelope.n_in}")
    return envelope


def c_limits(envelope: Envelope, ctype: str) -> tuple[list[float], list[float]]:
    """The limits as ``ctype`` numbers: for ``float`` the low limit rounded up, the high limit rounded down.

    A ``float`` value ``v`` then satisfies ``v >= low_f`` exactly when ``v >= low`` (``low_f`` is the
    smallest ``float`` not below ``low``), and likewise for ``high``.
    """
    if ctype == "double":
        return envelope.low.tolist(), envelope.high.tolist()
    with np.errstate(over="ignore"):
        low, high = envelope.low.astype(np.float32), envelope.high.astype(np.float32)
    low = np.where(low.astype(np.float64) < envelope.low, np.nextafter(low, np.float32(np.inf)), low)
    high = np.where(high.astype(np.float64) > envelope.high, np.nextafter(high, np.float32(-np.inf)), high)
    return [float(v) for v in low], [float(v) for v in high]


def envelope_lines(envelope: Envelope, meta: Metadata, low: list[str], high: list[str]) -> list[str]:
    """Header comment lines: where the envelope came from and every input's limits (as written), by name."""
    lines = [f"Operating envelope ({comment_text(envelope.source)}); outside it no statement made by",
             "tinyprop about the model holds. Limits, low .. high:"]
    for j in range(envelope.n_in):
        port = meta.inputs[j] if meta.inputs else None
        name = "" if port is None else f" {comment_text(port.name)}"
        unit = "" if port is None or not port.unit else f" [{comment_text(port.unit)}]"
        lines.append(f"  x[{j}]{name}: {low[j]} .. {high[j]}{unit}")
    return lines
