"""A network as integer steps with Q formats, and the bit-exact reference of their arithmetic.

**Q formats.** A value ``v`` with ``f`` fractional bits is stored as the int16
``q = round(v 2**f)`` (``-32768 .. 32767``), i.e. ``v = q / 2**f``; ``f`` may be
negative (steps of ``2**-f``) for large values.

- Stored constants (weights, biases, scaling multipliers): the largest ``f``
  in ``[-16, 30]`` with ``round(max |v| 2**f) <= 32767``, so no constant ever
  saturates; one ``f`` per weight matrix and per bias vector, one per column
  for scaling multipliers (columns of raw data differ by orders of magnitude).
- Vectors between steps: from the calibration rows, ``R`` = largest ``|v|``
  observed (computed in float64), and the largest ``f`` in ``[-16, 30]`` with
  ``headroom * R * 2**f <= 32767`` (``f = 15`` when ``R = 0``). Tanh and
  Sigmoid outputs are Q14 (bounded by 1). ReLU, LeakyReLU (slope < 1) and
  Identity never increase a magnitude, so they keep their input's format (a
  new format could not add precision, only lose it). One format per vector,
  except at the ends: the network input has one format per column when its
  first consumer is an Affine or scaling layer (with an Affine, finer columns
  are coarsened to at most 12 bits finer than the coarsest), and the network
  output has one per column when it comes from an Affine or scaling layer
  followed only by ReLU, LeakyReLU or Identity.

**Arithmetic** (every intermediate in int64; the bounds below show none overflows):

- Affine: ``acc_k = b_q[k] 2**e_b + sum_j W_q[k, j] x_q[j] 2**d_j`` with ``A =
  f_W + max_j f_x[j]`` fractional bits, ``d_j = max f_x - f_x[j] <= 12`` and
  ``e_b = A - f_b``. The bias format is ``min(f_b natural, A)`` and ``e_b <=
  45`` is required. Then ``|acc| < 2**15 (2**15 2**15 2**12) + 2**15 2**45 <
  2**61``. The sum is exact, so its order does not matter.
- Scaling: Standardize ``y = (x - mean) / scale`` and Unstandardize ``y = x
  scale + mean = (x + mean/scale) scale`` are both ``y_j = (x_j - c_j) m_j``
  with ``c_j`` stored as an int32 in ``x_j``'s format (``|c_q| < 2**31 - 2**15``,
  so ``x_q - c_q`` fits int32) and ``m_j`` as int16 with its own format; the
  difference is exact, which keeps a large mean from cancelling digits
  (the reason :mod:`~tinyprop.export._plan` does not fold scalings). ``|acc| < 2**46``.
- Narrowing ``acc`` with ``a`` fractional bits to an int16 with ``f``: shift
  ``s = a - f``, clipped to ``[-16, 62]`` (which changes no result, since
  ``|acc| < 2**61`` and ``|q| >= 1`` times ``2**16`` saturates anyway). For
  ``s > 0``: round to nearest, **ties away from zero**, computed as ``(acc +
  2**(s-1)) >> s`` for ``acc >= 0`` and ``-((2**(s-1) - acc) >> s)`` otherwise
  (so C shifts only non-negative values); for ``s <= 0``: ``acc 2**-s``. Then
  **saturate** to ``[-32768, 32767]``, never wrap; every saturation is counted.
- ReLU: ``z < 0 ? 0 : z``. LeakyReLU: ``z > 0 ? z : narrow(z * slope_q, 15)``
  with ``slope_q = round(slope 2**15)`` (slope < 1). Tanh, Sigmoid: the
  lookup tables of :mod:`~tinyprop.export._fixed_tables`. Softplus and custom
  activations are refused.

The input conversion ``x_q = round(x 2**f)`` (ties away from zero) saturates
as well and is counted as the step "input".
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Union

import numpy as np

from ..activations import BUILT_IN_ACTIVATIONS, Activation, declared
from ._fixed_tables import OUT_BITS, Table, lookup, round_half_away, table_for
from ._plan import ActivationStep, AffineStep, Plan, ScalingStep

__all__ = [
    "INT16_MIN", "INT16_MAX", "QAffine", "QScaling", "QRelu", "QLeaky", "QTable", "QStep",
    "IntegerProgram", "build_program", "calibration_ranges", "check_activations", "narrow", "vector_bits",
]

INT16_MIN, INT16_MAX = -32768, 32767
F_MIN, F_MAX = -16, 30          # fractional bits of any format
SHIFT_MIN, SHIFT_MAX = -16, 62  # narrowing shifts, clipped (see the module docstring)
MAX_ALIGN = 12                  # finest minus coarsest input column feeding an Affine
MAX_BIAS_SHIFT = 45
SLOPE_BITS = 15
_INT32_CENTRE = 2**31 - 2**15


@dataclass(frozen=True)
class QAffine:
    """``y_k = narrow(b_q[k] 2**bias_shift + sum_j W_q[k, j] x_q[j] 2**align[j], shifts[k])``."""

    layer: int
    label: str
    weight: np.ndarray      # int64 (n_out, n_in), each in int16
    weight_bits: int
    bias: np.ndarray | None
    bias_bits: int | None
    bias_shift: int
    align: tuple[int, ...]
    shifts: tuple[int, ...]
    out_bits: tuple[int, ...]


@dataclass(frozen=True)
class QScaling:
    """``y_j = narrow((x_q[j] - centre[j]) * multiplier[j], shifts[j])``."""

    layer: int
    label: str
    centre: np.ndarray      # int64, each within int32
    multiplier: np.ndarray  # int64, each within int16
    multiplier_bits: tuple[int, ...]
    shifts: tuple[int, ...]
    out_bits: tuple[int, ...]


@dataclass(frozen=True)
class QRelu:
    layer: int
    label: str
    out_bits: tuple[int, ...]


@dataclass(frozen=True)
class QLeaky:
    """``z > 0 ? z : narrow(z * slope, 15)``, slope in Q15."""

    layer: int
    label: str
    slope: int
    out_bits: tuple[int, ...]


@dataclass(frozen=True)
class QTable:
    """A Tanh or Sigmoid lookup table for inputs with ``in_bits`` fractional bits; output Q14."""

    layer: int
    label: str
    table: Table
    in_bits: int
    out_bits: tuple[int, ...]


QStep = Union[QAffine, QScaling, QRelu, QLeaky, QTable]


def narrow(acc: np.ndarray, shifts) -> tuple[np.ndarray, int]:
    """Round ``acc`` (int64) by ``shifts`` (per column) ties away from zero, saturate to int16; count clamps."""
    acc = np.asarray(acc, dtype=np.int64)
    s = np.broadcast_to(np.asarray(shifts, dtype=np.int64), acc.shape[-1:])
    right = np.maximum(s, 0)
    half = np.where(s > 0, np.left_shift(1, np.maximum(s - 1, 0)), 0)
    rounded = np.where(acc >= 0, (acc + half) >> right, -((half - acc) >> right))
    scaled = np.clip(acc, INT16_MIN, INT16_MAX) * np.left_shift(1, np.maximum(-s, 0))
    result = np.where(s > 0, rounded, scaled)
    clamped = (result > INT16_MAX) | (result < INT16_MIN)
    return np.clip(result, INT16_MIN, INT16_MAX), int(clamped.sum())


@dataclass(frozen=True)
class IntegerProgram:
    """The integer steps of a network, its input and output formats, and the reference run."""

    steps: tuple[QStep, ...]
    in_bits: tuple[int, ...]
    out_bits: tuple[int, ...]

    def to_integers(self, X: np.ndarray) -> tuple[np.ndarray, int]:
        """``x_q = saturate(round(x 2**f))`` per column (ties away from zero) and the saturation count."""
        with np.errstate(over="ignore"):  # a value beyond float64 after scaling saturates like any other
            scaled = np.asarray(X, dtype=np.float64) * np.exp2(np.array(self.in_bits, dtype=np.float64))
        bounded = np.clip(scaled, 2.0 * INT16_MIN, 2.0 * INT16_MAX)  # keep the int64 cast in range
        q = round_half_away(bounded)
        clamped = (q > INT16_MAX) | (q < INT16_MIN)
        return np.clip(q, INT16_MIN, INT16_MAX), int(clamped.sum())

    def to_values(self, y_q: np.ndarray) -> np.ndarray:
        """``y = y_q / 2**f`` per output column, in float64."""
        return np.asarray(y_q, dtype=np.float64) / np.exp2(np.array(self.out_bits, dtype=np.float64))

    def run(self, x_q: np.ndarray) -> tuple[np.ndarray, list[int]]:
        """The integer outputs for integer inputs ``(n, n_in)`` and the saturation count of each step."""
        v = np.asarray(x_q, dtype=np.int64)
        if v.ndim != 2 or v.shape[1] != len(self.in_bits):
            raise ValueError(f"x_q must have shape (n, {len(self.in_bits)}), got {v.shape}")
        if v.size and (v.min() < INT16_MIN or v.max() > INT16_MAX):
            raise ValueError("x_q must hold int16 values (-32768 .. 32767)")
        counts = []
        for step in self.steps:
            v, count = _run_step(step, v)
            counts.append(count)
        return v, counts

    def trace(self, x_q: np.ndarray) -> list[np.ndarray]:
        """The integer input and every step's integer output (int64), for int16 inputs ``(n, n_in)``."""
        values = [np.asarray(x_q, dtype=np.int64)]
        for step in self.steps:
            values.append(_run_step(step, values[-1])[0])
        return values


