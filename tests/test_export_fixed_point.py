"""Fixed-point C export: compiled with gcc and compared bit for bit with the Python integer reference.

References outside the project:
- the C compiler (``gcc -std=c99 -Wall -Wextra -Werror -pedantic -O2``) judges the
  code's validity and runs it; what is comment and what is code is decided by
  ``gcc -fpreprocessed -E``;
- the lookup tables are checked against Python's ``math.tanh`` and the logistic
  function ``1 / (1 + math.exp(-z))`` at every int16 input of several formats;
- accuracy is measured against ``Network.predict`` in float64.

Networks, weights and inputs are synthetic (hypothesis and numpy generators;
``tinyprop.datasets.battery_pack`` is a synthetic scenario too).
"""

from __future__ import annotations

import math
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import tinyprop as tp
from net_strategies import networks as base_networks
from test_export_c import HOSTILE, HOSTILE_METADATA
from tinyprop.datasets import battery_pack
from tinyprop.export._fixed_program import narrow
from tinyprop.export._fixed_tables import TABLES, lookup
from tinyprop.export.fixed_point import FixedPointReport, export_c_fixed_point
from tinyprop.modelfile import fingerprint

CC = shutil.which("gcc") or shutil.which("cc")
needs_cc = pytest.mark.skipif(CC is None, reason="no C compiler: neither gcc nor cc is on PATH")
CFLAGS = ["-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic", "-O2"]
FIXED_ACTIVATIONS = (tp.Identity(), tp.ReLU(), tp.LeakyReLU(0.1), tp.LeakyReLU(0.3), tp.Tanh(), tp.Sigmoid())


# ----------------------------------------------------------------------------- helpers
def compile_model(directory: Path, name: str = "model") -> Path:
    """Compile ``<name>.c`` with a driver reading int16 rows from stdin and printing ``y`` and in-place ``y``."""
    macro = name.upper()
    driver = f"""#include <stdio.h>
#include "{name}.h"

int main(void)
{{
    int16_t x[{macro}_N_INPUTS];
    int16_t y[{macro}_N_OUTPUTS];
    int16_t shared[{macro}_N_INPUTS + {macro}_N_OUTPUTS];
    long value;
    int k;
    for (;;) {{
        for (k = 0; k < {macro}_N_INPUTS; ++k) {{
            if (scanf("%ld", &value) != 1) {{
                return 0;
            }}
            x[k] = (int16_t)value;
            shared[k] = x[k];
        }}
        {name}_predict_q(x, y);
        {name}_predict_q(shared, shared);
        for (k = 0; k < {macro}_N_OUTPUTS; ++k) {{
            printf("%d %d\\n", (int)y[k], (int)shared[k]);
        }}
    }}
}}
"""
    (directory / "driver.c").write_text(driver, encoding="ascii")
    program = directory / "driver"
    build = subprocess.run([CC, *CFLAGS, "driver.c", f"{name}.c", "-o", str(program)],
                           cwd=directory, capture_output=True, text=True)
    assert build.returncode == 0, f"compilation failed:\n{build.stderr}"
    return program


def run_compiled(program: Path, x_q: np.ndarray, n_out: int) -> np.ndarray:
    """Run the driver on int16 rows; assert the in-place call agrees; return ``(n, n_out)`` int64."""
    text = "\n".join(" ".join(str(int(v)) for v in row) for row in x_q) + "\n"
    out = subprocess.run([str(program)], input=text, capture_output=True, text=True, check=True).stdout
    values = np.array([[int(t) for t in line.split()] for line in out.splitlines()], dtype=np.int64)
    np.testing.assert_array_equal(values[:, 0], values[:, 1])  # x_q and y_q may be the same array
    return values[:, 0].reshape(len(x_q), n_out)


def randomise(net: tp.Network, rng: np.random.Generator, weight_scale: float) -> None:
    """Synthetic parameters: normal weights and biases of the given scale (biases are non-zero)."""
    net.set_vector(rng.normal(0.0, weight_scale, size=net.n_params))


