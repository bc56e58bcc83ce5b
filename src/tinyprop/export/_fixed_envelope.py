"""Integer formats chosen over an envelope, the proof that nothing saturates, and the error bound.

The ranges and the error recursion are those of
:mod:`~tinyprop.export._envelope_error`; this module supplies what the
integer program adds at each step (its ``R``), with ``x~ = q / 2**f`` the
value an int16 ``q`` in format ``Qf`` stands for:

- input: ``x_q = round(x 2**f)``, so ``E_0 = 2**-(f + 1)``;
- affine: weights ``W~ = W_q 2**-f_W`` and bias ``b~ = b_q 2**-f_b``; the
  int64 sum ``sum_j W_q x_q 2**d_j + b_q 2**e_b`` is exact, and narrowing it
  to ``Qf_out`` rounds by at most ``2**-(f_out + 1)`` (nothing when the shift
  is not positive): ``R = |W~ - W| (m_in + E_in) + |b~ - b| + 2**-(f_out + 1)``;
- scaling ``y = x g + o = g (x - c)`` with ``c = -o / g``, computed as
  ``m~ (x~ - c~)`` (``c~``, ``m~`` the stored centre and multiplier):
  ``y~ - y = g (x~ - x) - g (c~ - c) + (m~ - g)(x~ - c~) + r``, so ``R = |g|
  |c~ - c| + |m~ - g| (max(|lo - c~|, |hi - c~|) + E_in) + 2**-(f_out + 1)``
  (``|c~ - c|`` padded by ``2 u |c|`` for the float64 division giving ``c``);
- ReLU, Identity: exact on ``z~`` (``R = 0``); LeakyReLU: ``z~ < 0`` gives
  ``round(z~ s_q 2**-15)``, so ``R = |s_q 2**-15 - s| (m_in + E_in) +
  2**-(f + 1)``;
- Tanh, Sigmoid: the table's worst-case error at the quantised input
  (``Table.error_bound``, :mod:`~tinyprop.export._fixed_tables`).

**No saturation.** The code's value after each step lies in ``[lo - E, hi +
E]``; a narrowing to ``Qf`` saturates only when ``round(v 2**f)`` leaves
``[-32768, 32767]``, so ``(hi + E) 2**f < 32767.5`` and ``(lo - E) 2**f >
-32768.5`` prove that it never does (rounding is monotone). The input
conversion is checked the same way on ``[low, high]``; every partial sum of
the int64 accumulator of an affine step is at most ``(sum_j |W~| (m_j + E_j) +
|b~|) 2**A`` in magnitude (``A`` its fractional bits), which is checked
against ``2**62``. Table, ReLU, LeakyReLU and
Identity outputs cannot saturate (their magnitudes do not exceed their input's
or 1 in Q14); they are listed all the same.

**Formats.** Chosen as for calibration rows (``vector_bits``), but from the
guaranteed magnitude ``max(|lo|, |hi|)`` of each vector; since the rounding
errors ``E`` depend on the formats, the choice is repeated with the widened
magnitudes ``max(|lo - E|, |hi + E|)`` until the proof holds (at most a few
rounds), else the steps that may saturate are reported.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..bounds._arith import FLOAT64, magnitude
from ._envelope_error import Ranges, propagate_error, widest_magnitude
from ._fixed_program import (
    F_MAX,
    INT16_MAX,
    INT16_MIN,
    SLOPE_BITS,
    IntegerProgram,
    QAffine,
    QLeaky,
    QScaling,
    QTable,
    build_program,
)
from ._plan import Plan, ScalingStep

__all__ = ["RangeCheck", "EnvelopeProof", "prove_formats", "integer_box"]

_ROUNDS = 6
_ACCUMULATOR_LIMIT = 2.0**62  # int64 holds 2**63; half of it leaves room for the float64 rounding of the bound


@dataclass(frozen=True)
class RangeCheck:
    """One row of the proof: a vector (or accumulator) of the integer code, its guaranteed and representable ranges.

    ``low``/``high``: the guaranteed range over the envelope (the worst column,
    real units); ``low_limit``/``high_limit``: what the format holds there;
    ``fits``: the first lies inside the second, rounding included.
    """

    layer: int | None  # None for the input conversion
    what: str
    low: float
    high: float
    low_limit: float
    high_limit: float
    fits: bool

    def describe(self) -> str:
        where = "input" if self.layer is None else f"layer {self.layer}"
        verdict = "inside" if self.fits else "NOT PROVEN: may saturate"
        return (f"{where} {self.what}: guaranteed [{self.low:.6g}, {self.high:.6g}] in "
                f"[{self.low_limit:.6g}, {self.high_limit:.6g}]: {verdict}")


@dataclass(frozen=True)
class EnvelopeProof:
    """The formats' proof over one envelope: the checks, the error bound per output, and the ranges."""

    low: np.ndarray
    high: np.ndarray
    checks: tuple[RangeCheck, ...]
    error_bound: np.ndarray
    code_low: tuple[np.ndarray, ...]   # the code's values after each plan step, guaranteed (input first)
    code_high: tuple[np.ndarray, ...]
    seconds: float

    @property
    def saturation_free(self) -> bool:
        return all(check.fits for check in self.checks)


