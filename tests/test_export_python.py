"""Plain-Python export: run in an isolated interpreter and compared with Network.predict.

References outside the project:
- the interpreter itself, started as ``python -I -S`` (isolated mode, no
  ``site``), which imports the generated module; ``sys.stdlib_module_names`` is
  the judge of "standard library only";
- ``ast`` (the interpreter's own parser) judges what is code and what is data;
- the tolerance is :func:`tinyprop.export.agreement_bound` (Higham, *Accuracy
  and Stability of Numerical Algorithms*, 2nd ed., section 3.1), and in addition
  1e-12 relative to the largest output magnitude;
- where a C compiler exists, the float64 C export, which performs the same
  operations in the same order on the same libm and must agree bit for bit.

Networks, weights and inputs are synthetic.
"""

from __future__ import annotations

import ast
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import tinyprop as tp
from tinyprop.export import agreement_bound, export_python
from tinyprop.export._source import python_literal
from tinyprop.modelfile import fingerprint

sys.path.insert(0, str(Path(__file__).parent))
from test_export_c import HOSTILE, HOSTILE_METADATA, SoftSign, needs_cc, networks, run_c  # noqa: E402

RUNNER = """
import sys
sys.path.insert(0, {directory!r})
before = set(sys.modules)
import {name}
new = sorted(m for m in set(sys.modules) - before if m != {name!r})
outside = [m for m in new if m.split(".")[0] not in sys.stdlib_module_names]
for x in {inputs!r}:
    print(" ".join(repr(v) for v in {name}.predict(x)))
print("MODULES", repr(new))
print("OUTSIDE", repr(outside))
print("CONSTANTS", ascii(({name}.INPUTS, {name}.OUTPUTS, {name}.DESCRIPTION, {name}.FINGERPRINT)))
"""


def run_python(directory: Path, X: np.ndarray, name: str = "model") -> tuple[np.ndarray, list[str], tuple]:
    """Import ``<name>.py`` in ``python -I -S``; return outputs, modules it imported, its metadata constants."""
    inputs = [[float(v) for v in row] for row in X]
    script = RUNNER.format(directory=str(directory), name=name, inputs=inputs)
    result = subprocess.run([sys.executable, "-I", "-S", "-c", script], capture_output=True, text=True)
    assert result.returncode == 0, result.stderr
    *rows, modules, outside, constants = result.stdout.splitlines()
    new = ast.literal_eval(modules.removeprefix("MODULES "))
    outside = ast.literal_eval(outside.removeprefix("OUTSIDE "))
    assert outside == [], f"the generated module imported non-standard modules {outside}"
    y = np.array([[float(t) for t in row.split()] for row in rows])
    return y, new, ast.literal_eval(constants.removeprefix("CONSTANTS "))


def check_python_agreement(net: tp.Network, X: np.ndarray, **options) -> np.ndarray:
    X = np.asarray(X, dtype=np.float64)
    reference = net.copy(dtype=np.float64).predict(X)
    with tempfile.TemporaryDirectory() as tmp:
        export_python(net, tmp, **options)
        y, _, _ = run_python(Path(tmp), X)
    difference = np.abs(y - reference)
    assert np.all(difference <= agreement_bound(net, X, dtype=np.float64))
    assert np.all(difference <= 1e-12 * np.abs(reference).max(axis=0))
    return y


# ----------------------------------------------------------------------------- agreement
@settings(max_examples=15, deadline=None)
@given(case=networks())
def test_python_export_matches_predict(case):
    net, X = case
    check_python_agreement(net, X)


@pytest.mark.slow
@settings(max_examples=200, deadline=None)
@given(case=networks())
def test_python_export_matches_predict_many(case):
    net, X = case
    check_python_agreement(net, X)


@needs_cc
@settings(max_examples=10, deadline=None)
@given(case=networks())
def test_python_and_c_float64_exports_agree_bit_for_bit(case):
    # Same operations, same order, same libm (CPython's math calls the C library's
    # exp, tanh and log1p): the two exports must give identical doubles.
    assert_c_and_python_identical(*case)


def assert_c_and_python_identical(net: tp.Network, X: np.ndarray) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        y_c, _ = run_c(net, X, Path(tmp), dtype="float64")
    np.testing.assert_array_equal(check_python_agreement(net, X), y_c)


@needs_cc
@settings(max_examples=5, deadline=None)
@given(case=networks(max_depth=3, max_width=40))
def test_wide_python_and_c_float64_exports_agree_bit_for_bit(case):
    # Widths up to 40: the C sums are split into statements of four products and a loop
    # over j, still in index order, so they must still match Python's running sum exactly.
    assert_c_and_python_identical(*case)


def test_float32_network_is_computed_in_binary64(tmp_path):
    net = tp.build_mlp([3, 4, 2], activation=tp.Sigmoid(), seed=1, dtype=np.float32)
    X = np.random.default_rng(2).normal(size=(5, 3))
    export_python(net, tmp_path)
    y, _, _ = run_python(tmp_path, X)
    reference = net.copy(dtype=np.float64).predict(X)
    assert np.all(np.abs(y - reference) <= agreement_bound(net.copy(dtype=np.float64), X))