@st.composite
def fixed_cases(draw):
    """(net, calibration X, fresh X inside the calibrated range): synthetic, depth 1-4, widths 1-16."""
    net = draw(base_networks(max_depth=4, max_width=16, activations=FIXED_ACTIVATIONS))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    randomise(net, rng, draw(st.sampled_from([0.1, 0.5, 1.0, 3.0])))
    column_scale = 10.0 ** rng.uniform(-2, 3, size=net.n_in)
    X = rng.normal(size=(draw(st.integers(1, 40)), net.n_in)) * column_scale
    low, high = X.min(axis=0), X.max(axis=0)
    fresh = rng.uniform(low, high, size=(20, net.n_in))
    return net, X, fresh


def check_bit_exact(net: tp.Network, X: np.ndarray, fresh: np.ndarray, directory: Path) -> FixedPointReport:
    report = export_c_fixed_point(net, directory, X)
    program = compile_model(directory)
    for rows in (X, fresh):
        x_q = report.to_integers(rows)
        np.testing.assert_array_equal(run_compiled(program, x_q, net.n_out), report.predict_q(x_q))
    return report


# ----------------------------------------------------------------------------- lookup tables
@pytest.mark.parametrize("activation", [tp.Tanh(), tp.Sigmoid()], ids=["tanh", "sigmoid"])
@pytest.mark.parametrize("frac_bits", [3, 5, 6, 8, 10, 12, 14, 15, 20])
def test_table_error_within_its_stated_bound(activation, frac_bits):
    """Every int16 input of the format, against math.tanh / 1 / (1 + exp(-z)) (Python's math module)."""
    table = TABLES[type(activation)]
    z_q = np.arange(-32768, 32768)
    got = lookup(table, z_q, frac_bits) / 16384.0
    z = z_q / 2.0**frac_bits
    if table.kind == "tanh":
        exact = np.array([math.tanh(v) for v in z])
    else:
        exact = np.array([_logistic(v) for v in z])
    assert np.max(np.abs(got - exact)) <= table.error_bound
    assert table.error_bound < 8.5e-5  # 8.45e-5 (tanh), 7.28e-5 (sigmoid), derived in _fixed_tables


def _logistic(v: float) -> float:
    """1 / (1 + exp(-v)), written so that exp cannot overflow."""
    return 1.0 / (1.0 + math.exp(-v)) if v >= 0 else math.exp(v) / (1.0 + math.exp(v))


def test_table_bound_is_not_loose():
    """The measured worst case on a fine grid (2**-14 steps) reaches most of the bound."""
    for table in TABLES.values():
        z_q = np.arange(-32768, 32768)
        got = lookup(table, z_q, 12) / 16384.0
        z = z_q / 4096.0
        exact = np.tanh(z) if table.kind == "tanh" else 0.5 * (1.0 + np.tanh(z / 2))
        worst = np.max(np.abs(got - exact))
        assert worst > 0.6 * table.error_bound


def test_narrow_rounds_ties_away_from_zero_and_saturates():
    values, count = narrow(np.array([[5, -5, 6, -6, 7, -7, 2**40, -(2**40)]]), 1)
    assert values.tolist() == [[3, -3, 3, -3, 4, -4, 32767, -32768]] and count == 2
    values, count = narrow(np.array([[1, -1, 20000, -20000]]), -1)
    assert values.tolist() == [[2, -2, 32767, -32768]] and count == 2


# ----------------------------------------------------------------------------- bit for bit
@needs_cc
@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(case=fixed_cases())
def test_compiled_code_equals_the_integer_reference(tmp_path_factory, case):
    net, X, fresh = case
    check_bit_exact(net, X, fresh, tmp_path_factory.mktemp("fixed"))


@pytest.mark.slow
@needs_cc
@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(case=fixed_cases())
def test_compiled_code_equals_the_integer_reference_many(tmp_path_factory, case):
    net, X, fresh = case
    check_bit_exact(net, X, fresh, tmp_path_factory.mktemp("fixed"))


