"""Activations as code: the built-in forms in C and Python, and the custom-activation protocol.

Each built-in class declares its forms in :mod:`tinyprop.activations`
(``_c_statements``, ``_c_input_limit``, ``_python_statements``); they repeat
its numerically stable evaluation operation for operation, so the generated code
rounds the way ``Network.predict`` does (apart from the accuracy of the
platform's ``exp``/``tanh``/``log1p``):

==========  ============================================================
Sigmoid     ``e = exp(-|z|)``; ``(z >= 0 ? 1 : e) / (1 + e)`` (never overflows)
Tanh        ``tanh(z)`` (``double`` and Python); in ``float`` C, the form below
ReLU        ``z < 0 ? 0 : z`` (a NaN input stays NaN)
LeakyReLU   ``z > 0 ? z : z * slope`` (slope rounded to the export dtype)
Softplus    ``(z < 0 ? 0 : z) + log1p(exp(-|z|))`` (never overflows)
Identity    no code at all
==========  ============================================================

A subclass does not inherit its parent's forms
(:func:`tinyprop.activations.declaration`): it declares its own or describes
itself through the protocol below.

**Tanh in float C.** The float export evaluates tanh with arithmetic alone
instead of calling ``tanhf`` (why: ``docs/export.md``, "How the layout was
found"), in two passes over the layer (see :func:`c_input_limit`):

1. clamp ``z`` to ``[-9.5, 9.5]`` (``fabsf(z) > 9.5f ? copysignf(9.5f, z) : z``;
   for ``|z| >= 9.02`` the float nearest to ``tanh(z)`` is ``+-1``, and a NaN
   stays NaN);
2. ``h = z - z w D(w) / Q(w)`` with ``w = z^2``, a rational approximation of
   ``h = 2 tanh(z / 2)``; then the double-angle formula ``tanh(z) = 2 tanh(z/2)
   / (1 + tanh(z/2)^2) = h - h (h^2 / (4 + h^2))``, which damps the error of
   ``h`` where ``tanh`` is close to 1.

``D`` (degree 2) and ``Q`` (degree 3, ``Q(0) = 1``) are the float coefficients
beside ``Tanh`` in :mod:`tinyprop.activations` (how they were found: ``docs/export.md``). The accuracy claim does not
rest on how they were found:
the tests evaluate the generated function at every float input and compare with
the C library's double ``tanh``. Largest error: 2.06 ulp (two inputs above
2 ulp), within the 4 ulp that :func:`~tinyprop.export.agreement_bound` assumes
for ``tanh`` by default. The result is odd in ``z`` bit for bit, never exceeds 1
in magnitude, and is exactly ``+-1`` for ``|z| >= 9.5`` and for infinities.

**Custom-activation protocol.** An :class:`~tinyprop.Activation` subclass
becomes exportable by defining one or both of

- ``c_expression(self, ctype: str) -> str``: a C99 expression in the variable
  ``z`` of type ``ctype`` (``"float"`` or ``"double"``) whose value is
  ``f(z)``, e.g. ``"z / (1.0f + fabsf(z))"`` for ``ctype == "float"``;
- ``python_expression(self) -> str``: the same as a Python expression in
  ``z``, e.g. ``"z / (1.0 + abs(z))"``.

The expressions are code written by the model's author and are trusted as
such; they are nevertheless checked so that a slip cannot turn into something
other than one expression: see :func:`check_c_expression` and
:func:`check_python_expression`.
"""

from __future__ import annotations

import ast
import math
import re
from typing import Callable

from ..activations import BUILT_IN_ACTIVATIONS, Activation, Identity, built_in_name, declared

__all__ = [
    "C_METHOD",
    "PYTHON_METHOD",
    "activation_kind",
    "c_body",
    "c_input_limit",
    "python_body",
    "check_c_expression",
    "check_python_expression",
    "function_names",
]

C_METHOD = "c_expression"
PYTHON_METHOD = "python_expression"

_KINDS = {cls: built_in_name(cls) for cls in BUILT_IN_ACTIVATIONS}


def activation_kind(act: Activation) -> str | None:
    """A short snake-case name for generated function names; ``None`` for Identity."""
    if type(act) is Identity:
        return None
    return _KINDS.get(type(act), "custom")