def _run_step(step: QStep, v: np.ndarray) -> tuple[np.ndarray, int]:
    if isinstance(step, QAffine):
        aligned = v << np.array(step.align, dtype=np.int64)
        acc = aligned @ step.weight.T
        if step.bias is not None:
            acc = acc + (step.bias << step.bias_shift)
        return narrow(acc, step.shifts)
    if isinstance(step, QScaling):
        return narrow((v - step.centre) * step.multiplier, step.shifts)
    if isinstance(step, QRelu):
        return np.where(v < 0, 0, v), 0
    if isinstance(step, QLeaky):
        negative, _ = narrow(v * step.slope, SLOPE_BITS)
        return np.where(v > 0, v, negative), 0
    return lookup(step.table, v, step.in_bits), 0


# ----------------------------------------------------------------------------- formats
def vector_bits(largest: float, headroom: float) -> int:
    """The largest ``f`` in ``[F_MIN, F_MAX]`` with ``headroom * largest * 2**f <= 32767`` (15 for 0)."""
    if largest == 0.0:
        return 15
    if not math.isfinite(headroom * largest):
        raise ValueError(
            f"a calibrated magnitude of {largest:.3g} times headroom {headroom:g} overflows float64; no fixed-point "
            "format can hold it: calibrate on the operating range or lower the headroom"
        )
    return _fit(headroom * largest, INT16_MAX)