def integer_box(program: IntegerProgram, low: np.ndarray, high: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The envelope in the inputs' integer formats: ``round(low 2**f)``, ``round(high 2**f)``, saturated."""
    return program.to_integers(low[None, :])[0][0], program.to_integers(high[None, :])[0][0]


def prove_formats(plan: Plan, ranges: Ranges, headroom: float) -> tuple[IntegerProgram, EnvelopeProof]:
    """Formats from the guaranteed magnitudes, widened by the error bound until the proof holds."""
    magnitudes = [_negligible_as_zero(ranges.magnitude(i)) for i in range(len(plan.steps) + 1)]
    for _ in range(_ROUNDS):
        program = build_program(plan, magnitudes, headroom)
        bits = _bits_per_step(plan, program)
        errors = propagate_error(plan, ranges, 2.0 ** -(np.array(bits[0], dtype=np.float64) + 1),
                                 _sources(plan, program, ranges, bits))
        checks = _checks(plan, program, ranges, errors, bits)
        if all(check.fits for check in checks):
            break
        widened = [widest_magnitude(ranges, errors, i) for i in range(len(errors))]
        if all(np.array_equal(a, b) for a, b in zip(widened, magnitudes)):
            break
        magnitudes = [np.maximum(a, b) for a, b in zip(widened, magnitudes)]
    code_low = tuple(lo - e for lo, e in zip(ranges.lo, errors))
    code_high = tuple(hi + e for hi, e in zip(ranges.hi, errors))
    proof = EnvelopeProof(ranges.lo[0], ranges.hi[0], tuple(checks), errors[-1], code_low, code_high, ranges.seconds)
    return program, proof


def _negligible_as_zero(magnitude: np.ndarray) -> np.ndarray:
    """Magnitudes that round to 0 even in the finest format (``< 2**-(F_MAX + 1)``) as 0, which gets Q15.

    Outward rounding turns a vector that is exactly 0 over the box (a ReLU of
    negative values) into ``[0, 5e-324]``; a format chosen from that would be
    the finest, Q30, too fine for a scaling centre after it. The proof checks
    the chosen format all the same.
    """
    return np.where(magnitude < 2.0 ** -(F_MAX + 1), 0.0, magnitude)


def _bits_per_step(plan: Plan, program: IntegerProgram) -> list[tuple[int, ...]]:
    """Fractional bits of the input and of every plan step's output (Identity keeps its input's)."""
    by_layer = {q.layer: q for q in program.steps}
    bits = [program.in_bits]
    for step in plan.steps:
        q = by_layer.get(step.layer)
        bits.append(bits[-1] if q is None else q.out_bits)
    return bits


def _rounding(shifted: bool, out_bits: tuple[int, ...]) -> np.ndarray:
    return np.where(shifted, 2.0 ** -(np.array(out_bits, dtype=np.float64) + 1), 0.0)


def _sources(plan: Plan, program: IntegerProgram, ranges: Ranges, bits: list[tuple[int, ...]]):
    by_layer = {q.layer: q for q in program.steps}

    def sources(i: int, m: np.ndarray, e: np.ndarray) -> np.ndarray:
        step, q = plan.steps[i], by_layer.get(plan.steps[i].layer)
        reach = m + e  # largest |x~| at the step's input
        if isinstance(q, QAffine):
            weight = step.weight.astype(np.float64)
            local = np.abs(q.weight * 2.0**-q.weight_bits - weight) @ reach
            if q.bias is not None:
                local = local + np.abs(q.bias * 2.0**-q.bias_bits - step.bias.astype(np.float64))
            return local + _rounding(np.array(q.shifts) > 0, q.out_bits)
        if isinstance(q, QScaling):
            assert isinstance(step, ScalingStep)
            gain, offset = step.gain.astype(np.float64), step.offset.astype(np.float64)
            centre = -offset / gain
            centre_q = q.centre * 2.0 ** -np.array(bits[i], dtype=np.float64)
            centre_error = np.abs(centre_q - centre) + 2.0 * FLOAT64.u * np.abs(centre)
            multiplier = q.multiplier * 2.0 ** -np.array(q.multiplier_bits, dtype=np.float64)
            spread = magnitude(ranges.lo[i] - centre_q, ranges.hi[i] - centre_q) + e
            return (np.abs(gain) * centre_error + np.abs(multiplier - gain) * spread
                    + _rounding(np.array(q.shifts) > 0, q.out_bits))
        if isinstance(q, QLeaky):
            slope = float(step.activation.slope)  # type: ignore[union-attr]
            return abs(q.slope * 2.0**-SLOPE_BITS - slope) * reach + _rounding(np.array(True), q.out_bits)
        if isinstance(q, QTable):
            return np.full(m.shape, q.table.error_bound)
        return np.zeros(m.shape)  # ReLU and Identity are exact on the code's own input

    return sources


def _fit(values_low: np.ndarray, values_high: np.ndarray, bits: tuple[int, ...], limit: float = 32768.0
         ) -> tuple[bool, np.ndarray, np.ndarray]:
    scale = np.exp2(np.array(bits, dtype=np.float64))
    fits = bool(np.all(values_high * scale < limit - 0.5) and np.all(values_low * scale > -limit - 0.5))
    return fits, INT16_MIN / scale, INT16_MAX / scale


def _row(layer, what: str, lo: np.ndarray, hi: np.ndarray, bits: tuple[int, ...]) -> RangeCheck:
    fits, low_limit, high_limit = _fit(lo, hi, bits)
    worst = int(np.argmax(np.maximum(hi / high_limit, lo / low_limit)))
    return RangeCheck(layer, what, float(lo[worst]), float(hi[worst]), float(low_limit[worst]),
                      float(high_limit[worst]), fits)


def _checks(plan: Plan, program: IntegerProgram, ranges: Ranges, errors: list[np.ndarray],
            bits: list[tuple[int, ...]]) -> list[RangeCheck]:
    low, high = ranges.lo[0], ranges.hi[0]
    rows = [_row(None, f"conversion round(x 2^f), {_formats(bits[0])}", low, high, bits[0])]
    by_layer = {q.layer: q for q in program.steps}
    for i, step in enumerate(plan.steps):
        q = by_layer.get(step.layer)
        lo, hi = ranges.lo[i + 1] - errors[i + 1], ranges.hi[i + 1] + errors[i + 1]
        if q is None:
            continue
        what = q.label.split(" (", 1)[1][:-1] if " (" in q.label else q.label
        if isinstance(q, QAffine):  # every partial sum: sum_j |W~| |x~| + |b~|, in units of 2**-A
            acc_bits = q.weight_bits + max(bits[i])
            partial = np.abs(q.weight * 2.0**-q.weight_bits) @ (ranges.magnitude(i) + errors[i])
            if q.bias is not None:
                partial = partial + np.abs(q.bias * 2.0**-q.bias_bits)
            largest = float(np.max(partial)) * 2.0**acc_bits
            rows.append(RangeCheck(step.layer, f"{what}: int64 accumulator (units of 2^-{acc_bits})",
                                   -largest, largest, -_ACCUMULATOR_LIMIT, _ACCUMULATOR_LIMIT,
                                   largest < _ACCUMULATOR_LIMIT))
        rows.append(_row(step.layer, f"{what}: result {_formats(bits[i + 1])}", lo, hi, bits[i + 1]))
    return rows


def _formats(bits: tuple[int, ...]) -> str:
    unique = sorted(set(bits))
    return "Q" + "/Q".join(str(b) for b in unique)

