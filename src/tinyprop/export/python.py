"""Plain-Python inference code: one ``<name>.py`` that needs only the standard library's ``math``.

The generated module defines ``predict(x)`` for one sample (a sequence of
``N_INPUTS`` numbers, returning a list of ``N_OUTPUTS`` floats) and the
constants ``FINGERPRINT``, ``TINYPROP_VERSION``, ``N_INPUTS``, ``N_OUTPUTS``,
``INPUTS`` and ``OUTPUTS`` (tuples of ``(name, unit)`` pairs from the
metadata, empty when none were given) and ``DESCRIPTION``. With ``envelope=``
an :class:`~tinyprop.envelope.Envelope`, ``predict(x)`` returns ``(y,
outside)``, ``outside`` the list of the indices of inputs outside the
envelope (empty: all inside), and the module defines ``ENVELOPE_LOW`` and
``ENVELOPE_HIGH`` (the envelope's float64 numbers).

Arithmetic is Python's float (IEEE 754 binary64) and follows the float64 C
export operation for operation: each affine sum in index order starting from
0.0, the bias added last, and the same stable activation forms (see
:mod:`tinyprop.export._activations`). Numbers are written with ``repr``,
which converts back to exactly the same float. A float32 network is exported
with its float32 numbers, computed in binary64, i.e. like
``net.copy(dtype=np.float64)``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from ..envelope import Envelope
from ..network import Network
from ._activations import activation_kind, function_names, python_body
from ._envelope import check_envelope, envelope_lines
from ._header import header_lines, provenance
from ._identifiers import check_module_name
from ._metadata import Metadata, check_metadata
from ._plan import ActivationStep, AffineStep, Plan, ScalingStep, Step, make_plan
from ._source import comment_text, output_directory, python_literal, write_source
from .classes import check_labels, python_classes

__all__ = ["export_python"]

_PER_LINE = 4

_AFFINE = '''
def _affine(weight, bias, v):
    """z[k] = (sum over j of weight[k][j] * v[j], in order of j) + bias[k]."""
    z = []
    for k in range(len(weight)):
        s = 0.0
        for w, x in zip(weight[k], v):
            s += w * x
        z.append(s if bias is None else s + bias[k])
    return z
'''

_SCALE = '''
def _scale(gain, offset, v):
    """y[j] = v[j] * gain[j] + offset[j]."""
    return [x * g + o for x, g, o in zip(v, gain, offset)]
'''


def export_python(
    net: Network,
    path: Any,
    *,
    name: str = "model",
    metadata: Mapping[str, Any] | None = None,
    labels: Sequence[str] | None = None,
    envelope: Envelope | None = None,
) -> Path:
    """Write ``<name>.py`` into the directory ``path`` (created if missing); return its path.

    Parameters
    ----------
    net:
        The network to export. It is not modified.
    path:
        A directory, created with its parents if missing; a file of the same name
        is overwritten.
    name:
        The module name: ``[A-Za-z_][A-Za-z0-9_]{0,63}``, not a C or Python
        keyword, and not the name of a standard-library module (which the
        file would shadow).
    metadata:
        Optional names and units of inputs and outputs and a description (see
        :func:`tinyprop.export._metadata.check_metadata`); written into the
        header comment and into the module's constants, escaped.
    labels:
        For a classifier (one logit per output, or one for two labels): the labels in class
        order. Then the module also defines ``LABELS``, ``N_CLASSES`` and
        ``classify(x) -> (index, probabilities)`` (:mod:`tinyprop.export.classes`).
    envelope:
        An :class:`~tinyprop.envelope.Envelope` with one range per input, or
        ``None`` (default). When given, ``predict(x)`` returns ``(y, outside)``:
        ``outside`` lists the indices ``j`` of the inputs outside their range
        (``x[j]`` below ``ENVELOPE_LOW[j]``, above ``ENVELOPE_HIGH[j]``, or NaN),
        empty when all are inside; ``y`` is computed all the same.

    Raises
    ------
    TypeError / ValueError
        For a bad argument, or a layer or activation that cannot be written in
        Python (a custom activation needs ``python_expression()``).
    """
    name = check_module_name(name)
    directory = output_directory(path)
    plan = make_plan(net, np.dtype(np.float64))
    meta = check_metadata(metadata, plan.n_in, plan.n_out)
    classes = None if labels is None else check_labels(labels, plan.n_out)
    checked = check_envelope(envelope, plan.n_in)
    functions = _activation_functions(plan)
    origin = provenance(net)
    call = "y = predict(x)" if checked is None else "y, outside = predict(x)"
    checks, limits = [], []
    if checked is not None:
        checks = ["  outside: the indices j of the inputs outside the operating envelope (empty: all inside),",
                  "  x[j] < ENVELOPE_LOW[j], x[j] > ENVELOPE_HIGH[j] or NaN; y is computed all the same."]
        limits = envelope_lines(checked, meta, [repr(v) for v in checked.low.tolist()],
                                [repr(v) for v in checked.high.tolist()])
    interface = [
        "Interface:",
        f"  from {name} import predict",
        f"  {call}  # x: N_INPUTS = {plan.n_in} numbers; y: a list of N_OUTPUTS = {plan.n_out} floats",
        *checks,
        "Arithmetic: Python float (IEEE 754 binary64). Needs only the standard library (math).",
        *limits,
    ]
    comment = header_lines(f"{name}.py: neural-network inference in plain Python, generated by tinyprop",
                           plan, meta, origin, interface)
    lines = [f"# {line}".rstrip() for line in comment]
    lines += ['"""Inference code generated by tinyprop: call predict(x). See the comment above."""',
              "", "import math", ""]
    lines += [f"FINGERPRINT = {python_literal(origin.fingerprint)}",
              f"TINYPROP_VERSION = {python_literal(origin.version)}",
              f"N_INPUTS = {plan.n_in}",
              f"N_OUTPUTS = {plan.n_out}"]
    lines += _metadata_constants(meta)
    if checked is not None:
        lines += ["", f"# operating envelope ({comment_text(checked.source)})"]
        for side, values in (("LOW", checked.low), ("HIGH", checked.high)):
            lines += [f"ENVELOPE_{side} = ("] + _numbers(values, "    ") + [")"]
    for step in plan.steps:
        lines += _constants(step)
    for (_, body), function in functions.items():
        lines += ["", "", f"def {function}(z):"] + [f"    {statement}" for statement in body.split("\n")]
    helpers = [_AFFINE] + ([_SCALE] if plan.scalings else [])
    for helper in helpers:
        lines += [""] + helper.rstrip("\n").split("\n")
    lines += ["", ""] + _predict(plan, functions, checked is not None)
    text = "\n".join(lines) + "\n" + ("" if classes is None else python_classes(classes, checked is not None))
    return write_source(directory, f"{name}.py", text)


def _activation_functions(plan: Plan) -> dict[tuple[str, str], str]:
    entries = [(kind, python_body(step.activation)) for step in plan.steps
               if isinstance(step, ActivationStep) and (kind := activation_kind(step.activation))]
    return function_names("", entries)


def _metadata_constants(meta: Metadata) -> list[str]:
    lines = []
    for label, ports in (("INPUTS", meta.inputs), ("OUTPUTS", meta.outputs)):
        pairs = "".join(f"\n    ({python_literal(p.name)}, {python_literal(p.unit)})," for p in ports)
        lines.append(f"{label} = ({pairs}\n)" if ports else f"{label} = ()")
    lines.append(f"DESCRIPTION = {python_literal(meta.description)}")
    return lines


def _numbers(values: np.ndarray, indent: str) -> list[str]:
    texts = [repr(float(v)) for v in values]
    return [indent + ", ".join(texts[i:i + _PER_LINE]) + "," for i in range(0, len(texts), _PER_LINE)]


def _constants(step: Step) -> list[str]:
    if isinstance(step, AffineStep):
        lines = ["", f"# layer {step.layer}: {step.describe()}; _WEIGHT_{step.layer}[k][j] connects input j to unit k",
                 f"_WEIGHT_{step.layer} = ("]
        for row in step.weight:
            if len(row) <= _PER_LINE:
                lines += ["    (" + _numbers(row, "")[0] + "),"]
            else:
                lines += ["    ("] + _numbers(row, "        ") + ["    ),"]
        lines.append(")")
        if step.bias is not None:
            lines += [f"_BIAS_{step.layer} = ("] + _numbers(step.bias, "    ") + [")"]
        return lines
    if isinstance(step, ScalingStep):
        lines = ["", f"# layer {step.layer}: {step.describe()}",
                 f"# mean  = {comment_text(repr(step.mean.tolist()))}",
                 f"# scale = {comment_text(repr(step.scale.tolist()))}"]
        for label, values in (("GAIN", step.gain), ("OFFSET", step.offset)):
            lines += [f"_{label}_{step.layer} = ("] + _numbers(values, "    ") + [")"]
        return lines
    return []


def _predict(plan: Plan, functions: dict[tuple[str, str], str], checks: bool) -> list[str]:
    if checks:
        head = ['def predict(x: "list[float]") -> "tuple[list[float], list[int]]":',
                '    """(output, outside) for one sample x (N_INPUTS numbers): the N_OUTPUTS floats, and the indices',
                '    of the inputs outside the operating envelope (NaN included; empty when all are inside)."""']
    else:
        head = ['def predict(x: "list[float]") -> "list[float]":',
                '    """The network output for one sample x (N_INPUTS numbers), as a list of N_OUTPUTS floats."""']
    lines = head + [
        "    v = [float(value) for value in x]",
        "    if len(v) != N_INPUTS:",
        '        raise ValueError("predict expects %d inputs, got %d" % (N_INPUTS, len(v)))',
    ]
    if checks:
        lines.append("    outside = [j for j in range(N_INPUTS) if not ENVELOPE_LOW[j] <= v[j] <= ENVELOPE_HIGH[j]]")
    for step in plan.steps:
        note = f"  # layer {step.layer}: {comment_text(step.describe())}"
        if isinstance(step, AffineStep):
            bias = f"_BIAS_{step.layer}" if step.bias is not None else "None"
            lines.append(f"    v = _affine(_WEIGHT_{step.layer}, {bias}, v){note}")
        elif isinstance(step, ScalingStep):
            lines.append(f"    v = _scale(_GAIN_{step.layer}, _OFFSET_{step.layer}, v){note}")
        elif (kind := activation_kind(step.activation)) is not None:
            function = functions[(kind, python_body(step.activation))]
            lines.append(f"    v = [{function}(z) for z in v]{note}")
    lines.append("    return (v, outside)" if checks else "    return v")
    return lines
