"""C99 inference code: ``<name>.h`` (interface) and ``<name>.c`` (weights and forward pass).

The generated code:

- declares ``void <name>_predict(const T *x, T *y)`` with ``T`` = ``float``
  (``dtype="float32"``, the default) or ``double`` (``dtype="float64"``);
  with ``envelope=`` an :class:`~tinyprop.envelope.Envelope`,
  ``int <name>_predict(const T *x, T *y)`` returning the number of inputs
  outside the envelope (0: all inside; :mod:`tinyprop.export._envelope`),
  the limits in ``<name>_ENVELOPE_LOW`` / ``<name>_ENVELOPE_HIGH``;
- keeps every number in ``static const`` arrays, has no mutable global state,
  no dynamic allocation and no dependency beyond ``<math.h>``; its workspace
  is two local arrays sized at generation time, so it is reentrant;
- reads ``x`` only before it writes ``y``, so ``x`` and ``y`` may be the same array;
- performs the operations of ``Network.predict`` in the same form (see
  :mod:`tinyprop.export._plan` and :mod:`tinyprop.export._activations`), each
  affine sum in index order with the bias added last, except that ``float``
  code evaluates tanh with arithmetic alone, to within 2.06 ulp, instead of
  calling ``tanhf``;
- is laid out so that a compiler can vectorise it without reordering any
  floating-point operation: each weight matrix is stored transposed
  (``weight[j][k]`` connects input ``j`` to unit ``k``) and the loops over the
  units ``k`` are innermost, so unit ``k``'s sum still runs over ``j = 0, 1,
  ...`` in order while consecutive units sit side by side in memory; each
  statement adds four terms (in order); loop bounds are constants; activation
  functions are ``static inline`` (what compilers make of it, measured:
  ``docs/export.md``, "How the layout was found");
- writes every constant so that it converts back to exactly the stored value:
  ``repr`` (shortest round trip) for double and 9 significant digits for float
  (decimal, the default, exact with any correctly rounding compiler such as
  GCC or Clang), or C99 hexadecimal constants (``literals="hex"``), which the
  C standard requires to convert exactly.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Callable, Mapping, Sequence

import numpy as np

from .._words import count
from ..envelope import Envelope
from ..network import Network
from ._activations import activation_kind, c_body, c_input_limit, function_names
from ._envelope import c_limits, check_envelope, envelope_lines
from ._header import Provenance, header_lines, provenance
from ._identifiers import check_c_name
from ._metadata import Metadata, check_metadata
from ._plan import ActivationStep, AffineStep, Plan, ScalingStep, Step, make_plan, route_work_arrays, work_array_widths
from ._source import c_block_comment, c_header, comment_text, output_directory, write_source
from .classes import check_labels, write_c_classes

__all__ = ["export_c"]

_CTYPES = {np.dtype(np.float32): "float", np.dtype(np.float64): "double"}
_LITERALS = ("decimal", "hex")
_INT_MAX = 32767  # the least INT_MAX a C99 compiler may have (5.2.4.2.1): loop indices are int
_PER_LINE = 4
_TERMS = 4  # products added per statement of an affine sum


def export_c(
    net: Network,
    path: Any,
    *,
    name: str = "model",
    dtype: Any = "float32",
    metadata: Mapping[str, Any] | None = None,
    literals: str = "decimal",
    labels: Sequence[str] | None = None,
    envelope: Envelope | None = None,
) -> tuple[Path, ...]:
    """Write ``<name>.h`` and ``<name>.c`` into the directory ``path`` (created if missing).

    Parameters
    ----------
    net:
        The network to export. It is not modified.
    path:
        A directory, created with its parents if missing; files of the same names
        are overwritten.
    name:
        Prefix of every generated identifier (``<name>_predict``,
        ``<NAME>_N_INPUTS``, ...): ``[A-Za-z][A-Za-z0-9_]{0,63}``, not a C
        or Python keyword. (A leading underscore is refused because C
        reserves such names at file scope.)
    dtype:
        ``"float32"`` (C ``float``) or ``"float64"`` (C ``double``). The
        numbers are converted the way ``net.copy(dtype)`` converts them.
    metadata:
        Optional names and units of inputs and outputs and a description,
        written into the header comment (escaped);
        see :func:`tinyprop.export._metadata.check_metadata`.
    literals:
        ``"decimal"`` (default) or ``"hex"`` (C99 hexadecimal constants).
    labels:
        For a classifier (one logit per output, or one for two labels): the labels in class
        order. Then ``<name>_classes.h`` / ``<name>_classes.c`` are written too,
        with the label table and ``int <name>_classify(const T *x, T *p)``
        (:mod:`tinyprop.export.classes`).
    envelope:
        An :class:`~tinyprop.envelope.Envelope` with one range per input, or
        ``None`` (default). When given, ``<name>_predict`` returns ``int``: the
        number of inputs outside their range (below the low limit, above the
        high limit, or NaN; 0 when all are inside), the outputs computed all
        the same; the limits are the arrays ``<name>_ENVELOPE_LOW`` and
        ``<name>_ENVELOPE_HIGH``, declared in the header, which lists them by
        input name. ``float`` limits are rounded inward, so a ``float`` input
        counts as outside exactly when its value lies outside the envelope.

    Returns
    -------
    ``(header_path, source_path)``, followed by the two class files when
    ``labels`` are given.

    Raises
    ------
    TypeError / ValueError
        For a bad argument, a layer or activation that cannot be written in C
        (a custom activation needs ``c_expression(ctype)``), numbers that are
        not finite in ``dtype``, or a layer wider than 32767.
    """
    name = check_c_name(name)
    if literals not in _LITERALS:
        raise ValueError(f"literals must be one of {_LITERALS}, got {literals!r}")
    ctype = _ctype(dtype)
    directory = output_directory(path)
    plan = make_plan(net, np.dtype(dtype))
    widest = max([plan.n_in] + [step.width for step in plan.steps])
    if widest > _INT_MAX:
        raise ValueError(f"layers may be at most {_INT_MAX} wide for int loop indices, got width {widest}")
    meta = check_metadata(metadata, plan.n_in, plan.n_out)
    classes = None if labels is None else check_labels(labels, plan.n_out)
    checked = check_envelope(envelope, plan.n_in)
    writer = _Writer(name, ctype, plan, lambda v: _literal(v, ctype, literals == "hex"),
                     None if checked is None else (checked, meta))
    origin = provenance(net)

    def header(filename: str) -> list[str]:
        return c_block_comment(header_lines(f"{filename}: neural-network inference in C99, generated by tinyprop",
                                           plan, meta, origin, writer.interface()))

    header_path = write_source(directory, f"{name}.h", writer.header_file(header(f"{name}.h"), origin))
    source_path = write_source(directory, f"{name}.c", writer.source_file(header(f"{name}.c")))
    if classes is not None:
        return (header_path, source_path, *write_c_classes(directory, name, classes, ctype))
    return header_path, source_path


def _ctype(dtype: Any) -> str:
    try:
        resolved = np.dtype(dtype)
    except TypeError:
        resolved = None
    if resolved not in _CTYPES:
        raise TypeError(f"dtype must be 'float32' or 'float64', got {dtype!r}")
    return _CTYPES[resolved]


def _literal(value: float, ctype: str, hexadecimal: bool) -> str:
    """A C constant of ``ctype`` that converts exactly to ``value`` rounded to ``ctype``."""
    with np.errstate(over="ignore"):
        value = float(np.array(value, dtype=np.float32 if ctype == "float" else np.float64))
    if not np.isfinite(value):
        raise ValueError(f"cannot write {value!r} as a finite C {ctype} constant")
    suffix = "f" if ctype == "float" else ""
    if hexadecimal:
        return value.hex() + suffix
    text = f"{value:.9g}" if ctype == "float" else repr(value)
    if "." not in text and "e" not in text:
        text += ".0"  # "3" is an int constant; "3f" is not a constant at all
    return text + suffix


class _Writer:
    """Emits the two files for one plan; ``literal`` formats a number as a ``ctype`` constant."""

    def __init__(self, name: str, ctype: str, plan: Plan, literal: Callable[[float], str],
                 envelope: tuple[Envelope, Metadata] | None = None) -> None:
        self.name, self.ctype, self.plan, self.literal = name, ctype, plan, literal
        self.macro = name.upper()
        self.envelope = envelope
        self.limits = None if envelope is None else c_limits(envelope[0], ctype)
        result = "void" if envelope is None else "int"
        self.signature = f"{result} {name}_predict(const {ctype} *x, {ctype} *y)"
        coded = {
            step.layer: (kind, c_body(step.activation, ctype, literal))
            for step in plan.steps
            if isinstance(step, ActivationStep) and (kind := activation_kind(step.activation))
        }
        self.functions = function_names(name, list(coded.values()))
        self.function_of_layer = {layer: self.functions[entry] for layer, entry in coded.items()}
        self.limit_of_layer = {step.layer: c_input_limit(step.activation, ctype)
                               for step in plan.steps if isinstance(step, ActivationStep)}
        self.steps = [step for step in plan.steps
                      if not isinstance(step, ActivationStep) or step.layer in coded]

    # ------------------------------------------------------------------ header file
    def interface(self) -> list[str]:
        size = 8 if self.ctype == "double" else 4
        widths = self._buffer_widths()
        buffers = " and ".join(f"{width}" for width in widths.values())
        stack = sum(widths.values()) * size
        checks, limits = [], []
        if self.envelope is not None and self.limits is not None:
            checks = ["  Returns the number of inputs outside the operating envelope (0: all inside): x[j] is",
                      f"  outside when below {self.name}_ENVELOPE_LOW[j], above {self.name}_ENVELOPE_HIGH[j] or NaN.",
                      "  y is computed all the same." + (" The float limits are the envelope's rounded inward."
                                                          if self.ctype == "float" else "")]
            low, high = ([self.literal(v) for v in side] for side in self.limits)
            limits = envelope_lines(self.envelope[0], self.envelope[1], low, high)
        return [
            f"Interface (declared in {self.name}.h):",
            f"  {self.signature};",
            f"  x holds {self.macro}_N_INPUTS = {count(self.plan.n_in, 'value')}, y receives "
            f"{self.macro}_N_OUTPUTS = {self.plan.n_out}; x and y may be the same array.",
            *checks,
            f"Arithmetic: {self.ctype} (IEEE 754 binary{size * 8}) throughout. No dynamic allocation,",
            "no mutable global state (reentrant); the only dependency is <math.h>.",
            f"Stack: work arrays of {buffers} {self.ctype} ({stack} bytes) plus a few scalars.",
            *limits,
        ]

    def header_file(self, comment: list[str], origin: Provenance) -> str:
        defines = [
            f"#define {self.macro}_N_INPUTS {self.plan.n_in}",
            f"#define {self.macro}_N_OUTPUTS {self.plan.n_out}",
            f'#define {self.macro}_FINGERPRINT "{origin.fingerprint}"',
        ]
        declaration = self.signature
        if self.envelope is not None:
            declaration = "\n".join(f"extern const {self.ctype} {self.name}_ENVELOPE_{side}[{self.macro}_N_INPUTS];"
                                     for side in ("LOW", "HIGH")) + "\n" + declaration
        return c_header(self.macro, comment, defines, declaration)

    # ------------------------------------------------------------------ source file
    def source_file(self, comment: list[str]) -> str:
        size = 8 if self.ctype == "double" else 4
        lines = comment + [
            "",
            "#include <math.h>",
            "",
            f'#include "{self.name}.h"',
            "",
            f"/* Refuse to compile where {self.ctype} is not {size} bytes"
            + (" (some 8-bit targets have a 4-byte double). */" if size == 8 else ". */"),
            f"typedef char {self.name}_requires_{size}_byte_{self.ctype}"
            f"[sizeof({self.ctype}) == {size} ? 1 : -1];",
        ]
        lines += self._envelope_constants()
        for step in self.plan.steps:
            lines += self._constants(step)
        for (_, body), function in self.functions.items():
            lines += ["", f"static inline {self.ctype} {function}({self.ctype} z)", "{"]
            lines += [f"    {statement}" for statement in body.split("\n")] + ["}"]
        lines += ["", self.signature, "{"] + self._function_body() + ["}"]
        return "\n".join(lines) + "\n"

    def _envelope_constants(self) -> list[str]:
        if self.envelope is None or self.limits is None:
            return []
        envelope, meta = self.envelope
        lines = ["", f"/* operating envelope ({comment_text(envelope.source)}) */"]
        for side, values in zip(("LOW", "HIGH"), self.limits):
            lines.append(f"const {self.ctype} {self.name}_ENVELOPE_{side}[{self.macro}_N_INPUTS] = {{")
            for j, value in enumerate(values):
                name = f" {comment_text(meta.inputs[j].name)}" if meta.inputs else ""
                lines.append(f"    {self.literal(value)}{',' if j < len(values) - 1 else ''} /* x[{j}]{name} */")
            lines.append("};")
        return lines

    def _constants(self, step: Step) -> list[str]:
        prefix, layer = self.name, step.layer
        if isinstance(step, AffineStep):
            n_out, n_in = step.weight.shape
            lines = ["", f"/* layer {layer}: {step.describe()}; weight[j][k] connects input j to unit k",
                     " * (the transpose of Affine.weight: one row per input) */",
                     f"static const {self.ctype} {prefix}_weight_{layer}[{n_in}][{n_out}] = {{"]
            for j, row in enumerate(step.weight.T):
                lines += self._numbers(row, "    {", "}" + ("," if j < n_in - 1 else ""))
            lines.append("};")
            if step.bias is not None:
                lines += [f"static const {self.ctype} {prefix}_bias_{layer}[{n_out}] = {{"]
                lines += self._numbers(step.bias, "    ", "") + ["};"]
            return lines
        if isinstance(step, ScalingStep):
            lines = ["", f"/* layer {layer}: {step.describe()}",
                     f" * mean  = {comment_text(repr(step.mean.tolist()))}",
                     f" * scale = {comment_text(repr(step.scale.tolist()))} */"]
            for label, values in (("gain", step.gain), ("offset", step.offset)):
                lines += [f"static const {self.ctype} {prefix}_{label}_{layer}[{step.width}] = {{"]
                lines += self._numbers(values, "    ", "") + ["};"]
            return lines
        return []

    def _numbers(self, values: np.ndarray, opening: str, closing: str) -> list[str]:
        """Comma-separated constants, ``_PER_LINE`` per line (C99 guarantees only 4095-character lines)."""
        texts = [self.literal(v) for v in values]
        chunks = [", ".join(texts[i:i + _PER_LINE]) for i in range(0, len(texts), _PER_LINE)]
        indent = " " * len(opening)
        lines = [(opening if i == 0 else indent) + chunk + ("," if i < len(chunks) - 1 else "")
                 for i, chunk in enumerate(chunks)]
        lines[-1] += closing
        return lines

    def _buffer_widths(self) -> dict[str, int]:
        """The width of each work array actually used, ``{"a": ..., "b": ...}``."""
        return work_array_widths(self._routing())

    def _routing(self) -> list[tuple[str, str, int]]:
        """``(source, target, width)`` per emitted step (Identity steps emit nothing); see ``route_work_arrays``."""
        return route_work_arrays([(isinstance(step, AffineStep), step.width) for step in self.steps], "x")

    def _function_body(self) -> list[str]:
        widths = self._buffer_widths()
        lines = [f"    {self.ctype} {buffer}[{width}];" for buffer, width in sorted(widths.items())]
        if any(isinstance(group, tuple) for step in self.steps if isinstance(step, AffineStep)
               for group in _groups(step.weight.shape[1])):
            lines.append("    int j;")
        lines.append("    int k;")
        if self.envelope is not None:
            low, high = f"{self.name}_ENVELOPE_LOW[k]", f"{self.name}_ENVELOPE_HIGH[k]"
            lines += ["    int outside = 0;", "", "    /* inputs outside the operating envelope (NaN included) */"]
            lines += _loop(self.plan.n_in, [f"if (!(x[k] >= {low} && x[k] <= {high})) {{", "    ++outside;", "}"])
        for step, (source, target, width) in zip(self.steps, self._routing()):
            layer = step.layer
            lines += ["", f"    /* layer {layer}: {comment_text(step.describe())} */"]
            if isinstance(step, AffineStep):
                lines += self._affine(step, source, target)
            elif isinstance(step, ScalingStep):
                gain, offset = f"{self.name}_gain_{layer}[k]", f"{self.name}_offset_{layer}[k]"
                lines += _loop(width, [f"{target}[k] = {source}[k] * {gain} + {offset};"])
            else:
                limit = self.limit_of_layer[layer]
                if limit is not None:
                    f, bound, z = "f" if self.ctype == "float" else "", self.literal(limit), f"{source}[k]"
                    lines += _loop(width, [f"{target}[k] = fabs{f}({z}) > {bound} ? copysign{f}({bound}, {z}) : {z};"])
                    source = target
                lines += _loop(width, [f"{target}[k] = {self.function_of_layer[layer]}({source}[k]);"])
        final = self._routing()[-1][1]
        lines += ["", "    /* result */"] + _loop(self.plan.n_out, [f"y[k] = {final}[k];"])
        if self.envelope is not None:
            lines.append("    return outside;")
        return lines

    def _affine(self, step: AffineStep, source: str, target: str) -> list[str]:
        """``target[k] = 0 + weight[0][k] * source[0] + weight[1][k] * source[1] + ... + bias[k]``.

        The sum runs in order over ``j`` and is written ``_TERMS`` products per
        statement, left to right (C's ``+`` associates to the left, so splitting
        it does not change the order): the first statement starts from zero,
        the last one adds the bias, and the groups between them become a loop
        over ``j`` when there are two or more.
        """
        n_in, n_out = step.weight.shape[1], step.width
        weight = f"{self.name}_weight_{step.layer}"
        groups = _groups(n_in)
        lines = []
        for number, group in enumerate(groups):
            first, last = number == 0, number == len(groups) - 1
            bias = f"{self.name}_bias_{step.layer}[k]" if last and step.bias is not None else None
            start = self.literal(0.0) if first else f"{target}[k]"
            if isinstance(group, range):
                indices = [str(j) for j in group]
                lines += _loop(n_out, _sum(target, start, weight, source, indices, bias))
            else:
                begin, end = group
                indices = ["j"] + [f"j + {i}" for i in range(1, _TERMS)]
                lines.append(f"    for (j = {begin}; j < {end}; j += {_TERMS}) {{")
                lines += _loop(n_out, _sum(target, start, weight, source, indices, bias), indent="        ")
                lines.append("    }")
        return lines


def _groups(n_in: int) -> list[range | tuple[int, int]]:
    """The statements of an affine sum over ``n_in`` inputs, ``_TERMS`` products each.

    A ``range`` of inputs becomes a statement with literal indices; ``(begin,
    end)`` stands for the full groups ``begin .. end - 1`` written as one loop
    over ``j``. At most one loop, always between the first and the last group.
    """
    groups = [range(j, min(j + _TERMS, n_in)) for j in range(0, n_in, _TERMS)]
    if len(groups) < 4:
        return list(groups)
    return [groups[0], (groups[1].start, groups[-1].start), groups[-1]]


def _loop(count: int, statements: list[str], indent: str = "    ") -> list[str]:
    """``for (k = 0; k < count; ++k) { statements }`` indented by ``indent``."""
    return ([f"{indent}for (k = 0; k < {count}; ++k) {{"]
            + [f"{indent}    {statement}" for statement in statements]
            + [f"{indent}}}"])


def _sum(target: str, start: str, weight: str, source: str, indices: list[str], bias: str | None) -> list[str]:
    """``target[k] = start + weight[i][k] * source[i] + ... (+ bias)``, two terms per line."""
    terms = [f"{weight}[{i}][k] * {source}[{i}]" for i in indices] + ([bias] if bias else [])
    pairs = [" + ".join(terms[i:i + 2]) for i in range(0, len(terms), 2)]
    lines = [f"{target}[k] = {start} + {pairs[0]}"] + [f"    + {pair}" for pair in pairs[1:]]
    lines[-1] += ";"
    return lines
