"""A reviewer's certificate: the output and slope bounds of one network over one box, as text and JSON.

Every number in the JSON record is a float written so that it reads back
exactly (Python's shortest round-trip repr); witness inputs are the exact
points at which the reported values were evaluated.
"""

from __future__ import annotations

import datetime
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np

from .._version import __version__
from ..modelfile import fingerprint
from ..network import Network
from .gradient import GradientBounds, gradient_bounds
from .output import OutputBounds, output_bounds

__all__ = ["Certificate", "certificate"]

CAUTION = (
    "tinyprop is not certified for safety functions. These bounds hold for the network as "
    "tinyprop evaluates it in its dtype (see docs/guarantees.md); validating the network, and "
    "any code generated from it, against the applicable functional-safety standards, local "
    "codes and qualified review is the user's responsibility."
)


@dataclass(frozen=True)
class Certificate:
    """Output bounds and slope bounds of one network over one box, with what identifies them."""

    outputs: OutputBounds
    slopes: GradientBounds
    fingerprint: str
    input_names: tuple[str, ...]
    output_names: tuple[str, ...]
    created: str
    version: str

    def as_dict(self) -> dict[str, Any]:
        """A JSON-ready record (``json.dumps(cert.as_dict())`` works as it stands)."""
        o, s = self.outputs, self.slopes
        outputs = []
        for k, name in enumerate(self.output_names):
            outputs.append({
                "name": name,
                "lower": float(o.lower[k]), "upper": float(o.upper[k]),
                "lowest_found": float(o.lowest_found[k]), "lowest_input": _floats(o.lowest_input[k]),
                "highest_found": float(o.highest_found[k]), "highest_input": _floats(o.highest_input[k]),
                "lower_gap": float(o.lower_gap[k]), "upper_gap": float(o.upper_gap[k]),
                "stopped_by": list(o.stopped[k]),
                "slopes": [self._slope(k, j, name) for j, name in enumerate(self.input_names)],
            })
        return {
            "kind": "tinyprop envelope certificate",
            "tinyprop_version": self.version,
            "created_utc": self.created,
            "network_fingerprint": self.fingerprint,
            "dtype": o.dtype,
            "box": {name: [float(o.low[j]), float(o.high[j])] for j, name in enumerate(self.input_names)},
            "output_method": o.method,
            "slope_method": s.method,
            "output_tolerance": o.tolerance, "output_tolerance_met": o.met,
            "slope_tolerance": s.tolerance, "slope_tolerance_met": s.met,
            "seconds": {"outputs": o.seconds, "slopes": s.seconds},
            "splits": {"outputs": o.splits, "slopes": s.splits},
            "outputs": outputs,
            "caution": CAUTION,
        }

    def _slope(self, k: int, j: int, name: str) -> dict[str, Any]:
        s = self.slopes
        record = {
            "input": name,
            "lower": float(s.lower[k, j]), "upper": float(s.upper[k, j]),
            "lowest_found": float(s.lowest_found[k, j]), "highest_found": float(s.highest_found[k, j]),
            "lipschitz": float(s.lipschitz[k, j]),
            "monotone": {1: "non-decreasing", -1: "non-increasing", 0: "not proven"}[int(s.direction[k, j])],
            "stopped_by": list(s.stopped[k][j]),
        }
        for key, pairs in (("falling_pair", s.falling_pairs), ("rising_pair", s.rising_pairs)):
            if (k, j) in pairs:
                record[key] = [_floats(pairs[(k, j)][0]), _floats(pairs[(k, j)][1])]
        return record

    def text(self) -> str:
        """The certificate for a reader: one block per output."""
        o, s = self.outputs, self.slopes
        lines = [
            "tinyprop envelope certificate",
            f"  network fingerprint {self.fingerprint} ({o.dtype}), tinyprop {self.version}, created {self.created}",
            "  box: " + ", ".join(
                f"{n} in [{float(o.low[j])!r}, {float(o.high[j])!r}]" for j, n in enumerate(self.input_names)
            ),
            f"  outputs: {o.method}",
            f"  slopes: {s.method}",
            f"  time {o.seconds:.2f} s (outputs) + {s.seconds:.2f} s (slopes); "
            f"output tolerance {o.tolerance:g} {'met' if o.met else 'NOT met'}, "
            f"slope tolerance {s.tolerance:g} {'met' if s.met else 'NOT met'}",
        ]
        for k, name in enumerate(self.output_names):
            lines += [
                f"{name}:",
                f"  guaranteed range [{float(o.lower[k])!r}, {float(o.upper[k])!r}]",
                f"  lowest found {float(o.lowest_found[k])!r} at {_floats(o.lowest_input[k])} "
                f"(gap {o.lower_gap[k]:.3g}, stopped by {o.stopped[k][0]})",
                f"  highest found {float(o.highest_found[k])!r} at {_floats(o.highest_input[k])} "
                f"(gap {o.upper_gap[k]:.3g}, stopped by {o.stopped[k][1]})",
            ]
            for j, input_name in enumerate(self.input_names):
                record = self._slope(k, j, input_name)
                line = (f"  d {name} / d {input_name} in [{record['lower']:.6g}, {record['upper']:.6g}], "
                        f"Lipschitz bound {record['lipschitz']:.6g}, monotone: {record['monotone']}")
                for key, verb in (("falling_pair", "falls"), ("rising_pair", "rises")):
                    if key in record:
                        a, b = record[key]
                        line += f"; {verb} from {a} to {b} (checked)"
                lines.append(line)
        lines.append("Caution: " + CAUTION)
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.text()


