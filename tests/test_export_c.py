"""C99 export: compiled with gcc's strictest everyday flags and compared with Network.predict.

References outside the project:
- the C compiler (``gcc -std=c99 -Wall -Wextra -Werror -pedantic -O2``) is the
  judge of validity, of how the constants convert (printed back with ``%a`` /
  ``%.17g``), and of what is comment and what is code (``gcc -fpreprocessed -E``);
- the tolerance is :func:`tinyprop.export.agreement_bound`, the running error
  bound of Higham, *Accuracy and Stability of Numerical Algorithms*, 2nd ed.,
  section 3.1 (``gamma_n`` for a sum of ``n`` products in any order).

Networks, weights and inputs are synthetic (hypothesis and numpy generators).
"""

from __future__ import annotations

import shutil
import subprocess
import tempfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import tinyprop as tp
from tinyprop.export import agreement_bound, export_c
from tinyprop.export._source import comment_text
from tinyprop.modelfile import fingerprint
from tinyprop.registry import register_activation

CC = shutil.which("gcc") or shutil.which("cc")
needs_cc = pytest.mark.skipif(CC is None, reason="no C compiler: neither gcc nor cc is on PATH")
CFLAGS = ["-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic", "-O2"]
CTYPE = {"float32": "float", "float64": "double"}

HOSTILE = [
    'quote " and \' and `',
    "*/ int injected = 1; /*",
    "line\nbreak\r\n#include <stdlib.h>\n",
    "back\\slash at end \\",
    "\u2028 line separator \u2029 and \x85",
    "unicode: \u00b0C, \u03a9, \U0001f50b",
    '""" triple quotes \'\'\'',
    "NUL \x00 byte",
    "trigraph ??/ and ??= and //comment",
]
HOSTILE_METADATA = {
    "inputs": [{"name": HOSTILE[0], "unit": HOSTILE[1]}, {"name": HOSTILE[2], "unit": HOSTILE[3]},
               {"name": HOSTILE[4]}],
    "outputs": [{"name": HOSTILE[5], "unit": HOSTILE[6]}, {"name": HOSTILE[7], "unit": HOSTILE[8]}],
    "description": "".join(HOSTILE),
}


# ----------------------------------------------------------------------------- helpers
def c_hex(value: float, ctype: str) -> str:
    """An exact C99 hexadecimal constant."""
    return float(value).hex() + ("f" if ctype == "float" else "")


def compile_and_run(directory: Path, sources: list[str], driver: str) -> str:
    (directory / "driver.c").write_text(driver, encoding="ascii")
    program = directory / "driver"
    build = subprocess.run([CC, *CFLAGS, "driver.c", *sources, "-o", str(program), "-lm"],
                           cwd=directory, capture_output=True, text=True)
    assert build.returncode == 0, f"compilation failed:\n{build.stderr}"
    run = subprocess.run([str(program)], capture_output=True, text=True, check=True)
    return run.stdout


def run_c(net: tp.Network, X: np.ndarray, directory: Path, *, dtype: str = "float64",
          name: str = "model", **options) -> tuple[np.ndarray, np.ndarray]:
    """Export, compile with a driver that embeds ``X`` exactly, run.

    Returns ``(y, y_in_place)``: the outputs of ``predict(x, y)`` and of
    ``predict(buffer, buffer)`` with the input copied into the output buffer.
    """
    export_c(net, directory, name=name, dtype=dtype, **options)
    X = np.asarray(X, dtype=dtype)
    return run_predict_driver(directory, name, CTYPE[dtype], X, net.n_out, [f"{name}.c"])


