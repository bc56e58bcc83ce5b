"""Fixed-point C99 inference code: int16 numbers in Q formats, integer arithmetic only.

:func:`export_c_fixed_point` writes ``<name>.h`` and ``<name>.c`` for
microcontrollers without a floating-point unit:

- ``void <name>_predict_q(const int16_t *x_q, int16_t *y_q)``; input ``j`` is
  passed as ``x_q[j] = round(x[j] 2**f_j)`` and output ``k`` read as ``y[k] =
  y_q[k] / 2**g_k``, with the fractional bits ``f_j``, ``g_k`` written in the
  header (``<NAME>_INPUT_FRAC_BITS_<j>``, ``<NAME>_OUTPUT_FRAC_BITS_<k>``) and
  in the returned report;
- no ``float`` or ``double`` anywhere, only ``<stdint.h>``; weights as
  ``static const int16_t``; no dynamic allocation, no mutable global state;
  the workspace is two local int16 arrays sized at generation time; ``x_q`` is
  read completely before ``y_q`` is written, so they may be the same array;
- products of int16 numbers accumulate in int64 (an int32 accumulator would
  overflow for a 16-input layer of full-scale numbers: ``16 * 2**30 = 2**34``);
  results are rounded to nearest, ties away from zero, and saturated to int16,
  never wrapped.

With ``envelope=(low, high)`` the formats are chosen from ranges guaranteed
over the whole input box instead of calibration rows, the report proves per
step that nothing saturates there, and ``report.error_bound`` bounds
``|integer code - Network.predict|`` over the box
(:mod:`~tinyprop.export._fixed_envelope`); ``check_envelope=True`` makes
``predict_q`` return ``int``, the number of inputs outside the envelope.

How formats are chosen and every step computed is stated in
:mod:`tinyprop.export._fixed_program`; the lookup tables of Tanh and Sigmoid
and their error bounds in :mod:`tinyprop.export._fixed_tables`. Scaling
layers are steps of their own, ``(x - centre) * multiplier``: the difference
is exact in integers, so a mean that is large against the spread (a 14.4 V
pack voltage varying by 1.3 V) costs no precision, whereas folding it into
the first affine layer would subtract large products in the accumulator's
format and needs finer weights than int16 holds for such a column.

The same integer arithmetic runs in Python (numpy int64,
:class:`~tinyprop.export._fixed_program.IntegerProgram`) on the calibration
rows to fill the :class:`FixedPointReport`: the formats, the error against
``Network.predict`` in float64, and how often each step saturated. The tests
compile the C code and require it to agree with that reference bit for bit.

Not certified for safety functions: validation on the target hardware and
against the applicable functional-safety standards, local codes and qualified
review is the user's responsibility.
"""

from __future__ import annotations

import math
import warnings as _warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from .._validate import as_samples
from .._words import count
from ..network import Network
from ._envelope_error import as_box, reference_ranges
from ._fixed_c import buffer_widths, describe_formats, header_file, integer_range, signature, source_file
from ._fixed_envelope import EnvelopeProof, integer_box, prove_formats
from ._fixed_program import (
    IntegerProgram,
    QAffine,
    QLeaky,
    QScaling,
    QTable,
    build_program,
    calibration_ranges,
    check_activations,
)
from ._header import header_lines, provenance
from ._identifiers import check_c_name
from ._metadata import check_metadata
from ._plan import make_plan
from ._source import c_block_comment, comment_text, output_directory, write_source
from .classes import check_labels, write_fixed_classes
from .envelope_bound import ErrorBoundWarning

__all__ = ["export_c_fixed_point", "FixedPointReport", "StepFormat"]

_INT_MAX = 32767  # the least INT_MAX of C99: loop indices are int


@dataclass(frozen=True)
class StepFormat:
    """The formats of one integer step: constants, result, and saturations on the calibration rows.

    ``constant_bits`` are the fractional bits of the weights (Affine), of the
    multipliers per column (scaling) or of the Q15 slope (LeakyReLU), empty for
    other steps; ``bias_bits`` is ``None`` without a bias.
    """

    layer: int
    description: str
    constant_bits: tuple[int, ...]
    bias_bits: int | None
    result_bits: tuple[int, ...]
    saturations: int