@needs_cc
def test_every_step_kind_and_per_column_formats(tmp_path):
    """Standardize with columns of very different size, every activation, per-column output formats."""
    rng = np.random.default_rng(3)
    X = rng.normal(size=(60, 3)) * [0.01, 5.0, 3000.0] + [3.7, 0.0, 1e4]
    net = tp.Network([tp.Standardize.from_data(X), tp.Affine(3, 7), tp.Tanh(), tp.Affine(7, 6), tp.Sigmoid(),
                      tp.Affine(6, 5), tp.LeakyReLU(0.2), tp.Affine(5, 4), tp.ReLU(), tp.Affine(4, 2),
                      tp.Unstandardize([100.0, -0.5], [30.0, 0.01])], seed=4)
    randomise(net, rng, 0.7)
    fresh = rng.uniform(X.min(axis=0), X.max(axis=0), size=(200, 3))
    report = check_bit_exact(net, X, fresh, tmp_path)
    assert len(set(report.input_bits)) == 3 and len(set(report.output_bits)) == 2
    assert report.max_rel_error.max() < 0.01


@needs_cc
def test_affine_first_with_unequal_input_formats(tmp_path):
    """Inputs of different magnitude feed an Affine directly: products are aligned per column."""
    rng = np.random.default_rng(5)
    X = rng.normal(size=(30, 3)) * [0.001, 1.0, 1e4]
    net = tp.Network([tp.Affine(3, 4), tp.ReLU(), tp.Affine(4, 2)], seed=6)
    randomise(net, rng, 1.0)
    report = check_bit_exact(net, X, X[::-1] * 0.5, tmp_path)
    assert max(report.input_bits) - min(report.input_bits) == 12  # coarsened to the 12-bit limit
    source = (tmp_path / "model.c").read_text()
    assert "model_align_0" in source


# ----------------------------------------------------------------------------- generated text
def test_integers_only_and_stdint_only(tmp_path):
    X = np.random.default_rng(0).normal(size=(20, 2))
    net = tp.Network([tp.Standardize.from_data(X), tp.Affine(2, 5), tp.Sigmoid(), tp.Affine(5, 3), tp.Tanh(),
                      tp.Affine(3, 1), tp.Unstandardize([2.0], [3.0])], seed=1)
    report = export_c_fixed_point(net, tmp_path, X, name="soc")
    for path in (report.header, report.source):
        code = re.sub(r"/\*.*?\*/", " ", path.read_text(), flags=re.S)  # comments may say "float64 network"
        for word in ("float", "double", "math.h", "malloc"):
            assert re.search(rf"\b{re.escape(word)}\b", code) is None, f"{word} in {path.name}"
        includes = [line for line in code.splitlines() if line.startswith("#include")]
        assert [i for i in includes if "<" in i] == ["#include <stdint.h>"]
    source = report.source.read_text()
    assert [line for line in source.splitlines() if line.startswith("#include")] == [
        "#include <stdint.h>", '#include "soc.h"']
    statics = [line for line in source.splitlines() if line.startswith("static ")]
    assert statics and all(line.startswith("static const ") or line.endswith(")") for line in statics)
    assert all(line.startswith(("static const int16_t", "static const int32_t", "static const int8_t"))
               for line in statics if line.startswith("static const"))