def run_predict_driver(directory: Path, name: str, ctype: str, X: np.ndarray, n_out: int,
                       sources: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """Compile ``sources`` with a driver calling ``<name>_predict`` on the rows of ``X``, embedded exactly.

    Returns ``(y, y_in_place)`` as :func:`run_c` does; shared with the ensemble tests.
    """
    macro = name.upper()
    rows = ",\n    ".join("{" + ", ".join(c_hex(v, ctype) for v in row) + "}" for row in X)
    driver = f"""#include <stdio.h>
#include "{name}.h"

static const {ctype} inputs[{len(X)}][{macro}_N_INPUTS] = {{
    {rows}
}};

int main(void)
{{
    {ctype} y[{macro}_N_OUTPUTS];
    {ctype} shared[{max(X.shape[1], n_out)}];
    int i, k;
    for (i = 0; i < {len(X)}; ++i) {{
        {name}_predict(inputs[i], y);
        for (k = 0; k < {macro}_N_INPUTS; ++k) {{
            shared[k] = inputs[i][k];
        }}
        {name}_predict(shared, shared);
        for (k = 0; k < {macro}_N_OUTPUTS; ++k) {{
            printf("%.17g %.17g\\n", (double)y[k], (double)shared[k]);
        }}
    }}
    return 0;
}}
"""
    out = compile_and_run(directory, sources=sources, driver=driver)
    values = np.array([[float(t) for t in line.split()] for line in out.splitlines()])
    return values[:, 0].reshape(len(X), n_out), values[:, 1].reshape(len(X), n_out)


def check_agreement(net: tp.Network, X: np.ndarray, dtype: str, **options) -> np.ndarray:
    """Assert that the compiled export matches ``net.copy(dtype).predict`` within the bound; return ulps."""
    X = np.asarray(X, dtype=dtype)
    reference = net.copy(dtype=np.dtype(dtype)).predict(X).astype(np.float64)
    bound = agreement_bound(net, X, dtype=dtype)
    with tempfile.TemporaryDirectory() as tmp:
        y, y_in_place = run_c(net, X, Path(tmp), dtype=dtype, **options)
    np.testing.assert_array_equal(y_in_place, y)  # x and y may be the same array
    difference = np.abs(y - reference)
    assert np.all(difference <= bound), (
        f"C output differs from predict by {difference.max():.3g} where the bound is "
        f"{bound.flat[np.argmax(difference - bound)]:.3g}\n{net!r}"
    )
    spacing = np.spacing(np.abs(reference).astype(dtype)).astype(np.float64)
    return difference / spacing


BUILT_IN = st.one_of(
    st.just(tp.Sigmoid()), st.just(tp.Tanh()), st.just(tp.ReLU()), st.just(tp.Softplus()),
    st.just(tp.Identity()), st.builds(tp.LeakyReLU, st.floats(0.0, 0.5)),
)


@st.composite
def networks(draw, max_depth: int = 5, max_width: int = 7) -> tuple[tp.Network, np.ndarray]:
    """Synthetic: 1-5 affine layers of width 1-7, any built-in activations, optional scalings."""
    depth = draw(st.integers(1, max_depth))
    widths = draw(st.lists(st.integers(1, max_width), min_size=depth + 1, max_size=depth + 1))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))

    def scaling(kind, width):
        return kind(rng.uniform(-100, 100, width), 10.0 ** rng.uniform(-2, 2, width))

    layers = []
    standardize = scaling(tp.Standardize, widths[0]) if draw(st.booleans()) else None
    if standardize is not None:
        layers.append(standardize)
    for i in range(depth):
        layers.append(tp.Affine(widths[i], widths[i + 1], bias=draw(st.booleans())))
        if i < depth - 1 or draw(st.booleans()):
            layers.append(draw(BUILT_IN))
    if draw(st.booleans()):
        layers.append(scaling(tp.Unstandardize, widths[-1]))
    net = tp.Network(layers, init=None)
    net.set_vector(rng.normal(0.0, 1.0, net.n_params))
    X = rng.normal(0.0, 2.0, (6, widths[0]))
    if standardize is not None:
        X = standardize.mean + standardize.scale * X
    return net, X


# ----------------------------------------------------------------------------- agreement
@needs_cc
@pytest.mark.parametrize("dtype", ["float64", "float32"])
@settings(max_examples=15, deadline=None)
@given(case=networks())
def test_compiled_export_matches_predict(dtype, case):
    net, X = case
    check_agreement(net, X, dtype)


@needs_cc
@pytest.mark.slow
@pytest.mark.parametrize("dtype", ["float64", "float32"])
@settings(max_examples=200, deadline=None)
@given(case=networks())
def test_compiled_export_matches_predict_many(dtype, case):
    net, X = case
    check_agreement(net, X, dtype)


@needs_cc
@pytest.mark.parametrize("dtype", ["float64", "float32"])
@settings(max_examples=6, deadline=None)
@given(case=networks(max_depth=3, max_width=40))
def test_wide_layers_match_predict(dtype, case):
    # Widths up to 40 reach every shape of the generated sums (one to three statements
    # of up to four products, and the loop over j from 13 inputs on) and pre-activations
    # far beyond the float tanh's clamp at 9.5.
    net, X = case
    check_agreement(net, X, dtype)