@dataclass(frozen=True, eq=False)
class FixedPointReport:
    """What :func:`export_c_fixed_point` wrote, the formats it chose, and the measured error.

    The errors compare the integer arithmetic (its outputs converted with
    ``y_q / 2**g``, inputs converted with ``round(x 2**f)``) with
    ``Network.predict`` in float64 on the calibration rows, per output:
    ``max_abs_error``, ``rms_error``, and both divided by ``output_range``
    (largest minus smallest reference output; ``nan`` where that is 0).
    ``input_saturations`` counts inputs clamped by the conversion; each
    step's own count is in ``steps``. ``warnings`` names every step that
    saturated on the calibration rows. ``output_labels`` are the outputs'
    names with their units (``"head [m]"``) from the metadata, empty without
    names; the printed table uses them instead of ``y[k]``.
    """

    header: Path
    source: Path
    headroom: float
    n_calibration: int
    input_bits: tuple[int, ...]
    output_bits: tuple[int, ...]
    input_saturations: int
    steps: tuple[StepFormat, ...]
    tables: tuple[str, ...]
    max_abs_error: np.ndarray
    rms_error: np.ndarray
    output_range: np.ndarray
    warnings: tuple[str, ...]
    program: IntegerProgram = field(repr=False)
    output_labels: tuple[str, ...] = ()  # "name [unit]" per output from the metadata; y[k] without names
    class_files: tuple[Path, ...] = ()  # <name>_classes.h / .c when labels were given
    envelope_proof: EnvelopeProof | None = field(default=None, repr=False)  # with an envelope: ranges, proof, bound
    tolerance: np.ndarray | None = None  # per output, when given
    measured_on: str = "calibration row"  # what the measured errors were taken on (singular noun)

    @property
    def error_bound(self) -> np.ndarray | None:
        """Proven bound on ``|integer code - Network.predict (float64)|`` over the envelope, per output."""
        return None if self.envelope_proof is None else self.envelope_proof.error_bound

    @property
    def saturation_free(self) -> bool | None:
        """With an envelope: whether the proof shows that nothing saturates inside it (else ``None``)."""
        return None if self.envelope_proof is None else self.envelope_proof.saturation_free

    def output_label(self, k: int) -> str:
        """Output ``k``'s name and unit from the metadata (``"head [m]"``), or ``"y[k]"`` without names."""
        return self.output_labels[k] if self.output_labels else f"y[{k}]"

    @property
    def max_rel_error(self) -> np.ndarray:
        return _relative(self.max_abs_error, self.output_range)

    @property
    def rms_rel_error(self) -> np.ndarray:
        return _relative(self.rms_error, self.output_range)

    def to_integers(self, X: Any) -> np.ndarray:
        """Inputs ``(n, n_in)`` as the generated code takes them: int16 ``round(x 2**f)``, saturated."""
        x = as_samples(X, "X", len(self.input_bits), np.dtype(np.float64))
        return self.program.to_integers(x)[0].astype(np.int16)

    def predict_q(self, x_q: Any) -> np.ndarray:
        """The generated code's outputs (int16) for int16 inputs ``(n, n_in)``, computed in Python."""
        return self.program.run(np.asarray(x_q))[0].astype(np.int16)

    def predict(self, X: Any) -> np.ndarray:
        """The generated code's outputs in real units for real inputs ``(n, n_in)`` (float64)."""
        return self.program.to_values(self.predict_q(self.to_integers(X)))

    def saturations(self, X: Any) -> dict[str, int]:
        """How many values the generated code would clamp for the rows ``X``: ``"input"`` and each step."""
        x_q, clamped = self.program.to_integers(as_samples(X, "X", len(self.input_bits), np.dtype(np.float64)))
        counts = self.program.run(x_q)[1]
        return {"input": clamped, **{step.label: count for step, count in zip(self.program.steps, counts)}}

    def __str__(self) -> str:
        rows = [f"Fixed-point export {self.header.name} / {self.source.name}: {count(len(self.input_bits), 'input')}, "
                f"{count(len(self.output_bits), 'output')}, {count(self.n_calibration, self.measured_on)}, "
                f"headroom {self.headroom:g}",
                f"  inputs: {describe_formats(self.input_bits)}; saturated on the {self.measured_on}s: "
                f"{self.input_saturations}",
                f"  {'layer':>5}  {'step':<40} {'constants':<14} {'bias':<5} {'result':<14} saturated"]
        for step in self.steps:
            bias = "-" if step.bias_bits is None else f"Q{step.bias_bits}"
            constants = describe_formats(step.constant_bits) if step.constant_bits else "-"
            rows.append(f"  {step.layer:>5}  {step.description[:40]:<40} {constants:<14} {bias:<5} "
                        f"{describe_formats(step.result_bits):<14} {step.saturations}")
        width = max([7] + [len(self.output_label(k)) for k in range(len(self.output_bits))])
        rows.append(f"  {'output':<{width}} {'format':<7} {'max |error|':>12} {'rms error':>12} {'range':>12} "
                    f"{'max/range':>10} {'rms/range':>10}")
        for k, bits in enumerate(self.output_bits):
            rows.append(f"  {self.output_label(k):<{width}} Q{bits:<6} {self.max_abs_error[k]:>12.4g} "
                        f"{self.rms_error[k]:>12.4g} "
                        f"{self.output_range[k]:>12.4g} {self.max_rel_error[k]:>10.3g} "
                        f"{self.rms_rel_error[k]:>10.3g}")
        rows += [f"  {table}" for table in self.tables]
        if self.envelope_proof is not None:
            rows += [f"  {line}" for line in envelope_lines(self.envelope_proof, self.tolerance, self.output_label,
                                                                 timed=True)]
        rows += [f"  WARNING: {warning}" for warning in self.warnings] or [
            f"  no saturation on the {self.measured_on}s"]
        return "\n".join(rows)