def certificate(
    net: Network,
    low: Any,
    high: Any,
    *,
    tolerance: float = 1e-6,
    slope_tolerance: float = 1e-3,
    max_seconds: float = 20.0,
    max_splits: int | None = None,
    input_names: Sequence[str] | None = None,
    output_names: Sequence[str] | None = None,
) -> Certificate:
    """Output bounds and slope bounds of ``net`` over the box ``[low, high]``, for a reviewer.

    Half of ``max_seconds`` goes to :func:`tinyprop.output_bounds` (with
    ``tolerance``), half to :func:`tinyprop.gradient_bounds` (with
    ``slope_tolerance``); ``max_splits`` is passed to both (a budget that
    does not depend on the machine's speed). Names default to ``x0, x1, ...``
    and ``y0, y1, ...``.
    ``.text()`` is for reading, ``.as_dict()`` for ``json.dump``.

    >>> import json, tinyprop as tp
    >>> net = tp.Network([tp.Affine(2, 3), tp.Tanh(), tp.Affine(3, 1)], seed=0)
    >>> cert = tp.certificate(net, [0.0, 0.0], [1.0, 1.0], max_seconds=2.0)
    >>> record = json.loads(json.dumps(cert.as_dict()))
    >>> record["outputs"][0]["lower"] <= record["outputs"][0]["lowest_found"]
    True
    """
    names_in = _names(input_names, net.n_in, "x", "input_names") if isinstance(net, Network) else ()
    names_out = _names(output_names, net.n_out, "y", "output_names") if isinstance(net, Network) else ()
    created = datetime.datetime.now(datetime.timezone.utc).replace(microsecond=0).isoformat()
    outputs = output_bounds(net, low, high, tolerance=tolerance, max_seconds=max_seconds / 2, max_splits=max_splits)
    slopes = gradient_bounds(net, low, high, tolerance=slope_tolerance, max_seconds=max_seconds / 2,
                             max_splits=max_splits)
    return Certificate(outputs, slopes, fingerprint(net), names_in, names_out, created, __version__)


def _names(names: Sequence[str] | None, n: int, stem: str, what: str) -> tuple[str, ...]:
    if names is None:
        return tuple(f"{stem}{i}" for i in range(n))
    if isinstance(names, str) or len(names) != n or not all(isinstance(x, str) for x in names):
        raise ValueError(f"{what} must be {n} strings, got {names!r}")
    return tuple(names)


def _floats(values: np.ndarray) -> list[float]:
    return [float(v) for v in values]