def constant_bits(values: np.ndarray, what: str) -> int:
    """The largest ``f`` in ``[F_MIN, F_MAX]`` with ``round(max |v| 2**f) <= 32767``."""
    largest = float(np.max(np.abs(values))) if np.size(values) else 0.0
    if largest == 0.0:
        return F_MAX
    bits = _fit(largest, INT16_MAX + 0.5)
    if float(round_half_away(np.array([largest * 2.0**bits]))[0]) > INT16_MAX:
        raise ValueError(f"{what}: largest magnitude {largest:.6g} cannot be stored as int16 "
                         f"with at least {F_MIN} fractional bits")
    return bits


def _fit(magnitude: float, limit: float) -> int:
    """The largest ``f`` in ``[F_MIN, F_MAX]`` with ``magnitude * 2**f`` below ``limit`` (``<=`` for int limits)."""
    ratio = limit / magnitude
    if not math.isfinite(ratio):  # a magnitude near the smallest subnormal (a guaranteed range [0, 5e-324])
        return F_MAX
    bits = min(F_MAX, max(F_MIN, math.floor(math.log2(ratio))))
    while bits > F_MIN and _over(magnitude * 2.0**bits, limit):
        bits -= 1
    while bits < F_MAX and not _over(magnitude * 2.0 ** (bits + 1), limit):
        bits += 1
    return bits


