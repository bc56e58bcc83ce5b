"""C99 text of an :class:`~tinyprop.export._fixed_program.IntegerProgram`: integers only, ``<stdint.h>`` only.

Each step of the program becomes one block of plain loops performing exactly
the integer operations of the reference (:func:`~tinyprop.export._fixed_program.narrow`
and the table lookup), so the compiled code and the Python reference agree bit
for bit. Signed values are never shifted (C99 6.5.7 leaves right shifts of
negative values implementation-defined and left shifts undefined): the
rounding helper shifts magnitudes, and scalings by powers of two are
multiplications.
"""

from __future__ import annotations

import numpy as np

from ._fixed_program import SLOPE_BITS, IntegerProgram, QAffine, QLeaky, QRelu, QScaling, QStep, QTable
from ._fixed_tables import c_function
from ._plan import route_work_arrays, work_array_widths
from ._source import c_header

__all__ = ["source_file", "header_file", "buffer_widths", "Box"]

Box = tuple[np.ndarray, np.ndarray]
"""The envelope's ends in the inputs' integer formats (int16 values)."""

_PER_LINE = 8

_NARROW = """\
/* acc / 2^shift rounded to nearest, ties away from zero (shift > 0), or acc * 2^-shift
 * (shift <= 0), then saturated to [-32768, 32767]. Only non-negative values are shifted. */
static int16_t {name}_narrow(int64_t acc, int shift)
{{
    if (shift > 0) {{
        const int64_t half = (int64_t)1 << (shift - 1);
        acc = acc >= 0 ? (acc + half) >> shift : -((half - acc) >> shift);
    }} else if (shift < 0) {{
        acc = acc > INT16_MAX ? INT16_MAX : (acc < INT16_MIN ? INT16_MIN : acc);
        acc *= (int64_t)1 << -shift;
    }}
    return (int16_t)(acc > INT16_MAX ? INT16_MAX : (acc < INT16_MIN ? INT16_MIN : acc));
}}"""


def _routing(program: IntegerProgram) -> list[tuple[str, str, int]]:
    """``(source, target, width)`` per step, from the input ``x_q`` (see ``route_work_arrays``)."""
    return route_work_arrays([(isinstance(step, QAffine), len(step.out_bits)) for step in program.steps], "x_q")


def buffer_widths(program: IntegerProgram) -> dict[str, int]:
    return work_array_widths(_routing(program))


def header_file(name: str, comment: list[str], program: IntegerProgram, fingerprint: str,
                box: Box | None = None) -> str:
    """The header; with ``box`` (the envelope in the inputs' integer formats) ``predict_q`` returns a count."""
    macro = name.upper()
    defines = [f"#define {macro}_N_INPUTS {len(program.in_bits)}",
               f"#define {macro}_N_OUTPUTS {len(program.out_bits)}",
               f'#define {macro}_FINGERPRINT "{fingerprint}"',
               "", "/* Fractional bits f of each input and output: value = integer / 2^f. */"]
    defines += [f"#define {macro}_INPUT_FRAC_BITS_{j} {_int(b)}" for j, b in enumerate(program.in_bits)]
    defines += [f"#define {macro}_OUTPUT_FRAC_BITS_{k} {_int(b)}" for k, b in enumerate(program.out_bits)]
    if box is not None:
        defines += ["", f"/* The envelope in the inputs' integer formats: {name}_predict_q returns how many of",
                    f" * x_q[j] lie outside [{macro}_ENVELOPE_LOW_j, {macro}_ENVELOPE_HIGH_j] (0: all inside). */"]
        defines += [f"#define {macro}_ENVELOPE_LOW_{j} {_int(int(v))}" for j, v in enumerate(box[0])]
        defines += [f"#define {macro}_ENVELOPE_HIGH_{j} {_int(int(v))}" for j, v in enumerate(box[1])]
    return c_header(macro, comment, defines, signature(name, box is not None), includes=["#include <stdint.h>"])