def c_body(act: Activation, ctype: str, literal: Callable[[float], str]) -> str:
    """The statements of ``static ctype f(ctype z)`` computing the activation.

    ``literal`` formats a number as a C constant of ``ctype``. Where
    :func:`c_input_limit` gives a limit, the function expects ``z`` clamped to it.
    """
    statements = declared(act, "_c_statements", ctype, literal)
    if statements is not None:
        return statements
    expression = check_c_expression(_custom_expression(act, C_METHOD, "C", ctype), type(act).__name__)
    return f"(void)z;\nreturn ({expression});"


def c_input_limit(act: Activation, ctype: str) -> float | None:
    """The bound the caller clamps ``z`` to (``|z| <= limit``) before calling the function of :func:`c_body`.

    ``None`` (no clamp) unless the activation declares one (Tanh in ``float``,
    whose rational form holds for ``|z| <= 9.5`` only). The clamp is a loop of
    its own in the generated code, so that compilers can vectorise both loops
    (``docs/export.md``).
    """
    return declared(act, "_c_input_limit", ctype)


def python_body(act: Activation) -> str:
    """The statements of ``def f(z)`` computing the activation in Python floats."""
    statements = declared(act, "_python_statements")
    if statements is not None:
        return statements
    expression = check_python_expression(_custom_expression(act, PYTHON_METHOD, "Python"), type(act).__name__)
    return f"return ({expression})"


def _custom_expression(act: Activation, method: str, language: str, *args: str) -> str:
    supply = getattr(act, method, None)
    if not callable(supply):
        raise TypeError(
            f"cannot write the activation {type(act).__name__} in {language}: it is not one of the "
            f"built-in classes ({', '.join(cls.__name__ for cls in BUILT_IN_ACTIVATIONS)}) and has no "
            f"{method}() method returning an expression in z (see docs/export.md, "
            "'Custom activations')"
        )
    expression = supply(*args)
    if not isinstance(expression, str):
        raise TypeError(
            f"{type(act).__name__}.{method}() must return a str, got {type(expression).__name__}"
        )
    return expression


# --------------------------------------------------------------------------- C expressions
_C99_MATH = """acos asin atan atan2 cos sin tan acosh asinh atanh cosh sinh tanh exp exp2 expm1
ilogb ldexp log log10 log1p log2 logb scalbn scalbln cbrt fabs hypot pow sqrt erf erfc lgamma
tgamma ceil floor nearbyint rint lrint llrint round lround llround trunc fmod remainder copysign
nextafter fdim fmax fmin fma""".split()
_C_NAMES = frozenset(_C99_MATH + [f + "f" for f in _C99_MATH] + ["z", "float", "double"])

_C_TOKEN = re.compile(
    r"(?P<space> +)"
    r"|(?P<number>(?:0[xX](?:[0-9a-fA-F]+\.?[0-9a-fA-F]*|\.[0-9a-fA-F]+)[pP][+-]?[0-9]+"
    r"|(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?)[fFlLuU]*)"
    r"|(?P<name>[A-Za-z_][A-Za-z0-9_]*)"
    r"|(?P<op>[-+*/%<>=!&|^~?:,()])"
)


def check_c_expression(expression: str, owner: str) -> str:
    """Return ``expression`` if it is one C expression over ``z``, else raise ``ValueError``.

    Allowed: spaces, numeric constants, the operators ``+ - * / % < > = ! & |
    ^ ~ ? : ,`` and parentheses (balanced), and the names ``z``, ``float``,
    ``double`` and the C99 ``<math.h>`` functions (``exp``, ``expf``, ...).
    Refused: everything else, in particular ``;``, braces, ``#``, quotes,
    backslashes, line breaks, comment markers (``/*``, ``*/``, ``//``),
    trigraphs (``??``) and any other identifier.
    """
    where = f"{owner}.{C_METHOD}()"
    if not expression.strip():
        raise ValueError(f"{where} returned an empty expression")
    for marker in ("/*", "*/", "//", "??"):
        if marker in expression:
            raise ValueError(f"{where} must return one C expression without {marker!r}, got {expression!r}")
    depth = 0
    position = 0
    while position < len(expression):
        token = _C_TOKEN.match(expression, position)
        if token is None:
            raise ValueError(
                f"{where} returned {expression!r}, which has the character "
                f"{expression[position]!r} at position {position}; a C expression in z may only use "
                "numbers, z, <math.h> functions, arithmetic and comparison operators and parentheses"
            )
        text = token.group()
        if token.lastgroup == "name" and text not in _C_NAMES:
            raise ValueError(
                f"{where} returned {expression!r}, which uses the name {text!r}; allowed are z, "
                "float, double and the C99 <math.h> functions"
            )
        depth += text == "("
        depth -= text == ")"
        if depth < 0:
            raise ValueError(f"{where} returned {expression!r}, whose parentheses do not balance")
        position = token.end()
    if depth != 0:
        raise ValueError(f"{where} returned {expression!r}, whose parentheses do not balance")
    return expression


