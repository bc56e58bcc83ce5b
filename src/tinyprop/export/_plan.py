"""A network as a list of computation steps, with its numbers in the export dtype.

Both generators walk the same :class:`Plan`. Each layer becomes one step, in
order, carrying exactly the numbers ``Network.predict`` uses, converted to the
export dtype the way ``net.copy(dtype)`` converts them:

- :class:`AffineStep`: ``z_k = (sum_j W[k, j] x_j) + b_k``, the sum taken in
  order ``j = 0, 1, ...`` and the bias added last;
- :class:`ScalingStep`: ``y_j = x_j * gain_j + offset_j`` (Standardize:
  ``gain = 1/scale``, ``offset = -mean/scale``; Unstandardize: ``gain =
  scale``, ``offset = mean``);
- :class:`ActivationStep`: ``a = f(z)`` elementwise.

Scaling layers are kept as steps of their own rather than folded into the
neighbouring affine layer. Folding (``W' = W diag(gain)``, ``b' = b + W
offset``) is exact in real arithmetic but not in floating point: for an input
whose mean is large against its spread (a 3.7 V cell voltage varying by 10 mV)
the folded sum cancels large terms and loses about ``log10(|mean|/scale)``
digits, which float32 cannot spare. As separate steps the generated code
rounds exactly as ``Network.predict`` does.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Union

import numpy as np

from .._validate import require_finite
from ..activations import Activation
from ..layers import Affine, ColumnScaling
from ..network import Network

__all__ = [
    "AffineStep",
    "ScalingStep",
    "ActivationStep",
    "Step",
    "Plan",
    "make_plan",
    "route_work_arrays",
    "work_array_widths",
]


@dataclass(frozen=True)
class AffineStep:
    """``z = x W^T + b`` for one sample; ``bias`` is ``None`` for a layer without bias."""

    layer: int
    weight: np.ndarray
    bias: np.ndarray | None

    @property
    def width(self) -> int:
        return int(self.weight.shape[0])

    def describe(self) -> str:
        n_out, n_in = self.weight.shape
        return f"Affine {n_in} -> {n_out}, {'with' if self.bias is not None else 'no'} bias"


@dataclass(frozen=True)
class ScalingStep:
    """``y = x * gain + offset`` column by column (a Standardize or Unstandardize layer)."""

    layer: int
    kind: str
    gain: np.ndarray
    offset: np.ndarray
    mean: np.ndarray
    scale: np.ndarray

    @property
    def width(self) -> int:
        return int(self.gain.shape[0])

    def describe(self) -> str:
        formula = "(x - mean) / scale" if self.kind == "Standardize" else "x * scale + mean"
        return f"{self.kind} {self.width} columns: y = {formula}, as x * gain + offset"


@dataclass(frozen=True)
class ActivationStep:
    """``a = f(z)`` elementwise over ``width`` values."""

    layer: int
    activation: Activation
    width: int

    def describe(self) -> str:
        return repr(self.activation)


Step = Union[AffineStep, ScalingStep, ActivationStep]


@dataclass(frozen=True)
class Plan:
    """The steps of a network in order, the export dtype and the input/output widths."""

    steps: tuple[Step, ...]
    dtype: np.dtype
    n_in: int
    n_out: int

    @property
    def scalings(self) -> tuple[ScalingStep, ...]:
        return tuple(step for step in self.steps if isinstance(step, ScalingStep))


def make_plan(net: Network, dtype: np.dtype) -> Plan:
    """Walk ``net.layers`` into a :class:`Plan` with arrays converted to ``dtype``.

    Refuses (``TypeError``) a layer whose ``value`` is not the library's own
    formula, since its computation is unknown, and (``ValueError``) numbers that
    are not finite in ``dtype`` (a float64 weight beyond 3.4e38 in float32).
    """
    if not isinstance(net, Network):
        raise TypeError(f"net must be a tinyprop Network, got {type(net).__name__}")
    steps: list[Step] = []
    width = net.n_in
    for index, layer in enumerate(net.layers):
        where = f"layer {index} ({type(layer).__name__})"
        if isinstance(layer, Affine) and type(layer).value is Affine.value:
            bias = None if layer.bias is None else _convert(layer.bias, f"{where} bias", dtype)
            steps.append(AffineStep(index, _convert(layer.weight, f"{where} weight", dtype), bias))
            width = layer.n_out
        elif isinstance(layer, ColumnScaling) and type(layer).value is ColumnScaling.value:
            steps.append(ScalingStep(
                index,
                type(layer).__name__,
                _convert(layer.gain, f"{where} gain", dtype),
                _convert(layer.offset, f"{where} offset", dtype),
                np.array(layer.mean, dtype=np.float64),
                np.array(layer.scale, dtype=np.float64),
            ))
        elif isinstance(layer, Activation):
            steps.append(ActivationStep(index, layer, width))
        else:
            raise TypeError(
                f"{where} cannot be exported: only Affine, Standardize, Unstandardize and "
                "activations with the library's own value() are supported"
            )
    return Plan(tuple(steps), dtype, net.n_in, net.n_out)


def _convert(array: np.ndarray, name: str, dtype: np.dtype) -> np.ndarray:
    """A read-only copy of ``array`` in ``dtype``, refused if any entry is not finite there."""
    with np.errstate(over="ignore"):
        converted = np.array(array, dtype=dtype)
    require_finite(converted, name, converted_from=np.asarray(array).dtype)
    converted.setflags(write=False)
    return converted


def route_work_arrays(steps: Sequence[tuple[bool, int]], first: str) -> list[tuple[str, str, int]]:
    """``(source, target, width)`` per step ``(is_affine, width)`` of generated C code.

    The input array is ``first``; the work arrays are ``a`` and ``b``. An
    affine step writes the other array than it reads (it cannot work in
    place); an elementwise step works in place, out of the input into ``a``
    when it comes first.
    """
    routes = []
    current = first
    for is_affine, width in steps:
        if is_affine:
            target = "b" if current == "a" else "a"
        else:
            target = "a" if current == first else current
        routes.append((current, target, width))
        current = target
    return routes


def work_array_widths(routes: Sequence[tuple[str, str, int]]) -> dict[str, int]:
    """The width of each work array :func:`route_work_arrays` uses, ``{"a": ..., "b": ...}``."""
    widths: dict[str, int] = {}
    for _, target, width in routes:
        widths[target] = max(widths.get(target, 0), width)
    return widths