def test_header_states_formats_fingerprint_and_caution(tmp_path):
    X, y, _ = battery_pack(100, seed=2)
    net = tp.Network([tp.Standardize.from_data(X), tp.Affine(3, 4), tp.Tanh(), tp.Affine(4, 1)], seed=2)
    metadata = {"inputs": [{"name": "voltage", "unit": "V"}, {"name": "current", "unit": "A"},
                           {"name": "temperature", "unit": "degC"}],
                "outputs": [{"name": "state of charge"}]}
    report = export_c_fixed_point(net, tmp_path, X, name="soc", metadata=metadata)
    header = report.header.read_text()
    assert "void soc_predict_q(const int16_t *x_q, int16_t *y_q);" in header
    assert f'#define SOC_FINGERPRINT "{fingerprint(net)}"' in header
    for j, bits in enumerate(report.input_bits):
        assert f"#define SOC_INPUT_FRAC_BITS_{j} {bits}" in header and f"x_q[{j}]: Q{bits}" in header
    assert f"#define SOC_OUTPUT_FRAC_BITS_0 {report.output_bits[0]}" in header
    assert "x_q[j] = round(x[j] * 2^f), ties away from zero" in header
    assert "x[0]  voltage [V]" in header and "y[0]  state of charge" in header
    assert "not certified for safety functions" in header
    assert "functional-safety" in " ".join(header.split())
    assert "tanh table" in header


def test_report_table_and_numbers(tmp_path):
    X = np.random.default_rng(1).uniform(-1, 1, size=(50, 2))
    net = tp.Network([tp.Affine(2, 3), tp.Tanh(), tp.Affine(3, 2)], seed=3)
    report = export_c_fixed_point(net, tmp_path, X)
    text = str(report)
    assert "Affine 2 -> 3, with bias" in text and "max |error|" in text and "y[1]" in text
    assert "no saturation on the calibration rows" in text
    error = report.predict(X) - net.predict(X)
    np.testing.assert_allclose(report.max_abs_error, np.abs(error).max(axis=0))
    np.testing.assert_allclose(report.rms_error, np.sqrt((error**2).mean(axis=0)))
    spread = net.predict(X).max(axis=0) - net.predict(X).min(axis=0)
    np.testing.assert_allclose(report.max_rel_error, report.max_abs_error / spread)
    assert [s.layer for s in report.steps] == [0, 1, 2]


def test_float32_and_float64_networks_give_the_same_code(tmp_path):
    X = np.random.default_rng(2).normal(size=(30, 2))
    net32 = tp.build_mlp([2, 4, 1], seed=4, dtype=np.float32)
    net64 = net32.copy(dtype=np.float64)
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    r32 = export_c_fixed_point(net32, tmp_path / "a", X)
    r64 = export_c_fixed_point(net64, tmp_path / "b", X)
    code = [p.read_text().split(" */", 1)[1] for p in (r32.source, r64.source)]
    assert code[0] == code[1]  # the same integers; only the comment (fingerprint, dtype) differs
    np.testing.assert_array_equal(r32.max_abs_error, r64.max_abs_error)


def test_export_leaves_network_and_data_unchanged(tmp_path):
    X = np.random.default_rng(2).normal(size=(30, 2))
    before_X = X.copy()
    net = tp.build_mlp([2, 4, 1], seed=4)
    before = fingerprint(net)
    export_c_fixed_point(net, tmp_path, X)
    assert fingerprint(net) == before
    np.testing.assert_array_equal(X, before_X)


# ----------------------------------------------------------------------------- accuracy
def _trained_battery_net():
    """3-16-16-1 tanh with scaling layers, fitted briefly by Levenberg-Marquardt (synthetic data)."""
    X, y, _ = battery_pack(400, seed=1)
    net = tp.Network([tp.Standardize.from_data(X), tp.Affine(3, 16), tp.Tanh(), tp.Affine(16, 16), tp.Tanh(),
                      tp.Affine(16, 1), tp.Unstandardize.from_data(y.reshape(-1, 1))], seed=0)
    tp.solve(net, X, y, max_evaluations=60)
    return net, X


def test_accuracy_on_a_trained_network(tmp_path):
    """Measured: largest error 6.7e-4 of the output range, rms 2.3e-4 (see docs/export.md).

    Expected size from the formats: the inputs' own quantisation (voltage Q9:
    half a step is 1e-3 V, 7.5e-4 of its standard deviation) and the Q12
    weights of the 16 x 16 layer (half a step 1.2e-4, sixteen terms of size
    up to 1: about 5e-4 in z as a random walk), each scaled by the network's
    gain, plus the tanh table (8.5e-5) and half a step of rounding per layer:
    a few 1e-4 of the output range. The bound below is the measurement with a
    margin of 3x.
    """
    net, X = _trained_battery_net()
    report = export_c_fixed_point(net, tmp_path, X)
    assert report.max_rel_error[0] < 3 * 6.7e-4
    assert report.rms_rel_error[0] < 3 * 2.3e-4
    assert not report.warnings