def signature(name: str, checked: bool = False) -> str:
    """``void <name>_predict_q(...)``, or ``int`` (inputs outside the envelope) when ``checked``."""
    return f"{'int' if checked else 'void'} {name}_predict_q(const int16_t *x_q, int16_t *y_q)"


def source_file(name: str, comment: list[str], program: IntegerProgram, box: Box | None = None) -> str:
    lines = comment + ["", "#include <stdint.h>", "", f'#include "{name}.h"']
    if box is not None:
        lines += ["", "/* the envelope of each input, in its integer format */"]
        lines += _array("int16_t", f"{name}_envelope_low", box[0]) + _array("int16_t", f"{name}_envelope_high", box[1])
    for step in program.steps:
        lines += _constants(name, step)
    tables = {step.table.kind: step.table for step in program.steps if isinstance(step, QTable)}
    for kind, table in tables.items():
        lines += ["", f"/* {table.describe()} */",
                  f"static const int16_t {name}_{kind}_table[{len(table.values)}] = {{"]
        lines += _numbers(table.values)
        lines.append("};")
    lines += ["", _NARROW.format(name=name)]
    functions: dict[tuple[str, int], str] = {}
    for step in program.steps:
        if isinstance(step, QTable) and (step.table.kind, step.in_bits) not in functions:
            function, text = c_function(step.table, name, step.in_bits)
            functions[(step.table.kind, step.in_bits)] = function
            lines += ["", f"/* {step.table.kind} of an input with {step.in_bits} fractional bits, result Q14 */"]
            lines += text
    lines += ["", signature(name, box is not None), "{"] + _body(name, program, functions, box is not None) + ["}"]
    return "\n".join(lines) + "\n"


def _int(value: int) -> str:
    return str(value) if value >= 0 else f"({value})"


def _numbers(values, indent: str = "    ") -> list[str]:
    texts = [str(int(v)) for v in values]
    chunks = [", ".join(texts[i:i + _PER_LINE]) for i in range(0, len(texts), _PER_LINE)]
    return [indent + chunk + ("," if i < len(chunks) - 1 else "") for i, chunk in enumerate(chunks)]


def _array(ctype: str, label: str, values) -> list[str]:
    return [f"static const {ctype} {label}[{len(values)}] = {{"] + _numbers(values) + ["};"]


def _uniform(values: tuple[int, ...]) -> bool:
    return len(set(values)) == 1


def _constants(name: str, step: QStep) -> list[str]:
    layer = step.layer
    if isinstance(step, QAffine):
        n_out, n_in = step.weight.shape
        lines = ["", f"/* {step.label}: weight[k][j] connects input j to unit k, Q{step.weight_bits} */",
                 f"static const int16_t {name}_weight_{layer}[{n_out}][{n_in}] = {{"]
        for k, row in enumerate(step.weight):
            comma = "," if k < n_out - 1 else ""
            body = _numbers(row, "        ")
            lines += ["    {" + body[0].strip() + "}" + comma] if len(body) == 1 else \
                ["    {"] + body + ["    }" + comma]
        lines.append("};")
        if step.bias is not None:
            lines += [f"/* bias, Q{step.bias_bits} */"] + _array("int16_t", f"{name}_bias_{layer}", step.bias)
        if not _uniform(step.align):
            lines += ["/* input j times 2^(finest - its fractional bits), to align the products */"]
            lines += _array("int32_t", f"{name}_align_{layer}", [1 << d for d in step.align])
        if not _uniform(step.shifts):
            lines += _array("int8_t", f"{name}_shift_{layer}", step.shifts)
        return lines
    if isinstance(step, QScaling):
        bits = ", ".join(f"Q{b}" for b in step.multiplier_bits)
        lines = ["", f"/* {step.label}: y = (x - centre) * multiplier; centre in the input's format,",
                 f" * multipliers {bits} */"]
        lines += _array("int32_t", f"{name}_centre_{layer}", step.centre)
        lines += _array("int16_t", f"{name}_multiplier_{layer}", step.multiplier)
        if not _uniform(step.shifts):
            lines += _array("int8_t", f"{name}_shift_{layer}", step.shifts)
        return lines
    return []


