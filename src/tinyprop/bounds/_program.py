"""A network as a list of float64 steps, and interval arithmetic through it.

:func:`make_program` turns a :class:`~tinyprop.Network` into steps (affine,
activation, column scaling) whose arrays are float64 copies of the
network's (exact, also for a float32 network). :meth:`Program.intervals` runs
interval bound propagation (Moore 1966; Gowal et al. 2018, "On the
effectiveness of interval bound propagation") through them for many boxes at
once: the boxes are the rows of ``lo`` and ``hi``, of shape ``(B, n_in)``.

Each interval encloses the value the network computes in its own dtype, not
only the exact one: an affine step computed in dtype ``d`` is within
``gamma_n(d) (|W| |x| + |b|)`` of ``W x + b`` (Higham, section 3.1), a
scaling within ``gamma_2(d) (|x gain| + |offset|)``, an activation within
its declared error; the float64 rounding of the bound itself is covered by a
margin with ``gamma_n(float64)`` and outward rounding (see ``_arith``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..activations import Activation
from ..layers import Affine, ColumnScaling
from ..network import Network
from ._arith import FLOAT64, Rounding, centre_radius, magnitude, widen
from ._rules import ActivationRules, rules_for


@dataclass(frozen=True)
class AffineStep:
    weight: np.ndarray  # (n_out, n_in)
    bias: np.ndarray  # (n_out,), zeros when the layer has none
    gamma: float  # gamma_n of the network's dtype plus float64's for this step's products


@dataclass(frozen=True)
class ScalingStep:
    gain: np.ndarray
    offset: np.ndarray


@dataclass(frozen=True)
class ActivationStep:
    rules: ActivationRules


Step = AffineStep | ScalingStep | ActivationStep


@dataclass
class Intervals:
    """What interval propagation found for a batch of boxes.

    ``lo[i]``, ``hi[i]``: the interval of the input of step ``i`` (``(B, width)``);
    the last entry is the output. ``terms[i]`` for an affine step: ``|W| |x| + |b|``
    with ``|x|`` the magnitude of its input interval, the scale of its rounding.
    ``lines[i]`` for an activation step: its relaxation lines, once computed.
    """

    lo: list[np.ndarray]
    hi: list[np.ndarray]
    terms: dict[int, np.ndarray]
    lines: dict[int, tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]]


class Program:
    """The steps of a network in float64, with the rounding of the network's dtype."""

    def __init__(self, net: Network) -> None:
        if not isinstance(net, Network):
            raise TypeError(f"net must be a tinyprop.Network, got {type(net).__name__}")
        self.net = net
        self.rounding = Rounding(net.dtype)
        self.n_in, self.n_out = net.n_in, net.n_out
        self.steps: list[Step] = []
        for index, layer in enumerate(net.layers):
            if isinstance(layer, Affine):
                weight = np.asarray(layer.weight, np.float64)
                bias = np.zeros(weight.shape[0]) if layer.bias is None else np.asarray(layer.bias, np.float64)
                n = weight.shape[1] + 1  # terms of each of the network's dot products
                gamma = self.rounding.gamma(n) + FLOAT64.gamma(max(weight.shape) + 3)
                self.steps.append(AffineStep(weight, bias, gamma))
            elif isinstance(layer, ColumnScaling):
                self.steps.append(ScalingStep(np.asarray(layer.gain, np.float64), np.asarray(layer.offset, np.float64)))
            elif isinstance(layer, Activation):
                self.steps.append(ActivationStep(rules_for(layer, self.rounding, f"layer {index}")))
            else:  # pragma: no cover - Network refuses other layers
                raise TypeError(f"layer {index} is {type(layer).__name__}, which bounds cannot handle")

    # ------------------------------------------------------------------ input box
    def computed_box(self, low: np.ndarray, high: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The box of inputs the network actually sees: ``predict`` rounds inputs to its dtype.

        Rounding to nearest is monotone, so ``x`` in ``[low, high]`` becomes a
        value in ``[round(low), round(high)]``.
        """
        dtype = self.rounding.dtype
        return low.astype(dtype).astype(np.float64), high.astype(dtype).astype(np.float64)

    # ------------------------------------------------------------------ forward
    def intervals(self, lo: np.ndarray, hi: np.ndarray) -> Intervals:
        """Interval propagation for the boxes ``[lo, hi]`` (rows), enclosing the network's computed values."""
        found = Intervals([lo], [hi], {}, {})
        for i in range(len(self.steps)):
            self.advance(found, i)
        return found

    def advance(self, found: Intervals, i: int) -> None:
        """Append the interval of step ``i``'s output, from its input's (the last in ``found``)."""
        net, own = self.rounding, FLOAT64
        step, lo, hi = self.steps[i], found.lo[-1], found.hi[-1]
        if isinstance(step, AffineStep):
            c, r = centre_radius(lo, hi)
            term = magnitude(lo, hi) @ np.abs(step.weight).T + np.abs(step.bias)
            centre = c @ step.weight.T + step.bias
            radius = r @ np.abs(step.weight).T
            n = step.weight.shape[1] + 1
            margin = 2.0 * (step.gamma * term + n * (net.tiny + own.tiny))
            lo, hi = widen(centre - radius, centre + radius, margin)
            found.terms[i] = term
        elif isinstance(step, ScalingStep):
            a, b = lo * step.gain, hi * step.gain
            term = magnitude(lo, hi) * np.abs(step.gain) + np.abs(step.offset)
            margin = 2.0 * ((net.gamma(2) + own.gamma(3)) * term + 2 * (net.tiny + own.tiny))
            lo, hi = widen(np.minimum(a, b) + step.offset, np.maximum(a, b) + step.offset, margin)
        else:
            lo, hi = step.rules.value_range(lo, hi)
        found.lo.append(lo)
        found.hi.append(hi)

    def lines(self, found: Intervals, i: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """The relaxation lines of activation step ``i`` on its input intervals (computed once)."""
        if i not in found.lines:
            found.lines[i] = self.steps[i].rules.lines(found.lo[i], found.hi[i])
        return found.lines[i]