@needs_cc
@pytest.mark.parametrize("dtype", ["float64", "float32"])
@pytest.mark.parametrize(
    "activation", [tp.Sigmoid(), tp.Tanh(), tp.ReLU(), tp.LeakyReLU(0.2), tp.Softplus(), tp.Identity()],
    ids=repr,
)
def test_each_activation_over_a_wide_range(dtype, activation):
    # z = 1 * x + 0 is exact, so the output is f(x): a grid from -150 to 150 reaches
    # exp(-|z|) in the subnormal range of float32 and underflow to zero in float64's sigmoid.
    net = tp.Network([tp.Affine(1, 1), activation], init=None)
    net.set_vector([1.0, 0.0])
    z = np.concatenate([np.linspace(-150, 150, 601), [0.0, -0.0, 1e-30, -1e-30, 1e4, -1e4]])
    ulps = check_agreement(net, z.reshape(-1, 1), dtype)
    assert np.max(ulps) <= 8  # observed: at most 3 ulps; 8 = the assumed 4-ulp libm allowance on each side


@needs_cc
@pytest.mark.parametrize(
    "layers",
    [
        [tp.Affine(3, 2)],
        [tp.Tanh(), tp.Affine(3, 2)],
        [tp.Identity(), tp.Affine(3, 2, bias=False), tp.Identity()],
        [tp.Standardize([1.0, 2.0, 3.0], [0.5, 1.0, 2.0]), tp.Affine(3, 2)],
        [tp.Affine(3, 4), tp.Unstandardize([0.0] * 4, [2.0] * 4), tp.Sigmoid(), tp.Affine(4, 2), tp.Sigmoid()],
        [tp.Affine(3, 9), tp.Tanh(), tp.Affine(9, 1), tp.Unstandardize([3.7], [0.01])],
    ],
    ids=["single-affine", "activation-first", "identities", "standardize", "scaling-inside", "wide-narrow"],
)
def test_layouts(layers):
    net = tp.Network(layers, seed=1)
    for p in net.params:
        p[...] = np.random.default_rng(2).normal(size=p.shape)
    X = np.random.default_rng(3).normal(size=(5, 3))
    for dtype in ("float64", "float32"):
        check_agreement(net, X, dtype)


@needs_cc
@pytest.mark.parametrize("dtype", ["float64", "float32"])
def test_float32_export_of_cancelling_standardize(dtype):
    # A 3.7 V cell varying by 10 mV: folding the scaling into the weights would lose
    # about log10(3.7 / 0.01) = 2.6 digits; computed as a step it matches predict.
    net = tp.Network([tp.Standardize([3.7, 25.0], [0.01, 5.0]), tp.Affine(2, 3), tp.Tanh(), tp.Affine(3, 1)], seed=4)
    X = np.column_stack([3.7 + 0.01 * np.linspace(-3, 3, 7), np.linspace(10, 40, 7)])
    check_agreement(net, X, dtype)


@needs_cc
@pytest.mark.parametrize("n_in", [1, 3, 4, 5, 8, 9, 12, 13, 16, 17])
def test_affine_sums_in_index_order(tmp_path, n_in):
    # The generated sum for unit k is 0 + w[0] x[0] + w[1] x[1] + ... + b, in this order,
    # whatever the grouping of its statements. Inputs 1, 2^-24, 2^-24, ... (float32):
    # in order, each 1 + 2^-24 rounds back to 1 (ties to even), so the sum stays 1 and
    # the bias -1 gives exactly 0; any other order would first add the small terms.
    weight = np.ones((2, n_in))
    net = tp.Network([tp.Affine(n_in, 2)], init=None)
    net.set_vector(np.concatenate([weight.ravel(), [-1.0, 0.0]]))
    x = np.full((1, n_in), 2.0 ** -24)
    x[0, 0] = 1.0
    in_order = np.float32(1.0)
    for value in x[0, 1:].astype(np.float32):
        in_order = np.float32(in_order + value)
    y, _ = run_c(net, x, tmp_path, dtype="float32")
    assert y[0, 0] == np.float32(in_order - np.float32(1.0)) == 0.0
    assert y[0, 1] == in_order  # the unit without the -1 bias: the same sum, bias 0


