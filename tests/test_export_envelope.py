"""Generated code that reports inputs outside the operating envelope (export_c / export_python, envelope=).

The C compiler (``gcc -std=c99 -Wall -Wextra -Werror -pedantic -O2``, as in test_export_c.py)
judges the C code; the reference for which inputs are outside is ``Envelope.check`` on the
same numbers. Networks, envelopes and rows are synthetic.
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import numpy as np
import pytest

import tinyprop as tp

sys.path.insert(0, str(Path(__file__).resolve().parent))
from test_export_c import CTYPE, c_hex, compile_and_run, needs_cc, run_c  # noqa: E402

# synthetic scenario: a pump controller's suction pressure, speed and temperature
NAMES = ("suction", "speed", "temperature")
METADATA = {"inputs": [{"name": "suction", "unit": "bar"}, {"name": "speed", "unit": "rpm"},
                       {"name": "temperature", "unit": "degC"}]}
# limits exactly representable in float32, so the boundary rows are the limits themselves in both C types
ENVELOPE = tp.Envelope([-2.5, 0.0, 10.0], [1.25, 4000.0, 30.0], NAMES, "set by user")


def pump_network(n_out: int = 2) -> tp.Network:
    return tp.Network([tp.Standardize([0.0, 2000.0, 20.0], [1.0, 1000.0, 5.0]), tp.Affine(3, 5), tp.Tanh(),
                       tp.Affine(5, n_out)], seed=7)


def probe_rows(envelope: tp.Envelope, dtype: str) -> np.ndarray:
    """Inside (the centre), on each limit of each input, just outside each limit (one ulp of dtype), all outside."""
    kind = np.dtype(dtype).type
    centre = ((envelope.low + envelope.high) / 2).astype(dtype)
    rows = [centre]
    for j in range(envelope.n_in):
        for limit, away in ((envelope.low[j], -np.inf), (envelope.high[j], np.inf)):
            on = centre.copy()
            on[j] = kind(limit)
            beyond = on.copy()
            beyond[j] = np.nextafter(kind(limit), kind(away))
            rows += [on, beyond]
    rows.append(np.nextafter(envelope.high.astype(dtype), kind(np.inf)))
    return np.array(rows, dtype=dtype)


def run_counting_driver(directory: Path, name: str, ctype: str, X: np.ndarray, n_out: int) -> tuple[list, np.ndarray]:
    """Compile ``<name>.c`` with a driver printing ``<name>_predict``'s count and outputs (also called in place)."""
    macro = name.upper()
    rows = ",\n    ".join("{" + ", ".join(c_hex(0.0 if np.isnan(v) else v, ctype) for v in row) + "}" for row in X)
    nans = "".join(f"    inputs[{i}][{j}] = NAN;\n" for i, j in zip(*np.nonzero(np.isnan(X))))
    driver = f"""#include <math.h>
#include <stdio.h>
#include "{name}.h"

static {ctype} inputs[{len(X)}][{macro}_N_INPUTS] = {{
    {rows}
}};

int main(void)
{{
    {ctype} y[{macro}_N_OUTPUTS];
    {ctype} shared[{max(X.shape[1], n_out)}];
    int i, k, outside, again;
{nans}    for (i = 0; i < {len(X)}; ++i) {{
        outside = {name}_predict(inputs[i], y);
        for (k = 0; k < {macro}_N_INPUTS; ++k) {{
            shared[k] = inputs[i][k];
        }}
        again = {name}_predict(shared, shared);
        printf("%d %d", outside, again);
        for (k = 0; k < {macro}_N_OUTPUTS; ++k) {{
            printf(" %a %a", (double)y[k], (double)shared[k]);
        }}
        printf("\\n");
    }}
    return 0;
}}
"""
    out = compile_and_run(directory, sources=[f"{name}.c"], driver=driver)
    counts, outputs = [], []
    for line in out.splitlines():
        parts = line.split()
        assert parts[0] == parts[1], "the count differs when x and y are the same array"
        counts.append(int(parts[0]))
        values = [float.fromhex(t) for t in parts[2:]]
        np.testing.assert_array_equal(values[0::2], values[1::2])  # NaN where x held NaN
        outputs.append(values[0::2])
    return counts, np.array(outputs)


def expected_counts(envelope: tp.Envelope, X: np.ndarray) -> list[int]:
    """The number of inputs outside, row by row: Envelope.check on the same numbers (in float64)."""
    return [len(envelope.check(row).inputs) for row in np.asarray(X, dtype=np.float64)]


@needs_cc
@pytest.mark.parametrize("dtype", ["float32", "float64"])
def test_c_predict_counts_inputs_outside_inside_on_the_limits_and_just_beyond(dtype, tmp_path):
    net = pump_network()
    X = probe_rows(ENVELOPE, dtype)
    tp.export_c(net, tmp_path / "checked", dtype=dtype, metadata=METADATA, envelope=ENVELOPE)
    counts, outputs = run_counting_driver(tmp_path / "checked", "model", CTYPE[dtype], X, net.n_out)
    # centre 0; for each input: on the low limit 0, just below 1, on the high limit 0, just above 1; all above 3
    assert counts == [0] + [0, 1, 0, 1] * 3 + [3]
    assert counts == expected_counts(ENVELOPE, X)
    plain, _ = run_c(net, X, tmp_path / "plain", dtype=dtype)  # the outputs are those of the export without checks
    np.testing.assert_array_equal(outputs, plain)