# ----------------------------------------------------------------------------- standard library only
def test_only_math_is_imported(tmp_path):
    net = tp.Network([tp.Standardize([1.0, 2.0], [3.0, 4.0]), tp.Affine(2, 3), tp.Softplus(), tp.Affine(3, 1),
                      tp.Sigmoid()], seed=3)
    path = export_python(net, tmp_path)
    assert path == tmp_path / "model.py"
    tree = ast.parse(path.read_text())
    imports = [node for node in ast.walk(tree) if isinstance(node, (ast.Import, ast.ImportFrom))]
    assert [alias.name for node in imports for alias in node.names] == ["math"]
    _, new_modules, _ = run_python(tmp_path, np.zeros((1, 2)))
    assert set(new_modules) <= {"math"}  # math may already be loaded at start-up


def test_generated_predict_checks_its_input_length(tmp_path):
    export_python(tp.build_mlp([2, 1], seed=0), tmp_path, name="tiny")
    script = (f"import sys; sys.path.insert(0, {str(tmp_path)!r}); import tiny\n"
              "try:\n    tiny.predict([1.0])\nexcept ValueError as e:\n    print(e)")
    result = subprocess.run([sys.executable, "-I", "-S", "-c", script], capture_output=True, text=True, check=True)
    assert result.stdout.strip() == "predict expects 2 inputs, got 1"


# ----------------------------------------------------------------------------- data safety
def test_hostile_metadata_is_data_only(tmp_path):
    net = tp.Network([tp.Standardize([1, 2, 3], [1, 2, 3]), tp.Affine(3, 4), tp.Tanh(), tp.Affine(4, 2)], seed=4)
    X = np.random.default_rng(5).normal(size=(4, 3))
    plain, hostile = tmp_path / "plain", tmp_path / "hostile"
    plain.mkdir()
    hostile.mkdir()
    export_python(net, plain)
    path = export_python(net, hostile, metadata=HOSTILE_METADATA)
    assert all(32 <= byte < 127 or byte == 10 for byte in path.read_bytes()), "only printable ASCII and LF"
    y_plain, _, _ = run_python(plain, X)
    y_hostile, _, constants = run_python(hostile, X)
    np.testing.assert_array_equal(y_hostile, y_plain)
    inputs, outputs, description, printed = constants
    assert inputs == tuple((p["name"], p.get("unit", "")) for p in HOSTILE_METADATA["inputs"])
    assert outputs == tuple((p["name"], p.get("unit", "")) for p in HOSTILE_METADATA["outputs"])
    assert description == HOSTILE_METADATA["description"] and printed == fingerprint(net)
    # The code, as the parser sees it, differs only in the values of the metadata constants.
    assert _code_shape(path) == _code_shape(plain / "model.py")


def _code_shape(path: Path) -> str:
    tree = ast.parse(path.read_text())
    for node in tree.body:
        if isinstance(node, ast.Assign) and node.targets[0].id in ("INPUTS", "OUTPUTS", "DESCRIPTION"):
            node.value = ast.Constant(None)
    return ast.dump(tree)


@given(st.text())
def test_python_literal_round_trips_and_is_ascii(text):
    literal = python_literal(text)
    assert all(" " <= c <= "~" for c in literal)
    assert ast.literal_eval(literal) == text


def test_hostile_strings_are_all_covered():
    assert any("\x00" in s for s in HOSTILE) and any('"""' in s for s in HOSTILE)
    assert any("\u2028" in s for s in HOSTILE) and any("\\" in s for s in HOSTILE)


# ----------------------------------------------------------------------------- custom activations
def test_custom_activation_with_python_expression(tmp_path):
    net = tp.Network([tp.Affine(3, 4), SoftSign()], seed=6)
    X = np.random.default_rng(7).normal(size=(6, 3))
    export_python(net, tmp_path)
    y, _, _ = run_python(tmp_path, X)
    # SoftSign rounds twice per evaluation (an addition and a division) and is 1-Lipschitz.
    inner = tp.Network(net.layers[:1], init=None)
    u = np.finfo(np.float64).eps / 2
    reference = net.predict(X)
    assert np.all(np.abs(y - reference) <= 1.01 * (agreement_bound(inner, X) + 4 * u * np.abs(reference)))


@pytest.mark.parametrize(
    "expression",
    ["z; import os", "__import__('os')", "z.real", "(lambda: z)()", "[z][0]", "open('f') or z", "z # c",
     "z\n", "math.__dict__", "'s'", "True", "math.copysign(z, y=1)", "exec('1')", "", "z \\", "math.pi.hex()",
     "f'{z}'", "(y := z)", "z[0]", "*z"],
)
def test_unsafe_python_expressions_are_refused(tmp_path, expression):
    unsafe = type("Unsafe", (SoftSign,), {"python_expression": lambda self: expression})()
    with pytest.raises(ValueError, match="Unsafe.python_expression"):
        export_python(tp.Network([tp.Affine(2, 2), unsafe], seed=0), tmp_path)


def test_custom_activation_without_python_expression_is_refused(tmp_path):
    only_c = type("OnlyC", (tp.Activation,), {"c_expression": lambda self, ctype: "z"})()
    with pytest.raises(TypeError, match="OnlyC .*python_expression"):
        export_python(tp.Network([tp.Affine(2, 2), only_c], seed=0), tmp_path)


# ----------------------------------------------------------------------------- argument checks
@pytest.mark.parametrize("name", ["class", "random", "math", "int", "1x", "a-b", "x" * 65])
def test_bad_module_names_are_refused(tmp_path, name):
    with pytest.raises(ValueError, match="name"):
        export_python(tp.build_mlp([2, 1], seed=0), tmp_path, name=name)


def test_underscore_module_name_is_allowed(tmp_path):
    assert export_python(tp.build_mlp([2, 1], seed=0), tmp_path, name="_model").name == "_model.py"