# ----------------------------------------------------------------------------- float tanh
TANH_DRIVER = r"""
#include <math.h>
#include <stdio.h>
#include <string.h>
#include "model.c"

/* float ulp of t > 0 (round to nearest): 2^(e - 24) for t in [2^(e-1), 2^e), 2^-149 below 2^-126 */
static double float_ulp(double t)
{
    int e;
    if (t < 0x1p-126) {
        return 0x1p-149;
    }
    (void)frexp(t, &e);
    return ldexp(1.0, e - 24);
}

int main(void)
{
    unsigned long bits;
    double worst = 0.0, worst_at = 0.0;
    long above_two = 0, broken = 0;
    const float inf = (float)HUGE_VAL;
    float x, y, y_minus, minus_x, special;
    for (bits = 0; bits < 0x7f800000ul; bits += STRIDE) {
        const unsigned int pattern = (unsigned int)bits;
        double error;
        memcpy(&x, &pattern, sizeof x);
        model_predict(&x, &y);
        error = fabs((double)y - tanh((double)x)) / float_ulp(tanh((double)x));
        if (error > worst) {
            worst = error;
            worst_at = x;
        }
        above_two += error > 2.0;
        minus_x = -x;
        model_predict(&minus_x, &y_minus);
        broken += (x > 0.0f && y_minus != -y) || y > 1.0f || (x >= 9.5f && y != 1.0f);
    }
    x = inf;
    model_predict(&x, &y);
    broken += y != 1.0f;
    x = -inf;
    model_predict(&x, &y);
    broken += y != -1.0f;
    special = (float)(HUGE_VAL - HUGE_VAL);
    model_predict(&special, &y);
    broken += y == y;
    printf("%.6f %a %ld %ld\n", worst, worst_at, above_two, broken);
    return 0;
}
"""


def float_tanh_errors(directory: Path, stride: int) -> tuple[float, float, int, int]:
    """Run the float32 export of tanh at every ``stride``-th float >= 0 (all bit patterns in order).

    Returns the largest error in ulps against the C library's double ``tanh``,
    where it occurs, the number of inputs with an error above 2 ulp, and the
    number of failed exact checks (odd symmetry, |tanh| <= 1, exactly 1 from the clamp at 9.5
    on, +-inf -> +-1, NaN -> NaN).
    """
    net = tp.Network([tp.Affine(1, 1), tp.Tanh()], init=None)
    net.set_vector([1.0, 0.0])  # z = 0 + 1 * x + 0 = x exactly
    export_c(net, directory, dtype="float32")
    build = subprocess.run([CC, *CFLAGS, f"-DSTRIDE={stride}ul", "-x", "c", "-", "-o", "tanh_check", "-lm"],
                           input=TANH_DRIVER, cwd=directory, capture_output=True, text=True)
    assert build.returncode == 0, build.stderr
    out = subprocess.run([str(directory / "tanh_check")], capture_output=True, text=True, check=True).stdout
    worst, at, above_two, broken = out.split()
    return float(worst), float.fromhex(at), int(above_two), int(broken)


@needs_cc
def test_float_tanh_on_a_sample_of_all_inputs(tmp_path):
    # Reference: the C library's double tanh, whose own error (a few units of 2^-53) is
    # negligible against a float ulp. Every 4093rd bit pattern: about 520,000 inputs.
    worst, _, above_two, broken = float_tanh_errors(tmp_path, 4093)
    assert broken == 0
    assert worst <= 2.06 and above_two <= 2  # the claim in the generated code and the docs


@needs_cc
@pytest.mark.slow
def test_float_tanh_at_every_input(tmp_path):
    # All 2^31 - 2^23 finite floats >= 0 (and their negatives); about two and a half minutes.
    worst, at, above_two, broken = float_tanh_errors(tmp_path, 1)
    assert broken == 0
    assert worst <= 2.06 and above_two <= 2, (worst, float(at).hex(), above_two)  # measured: 2.055 at 1.4018


def test_float_code_calls_no_tanhf_and_double_code_calls_tanh(tmp_path):
    net = tp.build_mlp([3, 5, 1], seed=0)
    export_c(net, tmp_path, dtype="float32")
    assert "tanhf(" not in (tmp_path / "model.c").read_text()
    export_c(net, tmp_path, dtype="float64")
    assert "return tanh(z);" in (tmp_path / "model.c").read_text()