@needs_cc
def test_c_counts_nan_as_outside_and_documents_the_limits_by_name(tmp_path):
    net = pump_network()
    X = np.array([[np.nan, 2000.0, 20.0], [0.0, np.nan, np.nan]], dtype=np.float32)
    header, source = tp.export_c(net, tmp_path, metadata=METADATA, envelope=ENVELOPE)
    counts, _ = run_counting_driver(tmp_path, "model", "float", X, net.n_out)
    assert counts == [1, 2]
    text = header.read_text(encoding="ascii")
    assert "int model_predict(const float *x, float *y);" in text
    assert "extern const float model_ENVELOPE_LOW[MODEL_N_INPUTS];" in text
    assert "extern const float model_ENVELOPE_HIGH[MODEL_N_INPUTS];" in text
    assert "x[1] speed: 0.0f .. 4000.0f [rpm]" in text and "Operating envelope (set by user)" in text
    assert "-2.5f, /* x[0] suction */" in source.read_text(encoding="ascii")


@needs_cc
def test_float_limits_are_rounded_inward_so_float_inputs_are_judged_exactly(tmp_path):
    # limits with no float32 representation: a float input is outside exactly when its value is outside
    envelope = tp.Envelope([0.1, -0.7, 1.0 / 3.0], [0.3, 0.7, 2.0 / 3.0])
    net = pump_network()
    values = []
    for j in range(3):
        for limit in (envelope.low[j], envelope.high[j]):
            nearest = np.float32(limit)
            for step in range(-2, 3):  # float32 numbers around the limit
                near = nearest
                for _ in range(abs(step)):
                    near = np.nextafter(near, np.float32(np.inf if step > 0 else -np.inf))
                row = ((envelope.low + envelope.high) / 2).astype(np.float32)
                row[j] = near
                values.append(row)
    X = np.array(values, dtype=np.float32)
    tp.export_c(net, tmp_path, envelope=envelope)
    counts, _ = run_counting_driver(tmp_path, "model", "float", X, net.n_out)
    assert counts == expected_counts(envelope, X)
    assert 0 in counts and 1 in counts


def generated_module(path: Path, unique: str):
    spec = importlib.util.spec_from_file_location(unique, path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_python_predict_returns_the_outputs_and_the_indices_outside(tmp_path):
    net = pump_network()
    checked = generated_module(tp.export_python(net, tmp_path / "a", metadata=METADATA, envelope=ENVELOPE),
                               "envelope_checked_model")
    plain = generated_module(tp.export_python(net, tmp_path / "b"), "envelope_plain_model")
    X = probe_rows(ENVELOPE, "float64")
    for row, expected in zip(X, expected_counts(ENVELOPE, X)):
        y, outside = checked.predict(list(row))
        assert y == plain.predict(list(row)) and len(outside) == expected
        assert outside == [entry.index for entry in ENVELOPE.check(row).inputs]
    assert checked.predict([float("nan"), 5000.0, 20.0])[1] == [0, 1]
    assert checked.ENVELOPE_LOW == tuple(ENVELOPE.low.tolist()) and checked.ENVELOPE_HIGH == (1.25, 4000.0, 30.0)
    assert "y, outside = predict(x)" in (tmp_path / "a" / "model.py").read_text(encoding="ascii")


@pytest.mark.parametrize("n_out", [2, 1], ids=["two-logits", "one-sigmoid-output"])
def test_python_classify_still_decides_when_predict_checks_the_envelope(tmp_path, n_out):
    net = pump_network(n_out)
    checked = generated_module(tp.export_python(net, tmp_path / "a", labels=["idle", "run"], envelope=ENVELOPE),
                               f"envelope_checked_classes_{n_out}")
    plain = generated_module(tp.export_python(net, tmp_path / "b", labels=["idle", "run"]),
                             f"envelope_plain_classes_{n_out}")
    for row in probe_rows(ENVELOPE, "float64"):
        assert checked.classify(list(row)) == plain.classify(list(row))


@pytest.mark.parametrize("envelope, error, message", [
    ({"low": [0.0]}, TypeError, "envelope must be None or a tinyprop.Envelope, got dict"),
    (tp.Envelope([0.0], [1.0]), ValueError, r"one range per network input \(3\), got 1"),
])
def test_a_wrong_envelope_argument_is_refused_and_nothing_is_written(envelope, error, message, tmp_path):
    for export in (tp.export_c, tp.export_python):
        with pytest.raises(error, match=message):
            export(pump_network(), tmp_path / "out", envelope=envelope)
    assert not (tmp_path / "out").exists()