# --------------------------------------------------------------------------- Python expressions
_PY_BUILTINS = frozenset({"abs", "min", "max", "float"})
_PY_MATH = frozenset(name for name in dir(math) if not name.startswith("_"))
_PY_NODES = (
    ast.Expression, ast.BinOp, ast.UnaryOp, ast.BoolOp, ast.Compare, ast.IfExp, ast.Call,
    ast.Name, ast.Load, ast.Attribute, ast.Constant,
    ast.operator, ast.unaryop, ast.boolop, ast.cmpop,
)


def check_python_expression(expression: str, owner: str) -> str:
    """Return ``expression`` if it is one Python expression over ``z``, else raise ``ValueError``.

    The text must be printable ASCII without ``#``, ``;``, backslashes or line
    breaks, and parse (``ast``) as a single expression built only from numbers,
    ``z``, arithmetic, comparisons, ``and``/``or``/``not``, conditional
    expressions, and calls of ``abs``, ``min``, ``max``, ``float`` and
    ``math.<function>``.
    """
    where = f"{owner}.{PYTHON_METHOD}()"
    bad = [c for c in expression if not (" " <= c <= "~") or c in "#;\\"]
    if bad or not expression.strip():
        raise ValueError(
            f"{where} must return one non-empty line of printable ASCII without '#', ';' or "
            f"backslashes, got {expression!r}"
        )
    try:
        tree = ast.parse(expression, mode="eval")
    except SyntaxError as exc:
        raise ValueError(f"{where} returned {expression!r}, which is not a Python expression: {exc.msg}") from None
    for node in ast.walk(tree):
        problem = _python_node_problem(node)
        if problem:
            raise ValueError(f"{where} returned {expression!r}, which {problem}")
    return expression


def _python_node_problem(node: ast.AST) -> str:
    if not isinstance(node, _PY_NODES):
        return f"uses {type(node).__name__} (only arithmetic, comparisons and calls are allowed)"
    if isinstance(node, ast.Constant) and (
        isinstance(node.value, bool) or not isinstance(node.value, (int, float))
    ):
        return f"has the constant {node.value!r} (only int and float constants are allowed)"
    if isinstance(node, ast.Name) and node.id not in _PY_BUILTINS | {"z", "math"}:
        return f"uses the name {node.id!r} (allowed: z, math, abs, min, max, float)"
    if isinstance(node, ast.Attribute) and not (
        isinstance(node.value, ast.Name) and node.value.id == "math" and node.attr in _PY_MATH
    ):
        return f"uses the attribute {node.attr!r} (only math.<function> is allowed)"
    if isinstance(node, ast.Call) and node.keywords:
        return "passes keyword arguments (not allowed)"
    return ""


def function_names(prefix: str, kinds_and_bodies: list[tuple[str, str]]) -> dict[tuple[str, str], str]:
    """Name each distinct ``(kind, body)`` ``prefix_kind``, numbered ``_1, _2`` when a kind repeats."""
    distinct = list(dict.fromkeys(kinds_and_bodies))
    names = {}
    for kind in dict.fromkeys(k for k, _ in distinct):
        same = [entry for entry in distinct if entry[0] == kind]
        for number, entry in enumerate(same, start=1):
            names[entry] = f"{prefix}_{kind}" + (f"_{number}" if len(same) > 1 else "")
    return names