# ----------------------------------------------------------------------------- constants
@needs_cc
@pytest.mark.parametrize("literals", ["decimal", "hex"])
@pytest.mark.parametrize("dtype", ["float64", "float32"])
def test_every_constant_converts_exactly(tmp_path, dtype, literals):
    info = np.finfo(dtype)
    edges = [info.max, -info.max, info.tiny, info.smallest_subnormal, -0.0, 1 / 3, 0.1, 1.0, 2.0 / 3.0]
    rng = np.random.default_rng(5)
    values = np.concatenate([edges, rng.normal(size=60) * 10.0 ** rng.uniform(-30, 30, 60)]).astype(dtype)
    net = tp.Network([tp.Affine(7, 7), tp.Tanh()], init=None, dtype=dtype)
    net.set_vector(values[: net.n_params])
    export_c(net, tmp_path, dtype=dtype, literals=literals)
    ctype = CTYPE[dtype]
    # Including model.c gives the driver the static arrays; it prints them back bit-exactly,
    # unit by unit as in Affine.weight (the C array is stored transposed: weight[j][k]).
    driver = """#include <stdio.h>
#include "model.c"
int main(void)
{
    int j, k;
    for (k = 0; k < 7; ++k) {
        for (j = 0; j < 7; ++j) {
            printf("%a\\n", (double)model_weight_0[j][k]);
        }
    }
    for (k = 0; k < 7; ++k) {
        printf("%a\\n", (double)model_bias_0[k]);
    }
    (void)model_predict;
    return 0;
}
"""
    out = compile_and_run(tmp_path, sources=[], driver=driver)
    printed = np.array([float.fromhex(t) for t in out.split()], dtype=dtype)
    assert printed.tobytes() == net.get_vector().tobytes()  # bit for bit, signed zero included
    assert ctype in (tmp_path / "model.c").read_text()


def test_decimal_constants_have_round_trip_digits(tmp_path):
    net = tp.Network([tp.Affine(1, 1)], init=None)
    net.set_vector([0.1, 1 / 3])
    export_c(net, tmp_path, dtype="float64")
    assert "{0.1}" in (tmp_path / "model.c").read_text()
    assert "0.3333333333333333" in (tmp_path / "model.c").read_text()
    export_c(net, tmp_path, dtype="float32")
    text = (tmp_path / "model.c").read_text()
    assert "{0.100000001f}" in text and "0.333333343f" in text  # 9 significant digits


# ----------------------------------------------------------------------------- data safety
@needs_cc
def test_hostile_metadata_cannot_change_the_code(tmp_path):
    net = tp.Network([tp.Standardize([1, 2, 3], [1, 2, 3]), tp.Affine(3, 4), tp.Softplus(), tp.Affine(4, 2)], seed=6)
    X = np.random.default_rng(7).normal(size=(4, 3))
    plain, hostile = tmp_path / "plain", tmp_path / "hostile"
    plain.mkdir()
    hostile.mkdir()
    export_c(net, plain)
    ulps = check_agreement(net, X, "float32", metadata=HOSTILE_METADATA)
    assert ulps.max() <= 16
    export_c(net, hostile, metadata=HOSTILE_METADATA)
    for filename in ("model.h", "model.c"):
        data = (hostile / filename).read_bytes()
        assert all(32 <= byte < 127 or byte == 10 for byte in data), "only printable ASCII and LF"
        # What the compiler sees once comments are removed is the same as without metadata.
        assert _code_without_comments(hostile / filename) == _code_without_comments(plain / filename)
    header = (hostile / "model.h").read_text()
    assert header.count("*/") == 2  # the header comment and the include guard's
    assert "injected" in header
    assert not any(line.startswith("#include <stdlib.h>") for line in header.splitlines())
    assert comment_text(HOSTILE[4]) in header  # "\u2028 line separator ..." written as escapes


def _code_without_comments(path: Path) -> str:
    result = subprocess.run([CC, "-fpreprocessed", "-dD", "-E", "-P", str(path)],
                            capture_output=True, text=True, check=True)
    return result.stdout


@given(st.text(st.one_of(st.sampled_from("*/?\\\n\r\x00\u2028#\"'"), st.characters())))
def test_comment_text_is_inert(text):
    escaped = comment_text(text)
    assert all(" " <= c <= "~" for c in escaped)
    assert "*/" not in escaped and "/*" not in escaped and "??" not in escaped