def _over(value: float, limit: float) -> bool:
    return value >= limit if limit != int(limit) else value > limit


def _quantise(values: np.ndarray, bits: int) -> np.ndarray:
    return round_half_away(np.asarray(values, dtype=np.float64) * 2.0**bits)


# ----------------------------------------------------------------------------- building
_ELEMENTWISE = ("identity", "relu", "leaky_relu")
"""The fixed-point forms computed element by element in the input's format (they never increase a magnitude)."""


def _form(activation: Activation) -> object:
    """The activation's declared fixed-point form (``_fixed_point_form``), ``None`` if it has none."""
    return declared(activation, "_fixed_point_form")


def _preserves_format(step) -> bool:
    """Identity, ReLU and LeakyReLU forms: output fits the input's format, computed element by element."""
    return isinstance(step, ActivationStep) and _form(step.activation) in _ELEMENTWISE


def calibration_ranges(plan: Plan, X: np.ndarray) -> list[np.ndarray]:
    """Largest ``|value|`` per column of the input and of every step's output, in float64."""
    v = np.asarray(X, dtype=np.float64)
    ranges = [np.max(np.abs(v), axis=0)]
    for step in plan.steps:
        with np.errstate(all="ignore"):  # an overflow is reported below, naming the step
            if isinstance(step, AffineStep):
                v = v @ step.weight.T.astype(np.float64)
                if step.bias is not None:
                    v = v + step.bias.astype(np.float64)
            elif isinstance(step, ScalingStep):
                v = v * step.gain.astype(np.float64) + step.offset.astype(np.float64)
            else:
                v = step.activation.value(v)
        if not np.isfinite(v).all():
            raise ValueError(
                f"the calibration rows overflow float64 at layer {step.layer} (largest input magnitude "
                f"{float(ranges[0].max()):.3g}): no fixed-point format can hold them; calibrate on the operating range"
            )
        ranges.append(np.max(np.abs(v), axis=0))
    return ranges


def check_activations(plan: Plan) -> None:
    """Refuse (``TypeError``) an activation without an integer form, before any range is computed."""
    _check_activations(plan)


def build_program(plan: Plan, ranges: list[np.ndarray], headroom: float) -> IntegerProgram:
    """Choose every format from ``ranges`` and quantise every constant.

    ``ranges[0]`` is the largest ``|value|`` per input column, ``ranges[i + 1]``
    that of step ``i``'s output (from :func:`calibration_ranges`, or guaranteed
    over an envelope by :mod:`~tinyprop.export._envelope_error`).
    """
    _check_activations(plan)
    steps = plan.steps
    consumer = next((s for s in steps if not _preserves_format(s)), None)
    per_column = isinstance(consumer, (AffineStep, ScalingStep))
    bits = _formats(ranges[0], headroom, per_column)
    if isinstance(consumer, AffineStep):
        bits = tuple(min(b, min(bits) + MAX_ALIGN) for b in bits)
    in_bits = bits
    program: list[QStep] = []
    for index, step in enumerate(steps):
        what = f"{step.kind} {step.width} columns" if isinstance(step, ScalingStep) else step.describe()
        where = f"layer {step.layer} ({what})"
        last = all(_preserves_format(s) for s in steps[index + 1:])
        if isinstance(step, AffineStep):
            out = _formats(ranges[index + 1], headroom, last)
            program.append(_affine(step, where, bits, out))
            bits = out
        elif isinstance(step, ScalingStep):
            out = _formats(ranges[index + 1], headroom, last)
            program.append(_scaling(step, where, bits, out))
            bits = out
        else:
            activation = step.activation
            table = table_for(activation)
            if table is not None:
                out = (OUT_BITS,) * step.width
                program.append(QTable(step.layer, where, table, bits[0], out))
                bits = out
            elif _form(activation) == "relu":
                program.append(QRelu(step.layer, where, bits))
            elif _form(activation) == "leaky_relu":
                program.append(QLeaky(step.layer, where, _slope(activation, where), bits))
    return IntegerProgram(tuple(program), in_bits, bits)