# ----------------------------------------------------------------------------- saturation
@needs_cc
def test_values_beyond_the_calibrated_range_saturate_and_are_counted(tmp_path):
    X, _, _ = battery_pack(400, seed=1)
    cool = X[X[:, 2] < 5.0]  # calibration misses the warm part of the temperature range (-10 .. 45 C)
    net = tp.Network([tp.Standardize.from_data(X), tp.Affine(3, 6), tp.Tanh(), tp.Affine(6, 1)], seed=7)
    report = export_c_fixed_point(net, tmp_path, cool)
    assert report.input_saturations == 0 and not report.warnings
    assert set(report.saturations(cool).values()) == {0}
    limit = 32767 / 2.0 ** report.input_bits[2]
    assert 5.0 < limit < 45.0
    warm = X[:, 2] > limit
    counts = report.saturations(X)
    assert counts["input"] == warm.sum() > 0
    assert counts["layer 0 (Standardize 3 columns)"] == 0
    x_q = report.to_integers(X)
    assert np.all(x_q[warm, 2] == 32767)  # clamped at the top of the format
    program = compile_model(tmp_path)
    np.testing.assert_array_equal(run_compiled(program, x_q, 1), report.predict_q(x_q))


@needs_cc
def test_far_outside_input_clamps_never_wraps(tmp_path):
    net = tp.Network([tp.Affine(1, 1)], seed=0, init=None)
    net.set_vector([3.0, 0.0])
    X = np.linspace(-1.0, 1.0, 11).reshape(-1, 1)
    report = export_c_fixed_point(net, tmp_path, X)
    far = np.array([[1e9], [-1e9], [4.0], [-4.0]])
    x_q = report.to_integers(far)
    assert x_q[:, 0].tolist()[:2] == [32767, -32768]
    y_q, counts = report.program.run(x_q.astype(np.int64))
    assert y_q[:, 0].tolist() == [32767, -32768, 32767, -32768] and counts == [4]
    program = compile_model(tmp_path)
    np.testing.assert_array_equal(run_compiled(program, x_q, 1), y_q)


def test_saturation_on_calibration_rows_is_a_warning_naming_the_layer(tmp_path):
    """Headroom 1, sixteen tanh inputs at table knots whose entries were rounded up (by 7.6 Q14 steps in
    all), summed with weight 1 and a bias that puts the float result 0.2 steps below the Q11 limit."""
    table = np.array(TABLES[tp.Tanh].values)
    knots = np.arange(64, 512)
    rounded_up = knots[np.argsort(table[knots] - np.tanh(knots / 64) * 16384)[-16:]]
    first = rounded_up / 64.0
    bias = 32766.8 / 2048 - np.tanh(first).sum()
    net = tp.Network([tp.Affine(1, 16, bias=False), tp.Tanh(), tp.Affine(16, 1)], seed=0, init=None)
    net.set_vector(np.concatenate([first, np.ones(16), [bias]]))
    report = export_c_fixed_point(net, tmp_path, [[1.0]], headroom=1.0)
    assert report.output_bits == (11,) and report.steps[-1].saturations == 1
    assert report.warnings == ("layer 2 (Affine 16 -> 1, with bias) saturated 1 values",)
    assert "WARNING: layer 2" in str(report)
    assert "WARNING: layer 2" in report.header.read_text()
    assert report.predict_q(report.to_integers([[1.0]]))[0, 0] == 32767