def test_comment_text_examples():
    assert comment_text("V") == "V"
    assert comment_text("a*/b") == "a*\\/b"
    assert comment_text("\n\u00b0C\\") == "\\n\\xb0C\\\\"
    assert comment_text("???") == "?\\?\\?"


# ----------------------------------------------------------------------------- header content
def test_header_comment_carries_provenance_ports_scaling_and_caution(tmp_path):
    net = tp.Network([tp.Standardize([3.7, 20.0], [0.1, 5.0]), tp.Affine(2, 3), tp.Tanh(), tp.Affine(3, 1),
                      tp.Unstandardize([50.0], [20.0])], seed=8)
    metadata = {"inputs": [{"name": "cell voltage", "unit": "V"}, {"name": "temperature", "unit": "degC"}],
                "outputs": [{"name": "state of charge", "unit": "%"}],
                "description": "synthetic demo"}
    header_path, source_path = export_c(net, tmp_path, name="soc", dtype="float64", metadata=metadata)
    assert (header_path.name, source_path.name) == ("soc.h", "soc.c")
    for text in (header_path.read_text(), source_path.read_text()):
        assert f"Model fingerprint: {fingerprint(net)}" in text
        assert f"Generated by tinyprop {tp.__version__}" in text
        assert "x[0]  cell voltage [V]" in text and "x[1]  temperature [degC]" in text
        assert "y[0]  state of charge [%]" in text
        assert "Standardize (layer 0), Unstandardize (layer 4)" in text
        assert "not certified for safety functions" in text
        assert "functional-safety" in " ".join(text.split())
        assert "Description: synthetic demo" in text
    header = header_path.read_text()
    assert "void soc_predict(const double *x, double *y);" in header
    assert f'#define SOC_FINGERPRINT "{fingerprint(net)}"' in header
    assert "#define SOC_N_INPUTS 2" in header and "#define SOC_N_OUTPUTS 1" in header
    source = source_path.read_text()
    assert [line for line in source.splitlines() if line.startswith("#include")] == [
        "#include <math.h>", '#include "soc.h"']
    # File-scope state is constant: every static is a const array or a function definition.
    statics = [line for line in source.splitlines() if line.startswith("static ")]
    assert statics and all(line.startswith("static const ") or line.endswith(")") for line in statics)
    assert "malloc" not in source


def test_export_leaves_the_network_unchanged(tmp_path):
    net = tp.build_mlp([3, 5, 2], seed=9)
    before, print_before = net.get_vector(), fingerprint(net)
    export_c(net, tmp_path, dtype="float32")
    assert net.dtype == np.float64 and fingerprint(net) == print_before
    np.testing.assert_array_equal(net.get_vector(), before)


# ----------------------------------------------------------------------------- custom activations
class SoftSign(tp.Activation):
    """Synthetic test activation ``z / (1 + |z|)`` supplying its own code."""

    def value(self, z):
        return z / (1.0 + np.abs(z))

    def derivative(self, z, a):
        return (1.0 - np.abs(a)) ** 2

    def c_expression(self, ctype):
        return "z / (1.0f + fabsf(z))" if ctype == "float" else "z / (1.0 + fabs(z))"

    def python_expression(self):
        return "z / (1.0 + abs(z))"


register_activation(SoftSign, name="test_export_c.SoftSign")  # the fingerprint needs a registered name


class Silent(tp.Activation):
    """A custom activation without code: export must refuse it."""

    def value(self, z):
        return z * 0.5

    def derivative(self, z, a):
        return np.full_like(z, 0.5)


@needs_cc
@pytest.mark.parametrize("dtype", ["float64", "float32"])
def test_custom_activation_with_expression(tmp_path, dtype):
    inner = tp.Network([tp.Affine(3, 4)], seed=10)
    net = tp.Network([*inner.layers, SoftSign()], init=None)
    X = np.random.default_rng(11).normal(size=(6, 3)).astype(dtype)
    y, _ = run_c(net, X, tmp_path, dtype=dtype)
    reference = net.copy(dtype=np.dtype(dtype)).predict(X)
    # SoftSign is 1-Lipschitz and rounds twice (an addition and a division) per evaluation.
    u = np.finfo(dtype).eps / 2
    bound = agreement_bound(inner, X, dtype=dtype) + 2 * 2 * u * np.abs(reference)
    assert np.all(np.abs(y - reference) <= 1.01 * bound)
    assert "static inline " + CTYPE[dtype] + " model_custom(" in (tmp_path / "model.c").read_text()