def _formats(largest: np.ndarray, headroom: float, per_column: bool) -> tuple[int, ...]:
    columns = tuple(vector_bits(float(r), headroom) for r in largest)
    return columns if per_column else (min(columns),) * len(columns)


def _affine(step: AffineStep, where: str, in_bits: tuple[int, ...], out_bits: tuple[int, ...]) -> QAffine:
    weight = np.asarray(step.weight, dtype=np.float64)
    weight_bits = constant_bits(weight, f"{where} weight")
    acc_bits = weight_bits + max(in_bits)
    bias, bias_bits, bias_shift = None, None, 0
    if step.bias is not None:
        bias_bits = min(constant_bits(step.bias, f"{where} bias"), acc_bits)
        bias_shift = acc_bits - bias_bits
        if bias_shift > MAX_BIAS_SHIFT:
            raise ValueError(
                f"{where}: the bias needs {bias_shift} bits more than the products W x can hold "
                f"(at most {MAX_BIAS_SHIFT}); the bias is too large against the weights and inputs "
                "for a 64-bit accumulator")
        bias = _quantise(step.bias, bias_bits)
    return QAffine(step.layer, where, _quantise(weight, weight_bits), weight_bits, bias, bias_bits, bias_shift,
                   tuple(max(in_bits) - b for b in in_bits), _shifts(acc_bits, out_bits), out_bits)


def _scaling(step: ScalingStep, where: str, in_bits: tuple[int, ...], out_bits: tuple[int, ...]) -> QScaling:
    mean, scale = np.asarray(step.mean, dtype=np.float64), np.asarray(step.scale, dtype=np.float64)
    if step.kind == "Standardize":
        centre, multiplier = mean, 1.0 / scale
    else:
        centre, multiplier = -mean / scale, scale
    centre_q = np.array([int(round_half_away(np.array([c * 2.0**b]))[0]) for c, b in zip(centre, in_bits)],
                        dtype=np.int64)
    if np.any(np.abs(centre_q) >= _INT32_CENTRE):
        raise ValueError(f"{where}: a centre (mean) does not fit int32 in the input's format")
    m_bits = tuple(constant_bits(m, f"{where} multiplier") for m in multiplier)
    m_q = np.array([int(_quantise(np.array([m]), b)[0]) for m, b in zip(multiplier, m_bits)], dtype=np.int64)
    accumulated = tuple(x + m for x, m in zip(in_bits, m_bits))
    shifts = tuple(_shift(a, f) for a, f in zip(accumulated, out_bits))
    return QScaling(step.layer, where, centre_q, m_q, m_bits, shifts, out_bits)


def _shifts(acc_bits: int, out_bits: tuple[int, ...]) -> tuple[int, ...]:
    return tuple(_shift(acc_bits, f) for f in out_bits)


def _shift(acc_bits: int, out_bits: int) -> int:
    return min(SHIFT_MAX, max(SHIFT_MIN, acc_bits - out_bits))


def _slope(activation: Activation, where: str) -> int:
    slope_q = int(round_half_away(np.array([activation.slope * 2.0**SLOPE_BITS]))[0])  # type: ignore[attr-defined]
    if slope_q > INT16_MAX:
        raise ValueError(f"{where}: LeakyReLU slope must be below 1 for its Q15 form, got {activation.slope!r}")  # type: ignore[attr-defined]
    return slope_q


def _check_activations(plan: Plan) -> None:
    for step in plan.steps:
        if not isinstance(step, ActivationStep):
            continue
        act = step.activation
        if table_for(act) is None and _form(act) not in _ELEMENTWISE:
            supported = ", ".join(cls.__name__ for cls in BUILT_IN_ACTIVATIONS if _form(cls()) is not None)
            raise TypeError(
                f"layer {step.layer} has the activation {type(act).__name__}, which the fixed-point "
                f"export does not support; supported are {supported} (LeakyReLU with slope < 1; "
                "a custom activation or a subclass only with its own fixed-point form)")