# ----------------------------------------------------------------------------- data safety
@needs_cc
def test_hostile_metadata_cannot_change_the_code(tmp_path):
    X = np.random.default_rng(7).normal(size=(10, 3))
    net = tp.Network([tp.Standardize([1, 2, 3], [1, 2, 3]), tp.Affine(3, 4), tp.Tanh(), tp.Affine(4, 2)], seed=6)
    plain, hostile = tmp_path / "plain", tmp_path / "hostile"
    plain.mkdir()
    hostile.mkdir()
    export_c_fixed_point(net, plain, X)
    report = export_c_fixed_point(net, hostile, X, metadata=HOSTILE_METADATA)
    for filename in ("model.h", "model.c"):
        data = (hostile / filename).read_bytes()
        assert all(32 <= byte < 127 or byte == 10 for byte in data), "only printable ASCII and LF"
        assert _code_without_comments(hostile / filename) == _code_without_comments(plain / filename)
    header = (hostile / "model.h").read_text()
    assert header.count("*/") == (plain / "model.h").read_text().count("*/")
    assert not any(line.startswith("#include <stdlib.h>") for line in header.splitlines())
    assert "injected" in header and HOSTILE[1] not in header
    x_q = report.to_integers(X)
    outputs = [run_compiled(compile_model(d), x_q, 2) for d in (plain, hostile)]
    np.testing.assert_array_equal(outputs[0], outputs[1])


def _code_without_comments(path: Path) -> str:
    result = subprocess.run([CC, "-fpreprocessed", "-dD", "-E", "-P", str(path)],
                            capture_output=True, text=True, check=True)
    return result.stdout


# ----------------------------------------------------------------------------- bad inputs
class Cube(tp.Activation):
    """f(z) = z**3 (synthetic custom activation)."""

    def value(self, z):
        return z**3

    def derivative(self, z, a):
        return 3 * z**2


def test_bad_inputs_are_refused(tmp_path):
    X = np.zeros((5, 2))
    net = tp.build_mlp([2, 3, 1], seed=0)
    with pytest.raises(TypeError, match="Cube.*not support"):
        export_c_fixed_point(tp.Network([tp.Affine(2, 2), Cube(), tp.Affine(2, 1)], seed=0), tmp_path, X)
    with pytest.raises(TypeError, match="Softplus"):
        export_c_fixed_point(tp.Network([tp.Affine(2, 2), tp.Softplus(), tp.Affine(2, 1)], seed=0), tmp_path, X)
    with pytest.raises(ValueError, match="slope must be below 1"):
        export_c_fixed_point(tp.Network([tp.Affine(2, 2), tp.LeakyReLU(1.5), tp.Affine(2, 1)], seed=0), tmp_path, X)
    with pytest.raises(ValueError, match=r"calibration_X must have shape \(n_samples, 2\), got shape \(5, 3\)"):
        export_c_fixed_point(net, tmp_path, np.zeros((5, 3)))
    with pytest.raises(ValueError, match=r"calibration_X must have shape .* got shape \(4,\)"):
        export_c_fixed_point(net, tmp_path, np.zeros(4))
    bad = np.zeros((5, 2))
    bad[3, 1] = np.nan
    with pytest.raises(ValueError, match="calibration_X has a non-finite value .* row 3, column 1"):
        export_c_fixed_point(net, tmp_path, bad)
    with pytest.raises(ValueError, match="name must match"):
        export_c_fixed_point(net, tmp_path, X, name="my model")
    with pytest.raises(ValueError, match="keyword"):
        export_c_fixed_point(net, tmp_path, X, name="int")
    with pytest.raises(ValueError, match="underscore"):
        export_c_fixed_point(net, tmp_path, X, name="_model")
    with pytest.raises(ValueError, match="headroom must be a finite number >= 1"):
        export_c_fixed_point(net, tmp_path, X, headroom=0.5)
    with pytest.raises(ValueError, match="existing directory"):
        export_c_fixed_point(net, tmp_path / "missing", X)
    with pytest.raises(TypeError, match="tinyprop Network"):
        export_c_fixed_point("net", tmp_path, X)
    assert not any(tmp_path.iterdir())  # nothing was written by a refused call