def _relative(error: np.ndarray, spread: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(spread > 0, error / np.where(spread > 0, spread, 1.0), np.nan)


def export_c_fixed_point(
    net: Network,
    path: Any,
    calibration_X: Any = None,
    *,
    name: str = "model",
    headroom: float | None = None,
    metadata: Mapping[str, Any] | None = None,
    labels: Sequence[str] | None = None,
    envelope: Any = None,
    tolerance: Any = None,
    check_envelope: bool = False,
) -> FixedPointReport:
    """Write integer-only ``<name>.h`` and ``<name>.c`` into the directory ``path`` (created if missing).

    Parameters
    ----------
    net:
        The network (float32 or float64; its numbers are used in float64). Built-in
        Identity, ReLU, LeakyReLU (slope < 1), Tanh and Sigmoid activations,
        Affine, Standardize and Unstandardize layers; at least one Affine. It
        is not modified.
    path:
        A directory, created with its parents if missing; files of the same names
        are overwritten.
    calibration_X:
        Inputs ``(n, n_in)``, finite, covering the range the device will see:
        without ``envelope`` every format between steps is chosen from the
        largest magnitude these rows produce there, times ``headroom``, and
        values outside that range later are saturated, not wrapped. With
        ``envelope`` optional: the rows the error is measured on (default:
        the envelope's corners, up to 1024, and 2048 points drawn uniformly
        in it with seed 0).
    name:
        Prefix of every generated identifier, as for :func:`~tinyprop.export.export_c`.
    headroom:
        Factor (>= 1) between the largest calibrated (or guaranteed) magnitude
        of a vector and the largest its format holds; default 2 with
        calibration rows (one bit of room), 1 with an envelope (the ranges
        are guaranteed, and widened by the proven rounding error).
    metadata:
        Names and units of inputs and outputs and a description, written into
        the header comment (escaped), as for :func:`~tinyprop.export.export_c`.
    labels:
        For a classifier (one logit per output, or one for two labels): the labels in class
        order. Then ``<name>_classes.h`` / ``<name>_classes.c`` are written too,
        with the label table and ``int <name>_classify_q(const int16_t *x_q)``
        (:mod:`tinyprop.export.classes`); ``report.class_files`` lists them.
    envelope:
        The input box the device will see: an object with ``.low`` and
        ``.high`` (one entry per input) or a ``(low, high)`` pair. Then every
        format is chosen from ranges *guaranteed* over the whole box (interval
        bound propagation with linear relaxation, :mod:`tinyprop.bounds`),
        the report proves per step that nothing saturates inside it (or says
        which step may), and ``report.error_bound`` bounds ``|integer code -
        Network.predict|`` over the box per output
        (:mod:`~tinyprop.export._fixed_envelope` states the derivation).
    tolerance:
        A number, or one per output: with ``envelope``, an
        :class:`~tinyprop.export.envelope_bound.ErrorBoundWarning` is issued
        (and listed in ``report.warnings``) when the proven bound exceeds it,
        e.g. the model's own test error.
    check_envelope:
        With ``envelope``: ``int <name>_predict_q(...)`` returns the number of
        inputs outside the envelope (compared in the inputs' integer formats;
        0 = all inside) instead of ``void``. The outputs are computed all the
        same.

    Returns
    -------
    A :class:`FixedPointReport`.

    Raises
    ------
    TypeError / ValueError
        For a bad argument, an activation other than the supported ones (named
        in the message) or numbers that no int16 format can hold.
    """
    name = check_c_name(name)
    if headroom is None:
        headroom = 2.0 if envelope is None else 1.0
    if isinstance(headroom, bool) or not isinstance(headroom, (int, float)) or not math.isfinite(headroom) \
            or headroom < 1:
        raise ValueError(f"headroom must be a finite number >= 1, got {headroom!r}")
    if envelope is None and calibration_X is None:
        raise ValueError("export_c_fixed_point needs calibration_X (rows covering the operating range) or an envelope")
    if not isinstance(check_envelope, bool) or (check_envelope and envelope is None):
        raise ValueError(f"check_envelope=True needs an envelope; got check_envelope={check_envelope!r}, "
                         f"envelope={envelope!r}")
    directory = output_directory(path)
    plan = make_plan(net, np.dtype(np.float64))
    widest = max([plan.n_in] + [step.width for step in plan.steps])
    if widest > _INT_MAX:
        raise ValueError(f"layers may be at most {_INT_MAX} wide for int loop indices, got width {widest}")
    meta = check_metadata(metadata, plan.n_in, plan.n_out)
    classes = None if labels is None else check_labels(labels, plan.n_out)
    limit = None if tolerance is None else _tolerance(tolerance, plan.n_out)
    proof, measured_on = None, "calibration row"
    if envelope is None:
        X = as_samples(calibration_X, "calibration_X", plan.n_in, np.dtype(np.float64))
        program = build_program(plan, calibration_ranges(plan, X), float(headroom))
    else:
        low, high = as_box(envelope, plan.n_in)
        check_activations(plan)
        program, proof = prove_formats(plan, reference_ranges(net, low, high), float(headroom))
        if calibration_X is None:
            X, measured_on = _envelope_sample(low, high), "envelope sample point"
        else:
            X = as_samples(calibration_X, "calibration_X", plan.n_in, np.dtype(np.float64))
    box = integer_box(program, proof.low, proof.high) if check_envelope and proof is not None else None

    x_q, input_saturations = program.to_integers(X)
    y_q, counts = program.run(x_q)
    reference = (net if net.dtype == np.float64 else net.copy(dtype=np.float64)).predict(X)
    error = program.to_values(y_q) - reference
    steps = tuple(_step_format(step, count) for step, count in zip(program.steps, counts))
    warnings = ([f"input conversion saturated {count(input_saturations, 'value')}"] if input_saturations else [])
    warnings += [f"layer {s.layer} ({s.description}) saturated {count(s.saturations, 'value')}"
                 for s in steps if s.saturations]
    beyond = [] if proof is None else _tolerance_warnings(proof.error_bound, limit)
    unproven = [] if proof is None else [f"not proven free of saturation over the envelope: {check.describe()}"
                                         for check in proof.checks if not check.fits]
    tables = tuple(dict.fromkeys(step.table.describe() for step in program.steps if isinstance(step, QTable)))
    report_numbers = dict(
        max_abs_error=np.max(np.abs(error), axis=0), rms_error=np.sqrt(np.mean(error**2, axis=0)),
        output_range=np.max(reference, axis=0) - np.min(reference, axis=0))

    origin = provenance(net)
    output_labels = tuple(f"{p.name} [{p.unit}]" if p.unit else p.name for p in meta.outputs)
    interface = _interface(name, program, float(headroom), len(X), steps, tables, report_numbers, warnings,
                           output_labels, measured_on, box is not None, proof is not None)
    if proof is not None:
        interface += envelope_lines(proof, limit, lambda k: f"y[{k}]" + (f" ({output_labels[k]})" if output_labels
                                                                           else ""))
        if box is not None:
            interface.append(f"{name}_predict_q returns the number of inputs outside the envelope (0: all inside), "
                             "comparing x_q with")
            interface += [f"  [{int(lo)}, {int(hi)}] for x_q[{j}]" for j, (lo, hi) in enumerate(zip(*box))]

    def comment(filename: str) -> list[str]:
        lines = header_lines(f"{filename}: neural-network inference in C99 with integers only, generated by tinyprop",
                             plan, meta, origin, interface)
        return c_block_comment(lines)

    header = write_source(directory, f"{name}.h",
                          header_file(name, comment(f"{name}.h"), program, origin.fingerprint, box))
    source = write_source(directory, f"{name}.c", source_file(name, comment(f"{name}.c"), program, box))
    class_files = () if classes is None else write_fixed_classes(directory, name, classes, program.out_bits)
    for warning in unproven + beyond:
        _warnings.warn(warning, ErrorBoundWarning, stacklevel=2)
    return FixedPointReport(header, source, float(headroom), len(X), program.in_bits, program.out_bits,
                            input_saturations, steps, tables, warnings=tuple(warnings + unproven + beyond),
                            program=program,
                            class_files=tuple(class_files), output_labels=output_labels, envelope_proof=proof,
                            tolerance=limit, measured_on=measured_on, **report_numbers)


def _tolerance(tolerance: Any, n_out: int) -> np.ndarray:
    """``tolerance`` as ``(n_out,)`` positive finite numbers (one number applies to every output)."""
    try:
        values = np.broadcast_to(np.asarray(tolerance, dtype=np.float64), (n_out,)).copy()
    except (TypeError, ValueError):
        raise ValueError(f"tolerance must be a positive number or {n_out} of them (one per output), "
                         f"got {tolerance!r}") from None
    if not (np.isfinite(values).all() and (values > 0).all()):
        raise ValueError(f"tolerance must be positive and finite, got {tolerance!r}")
    return values


def _tolerance_warnings(bound: np.ndarray, limit: np.ndarray | None) -> list[str]:
    if limit is None:
        return []
    return [f"the proven error bound over the envelope of output {k}, {bound[k]:.3g}, exceeds the tolerance "
            f"{limit[k]:.3g}" for k in range(len(bound)) if bound[k] > limit[k]]


_SAMPLE_POINTS, _MOST_CORNERS = 2048, 1024


def _envelope_sample(low: np.ndarray, high: np.ndarray) -> np.ndarray:
    """The box's corners (when at most 1024) and 2048 uniform points (seed 0): where the error is measured."""
    n = low.size
    points = np.random.default_rng(0).uniform(low, high, size=(_SAMPLE_POINTS, n))
    if 2**n > _MOST_CORNERS:
        return points
    corners = (np.arange(2**n)[:, None] >> np.arange(n)) & 1
    return np.concatenate([np.where(corners == 1, high, low), points])


def envelope_lines(proof: EnvelopeProof, tolerance: np.ndarray | None, label, timed: bool = False) -> list[str]:
    """The envelope, the no-saturation proof and the error bound, as lines of text (report; header untimed)."""
    took = f", {proof.seconds:.3g} s" if timed else ""
    lines = [f"Envelope: low {_numbers(proof.low)}, high {_numbers(proof.high)}.",
             f"Ranges guaranteed over the whole envelope (interval bound propagation with linear relaxation{took}),",
             "widened by the proven rounding error of the integer code, inside what each format holds",
             "(rounding included); per step the worst column:"]
    lines += [f"  {check.describe()}" for check in proof.checks]
    lines.append("Nothing saturates inside the envelope (proven)." if proof.saturation_free else
                 "NOT PROVEN that nothing saturates inside the envelope: see the steps above.")
    lines.append("Proven bound on |integer code - Network.predict (float64)| over the envelope, per output:")
    for k, bound in enumerate(proof.error_bound):
        against = "" if tolerance is None else f" (tolerance {tolerance[k]:.3g}" + (
            ", EXCEEDED)" if bound > tolerance[k] else ")")
        lines.append(f"  {label(k)}: {bound:.3g}{against}")
    return lines


def _numbers(values: np.ndarray) -> str:
    return "[" + ", ".join(f"{v:.6g}" for v in values) + "]"


def _step_format(step, count: int) -> StepFormat:
    description = step.label.split(" (", 1)[1][:-1] if " (" in step.label else step.label
    if isinstance(step, QAffine):
        return StepFormat(step.layer, description, (step.weight_bits,), step.bias_bits, step.out_bits, count)
    if isinstance(step, QScaling):
        return StepFormat(step.layer, description, step.multiplier_bits, None, step.out_bits, count)
    if isinstance(step, QLeaky):
        return StepFormat(step.layer, description, (15,), None, step.out_bits, count)
    return StepFormat(step.layer, description, (), None, step.out_bits, count)


def _interface(name: str, program: IntegerProgram, headroom: float, n_rows: int, steps: tuple[StepFormat, ...],
               tables: tuple[str, ...], numbers: dict[str, np.ndarray], warnings: list[str],
               labels: tuple[str, ...], measured_on: str, checked: bool, enveloped: bool) -> list[str]:
    macro = name.upper()
    source = "the ranges guaranteed over the envelope (below)" if enveloped else f"{n_rows} calibration rows"
    widths = buffer_widths(program)
    stack = 2 * sum(widths.values())
    lines = [
        f"Interface (declared in {name}.h):",
        f"  {signature(name, checked)};",
        f"  x_q holds {macro}_N_INPUTS = {len(program.in_bits)} int16 values, y_q receives "
        f"{macro}_N_OUTPUTS = {len(program.out_bits)}; they may be the same array.",
        "Numbers: an int16 q in format Qf stands for the value q / 2^f (f fractional bits; f may be",
        "negative). Convert each input x[j] with f = " + macro + "_INPUT_FRAC_BITS_j:",
        "  x_q[j] = round(x[j] * 2^f), ties away from zero, then clamped to [-32768, 32767];",
        "and each output with g = " + macro + "_OUTPUT_FRAC_BITS_k:  y[k] = y_q[k] / 2^g.",
    ]
    lines += [f"  x_q[{j}]: Q{b}, range {integer_range(b)}" for j, b in enumerate(program.in_bits)]
    lines += [f"  y_q[{k}]: Q{b}, range {integer_range(b)}" for k, b in enumerate(program.out_bits)]
    lines += [
        "Arithmetic: integers only (no floating point); int16 numbers, products accumulated in",
        "int64, results rounded to nearest (ties away from zero) and saturated to int16, never",
        "wrapped. No dynamic allocation, no mutable global state (reentrant); the only",
        "dependency is <stdint.h>. Scaling layers are computed as (x - centre) * multiplier.",
        f"Stack: work arrays of {' and '.join(str(w) for w in widths.values())} int16_t ({stack} bytes) "
        "plus a few scalars.",
        "",
        f"Formats chosen from {source}, headroom {headroom:g} (constants: weights,",
        "multipliers or slope; result: the step's output):",
    ]
    for step in steps:
        constants = describe_formats(step.constant_bits) if step.constant_bits else "-"
        bias = "" if step.bias_bits is None else f", bias Q{step.bias_bits}"
        lines.append(f"  layer {step.layer}: constants {constants}{bias}, result {describe_formats(step.result_bits)}")
    lines += [f"{table}" for table in tables]
    lines.append(f"Measured on {count(n_rows, measured_on)} against Network.predict (float64), per output:")
    for k in range(len(program.out_bits)):
        spread = numbers["output_range"][k]
        relative = f"{numbers['max_abs_error'][k] / spread:.3g}" if spread > 0 else "n/a"
        named = f" ({comment_text(labels[k])})" if labels else ""
        lines.append(f"  y[{k}]{named}: largest |error| {numbers['max_abs_error'][k]:.3g}, "
                     f"rms {numbers['rms_error'][k]:.3g}, "
                     f"largest / observed range {relative}")
    lines += [f"WARNING: {comment_text(w)} on the {measured_on}s." for w in warnings] or [
        f"No saturation on the {measured_on}s" + ("." if enveloped else "; inputs beyond them may saturate (clamp).")]
    return lines