def test_custom_activation_without_expression_is_refused(tmp_path):
    net = tp.Network([tp.Affine(2, 2), Silent()], seed=0)
    with pytest.raises(TypeError, match=r"Silent .*c_expression"):
        export_c(net, tmp_path)
    with pytest.raises(TypeError, match="c_expression"):
        export_c(tp.Network([tp.Affine(2, 2), type("MyTanh", (tp.Tanh,), {})()], seed=0), tmp_path)
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize(
    "expression",
    ["z; abort()", "{z}", "z /* x */", "z // x", "z\n", "#define z", "(z", "z)", ")(",
     "system(z)", "model_weight_0[0][0]", '"z"', "z ??) 1", "z \\", ""],
)
def test_unsafe_c_expressions_are_refused(tmp_path, expression):
    unsafe = type("Unsafe", (SoftSign,), {"c_expression": lambda self, ctype: expression})()
    with pytest.raises(ValueError, match="Unsafe.c_expression"):
        export_c(tp.Network([tp.Affine(2, 2), unsafe], seed=0), tmp_path)


def test_c_expression_must_be_a_string(tmp_path):
    wrong = type("Wrong", (SoftSign,), {"c_expression": lambda self, ctype: 3})()
    with pytest.raises(TypeError, match="must return a str"):
        export_c(tp.Network([tp.Affine(2, 2), wrong], seed=0), tmp_path)


# ----------------------------------------------------------------------------- argument checks
@pytest.mark.parametrize(
    "name, error",
    [("int", ValueError), ("lambda", ValueError), ("9lives", ValueError), ("has space", ValueError),
     ("a" * 65, ValueError), ("_private", ValueError), ("x;y", ValueError), ("caf\u00e9", ValueError),
     ("", ValueError), (3, TypeError)],
)
def test_bad_names_are_refused(tmp_path, name, error):
    with pytest.raises(error, match="name"):
        export_c(tp.build_mlp([2, 1], seed=0), tmp_path, name=name)


def test_bad_arguments_are_refused(tmp_path):
    net = tp.build_mlp([2, 3, 1], seed=0)
    with pytest.raises(TypeError, match="dtype"):
        export_c(net, tmp_path, dtype="float16")
    with pytest.raises(ValueError, match="literals"):
        export_c(net, tmp_path, literals="octal")
    with pytest.raises(ValueError, match="does not exist"):
        export_c(net, tmp_path / "missing")
    (tmp_path / "file").write_text("")
    with pytest.raises(ValueError, match="is a file"):
        export_c(net, tmp_path / "file")
    with pytest.raises(TypeError, match="Network"):
        export_c("not a network", tmp_path)


@pytest.mark.parametrize(
    "metadata, error, match",
    [
        ({"inputs": [{"name": "a"}]}, ValueError, r"one entry per network input \(2\), got 1"),
        ({"outputs": [{"name": "a", "units": "V"}]}, ValueError, "'name' and optionally 'unit'"),
        ({"output": []}, ValueError, "unknown"),
        ({"inputs": [{"name": "a"}, {"name": 2}]}, TypeError, r"\[1\]\['name'\] must be a str"),
        ({"inputs": "ab"}, TypeError, "list of dicts"),
        ({"description": ["x"]}, TypeError, "description"),
        ([("inputs", [])], TypeError, "dict"),
    ],
)
def test_bad_metadata_is_refused(tmp_path, metadata, error, match):
    with pytest.raises(error, match=match):
        export_c(tp.build_mlp([2, 3, 1], seed=0), tmp_path, metadata=metadata)


def test_numbers_not_finite_in_the_export_dtype_are_refused(tmp_path):
    net = tp.build_mlp([2, 1], seed=0)
    net.params[0][0, 1] = 1e39  # finite in float64, infinite in float32
    with pytest.raises(ValueError, match=r"layer 0 \(Affine\) weight .*row 0, column 1.*float64 to float32"):
        export_c(net, tmp_path, dtype="float32")
    export_c(net, tmp_path, dtype="float64")