def _shift(name: str, step: QAffine | QScaling) -> str:
    return str(step.shifts[0]) if _uniform(step.shifts) else f"{name}_shift_{step.layer}[k]"


def _loop(count: int, statements: list[str]) -> list[str]:
    return [f"    for (k = 0; k < {count}; ++k) {{"] + [f"        {s}" for s in statements] + ["    }"]


def _body(name: str, program: IntegerProgram, functions: dict[tuple[str, int], str], checked: bool) -> list[str]:
    widths = buffer_widths(program)
    lines = [f"    int16_t {buffer}[{width}];" for buffer, width in sorted(widths.items())]
    lines += ["    int j, k;"]
    if checked:  # counted before anything is written: y_q may be x_q
        lines += ["    int outside = 0;", "",  "    /* inputs outside the envelope */"]
        lines += _loop(len(program.in_bits), [
            f"if (x_q[k] < {name}_envelope_low[k] || x_q[k] > {name}_envelope_high[k]) {{",
            "    ++outside;", "}"])
    for step, (source, target, width) in zip(program.steps, _routing(program)):
        formats = ", ".join(sorted({f"Q{b}" for b in step.out_bits}))
        lines += ["", f"    /* {step.label}; result {formats} */"]
        if isinstance(step, QAffine):
            lines += _affine(name, step, source, target)
        elif isinstance(step, QScaling):
            lines += _loop(width, [
                f"{target}[k] = {name}_narrow(((int64_t){source}[k] - {name}_centre_{step.layer}[k])"
                f" * {name}_multiplier_{step.layer}[k], {_shift(name, step)});"])
        elif isinstance(step, QRelu):
            lines += _loop(width, [f"{target}[k] = {source}[k] < 0 ? 0 : {source}[k];"])
        elif isinstance(step, QLeaky):
            lines += _loop(width, [f"{target}[k] = {source}[k] > 0 ? {source}[k]"
                                   f" : {name}_narrow((int64_t){source}[k] * {step.slope}, {SLOPE_BITS});"])
        else:
            function = functions[(step.table.kind, step.in_bits)]
            lines += _loop(width, [f"{target}[k] = {function}({source}[k]);"])
    final = _routing(program)[-1][1]
    lines += ["", "    /* result */"] + _loop(len(program.out_bits), [f"y_q[k] = {final}[k];"])
    return lines + (["    return outside;"] if checked else [])


def _affine(name: str, step: QAffine, source: str, target: str) -> list[str]:
    n_out, n_in = step.weight.shape
    weight = f"{name}_weight_{step.layer}"
    if step.bias is None:
        start = "0"
    elif step.bias_shift == 0:
        start = f"(int64_t){name}_bias_{step.layer}[k]"
    else:
        start = f"(int64_t){name}_bias_{step.layer}[k] * ((int64_t)1 << {step.bias_shift})"
    term = f"(int64_t){weight}[k][j] * {source}[j]"
    if not _uniform(step.align):  # uniform formats have every alignment 0 (d_j = max f - f_j)
        term += f" * {name}_align_{step.layer}[j]"
    return _loop(n_out, [f"int64_t acc = {start};",
                         f"for (j = 0; j < {n_in}; ++j) {{",
                         f"    acc += {term};",
                         "}",
                         f"{target}[k] = {name}_narrow(acc, {_shift(name, step)});"])


def describe_formats(bits: tuple[int, ...]) -> str:
    """``Q9, Q9, Q12`` style, or ``Q14 (all 8)`` when uniform."""
    if _uniform(bits) and len(bits) > 1:
        return f"Q{bits[0]} (all {len(bits)})"
    return ", ".join(f"Q{b}" for b in bits)


def integer_range(bits: int) -> str:
    """The value range of an int16 with ``bits`` fractional bits, e.g. ``[-64, 63.998]``."""
    low, high = -32768 * 2.0 ** -bits, 32767 * 2.0 ** -bits
    return f"[{low:.6g}, {high:.6g}]"

