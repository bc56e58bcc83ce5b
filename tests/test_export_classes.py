"""Class decisions in generated code: compiled C, plain Python and integer-only C against the library.

The generated code must decide the same class as ``argmax`` of ``Network.predict`` (exactly,
wherever the two largest logits are further apart than the rounding bound of the logits,
``agreement_bound``, allows them to swap) and give probabilities within the bound that
``probability_bound`` derives from it. C is compiled with ``gcc -std=c99 -Wall -Wextra
-Werror -pedantic`` as in ``test_export_c.py``. Networks and inputs are generated (synthetic).
"""

from __future__ import annotations

import importlib.util
import tempfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, reject, settings
from hypothesis import strategies as st

import tinyprop as tp
from net_strategies import networks
from test_export_c import CTYPE, c_hex, compile_and_run, needs_cc
from tinyprop.classify import softmax
from tinyprop.datasets import machine_states
from tinyprop.export.classes import c_string, fixed_point_class_agreement, fixed_point_decisions, probability_bound


def _classify_driver(name: str, ctype: str, X: np.ndarray) -> str:
    macro = name.upper()
    rows = ",\n    ".join("{" + ", ".join(c_hex(v, ctype) for v in row) + "}" for row in X)
    return f"""#include <stdio.h>
#include "{name}_classes.h"

static const {ctype} inputs[{len(X)}][{macro}_N_INPUTS] = {{
    {rows}
}};

int main(void)
{{
    {ctype} p[{macro}_N_CLASSES];
    int i, k, best;
    for (i = 0; i < {len(X)}; ++i) {{
        best = {name}_classify(inputs[i], p);
        if (best != {name}_classify(inputs[i], 0)) {{
            return 3;
        }}
        printf("%d %s", best, {name}_labels[best]);
        for (k = 0; k < {macro}_N_CLASSES; ++k) {{
            printf(" %.17g", (double)p[k]);
        }}
        printf("\\n");
    }}
    return 0;
}}
"""


def _decidable(reference: np.ndarray, bound: np.ndarray) -> np.ndarray:
    """Rows whose two largest logits are further apart than twice the logits' rounding bound."""
    ordered = np.sort(reference, axis=1)
    return ordered[:, -1] - ordered[:, -2] > 2 * bound.max(axis=1)


def _import(path: Path):
    spec = importlib.util.spec_from_file_location(f"generated_{abs(hash(path))}", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@needs_cc
@pytest.mark.parametrize("dtype", ["float32", "float64"])
@settings(max_examples=8, deadline=None)
@given(net=networks(max_depth=4, max_width=6, dtype=np.float64), n=st.integers(1, 6), seed=st.integers(0, 999))
def test_exported_c_and_python_decide_like_predict(dtype, net, n, seed):
    if net.n_out < 2:
        reject()
    labels = tuple(f"state {k}" for k in range(net.n_out))
    X = np.random.default_rng(seed).normal(scale=2.0, size=(n, net.n_in)).astype(dtype)
    reference = net.copy(dtype=np.dtype(dtype)).predict(X).astype(np.float64)
    bound = tp.agreement_bound(net, X, dtype=dtype)
    if not np.all(np.isfinite(reference)) or not np.all(_decidable(reference, bound)):
        reject()  # the top two logits within rounding of each other: either decision is right
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        tp.export_c(net, folder, name="unit", dtype=dtype, labels=labels)
        out = compile_and_run(folder, ["unit.c", "unit_classes.c"], _classify_driver("unit", CTYPE[dtype], X))
        module = _import(tp.export_python(net, folder, name="unit", labels=labels))
    lines = [line.split(" ") for line in out.splitlines()]
    decided = np.array([int(parts[0]) for parts in lines])
    expected = np.argmax(reference, axis=1)
    assert np.array_equal(decided, expected)
    assert [f"{parts[1]} {parts[2]}" for parts in lines] == [labels[k] for k in expected]
    p_c = np.array([[float(v) for v in parts[3:]] for parts in lines])
    p_ref = softmax(reference)
    allowed = probability_bound(bound, net.n_out, dtype)[:, None]
    assert np.all(np.abs(p_c - p_ref) <= allowed), (np.abs(p_c - p_ref).max(), allowed.min())
    # plain Python computes in binary64 from the float64 network
    reference64 = net.predict(X.astype(np.float64))
    bound64 = tp.agreement_bound(net, X.astype(np.float64), dtype="float64")
    if np.all(_decidable(reference64, bound64)):
        results = [module.classify(list(map(float, row))) for row in X]
        assert [index for index, _ in results] == list(np.argmax(reference64, axis=1))
        p_py = np.array([p for _, p in results])
        assert np.all(np.abs(p_py - softmax(reference64)) <= probability_bound(bound64, net.n_out, "float64")[:, None])
        assert module.LABELS == labels and module.N_CLASSES == net.n_out


@needs_cc
def test_integer_code_decides_like_its_python_model_and_reports_disagreement(tmp_path):
    """Synthetic pump states: the compiled integer code returns exactly fixed_point_decisions; the report
    counts the rows where it differs from the float64 network and gives the top-two logit gaps there."""
    X, states = machine_states(300, seed=2)
    fitted = tp.fit_tabular_classification(X, states, hidden=6, epochs=30, penalty=1e-3)
    net, labels = fitted.classifier.net, fitted.classifier.labels
    report = tp.export_c_fixed_point(net, tmp_path, X, name="pump_q", labels=labels)
    assert [p.name for p in report.class_files] == ["pump_q_classes.h", "pump_q_classes.c"]
    x_q = report.to_integers(X)
    rows = ",\n    ".join("{" + ", ".join(str(int(v)) for v in row) + "}" for row in x_q)
    driver = f"""#include <stdio.h>
#include "pump_q_classes.h"
static const int16_t inputs[{len(X)}][PUMP_Q_N_INPUTS] = {{
    {rows}
}};
int main(void)
{{
    int i;
    for (i = 0; i < {len(X)}; ++i) {{
        printf("%d\\n", pump_q_classify_q(inputs[i]));
    }}
    return 0;
}}
"""
    out = compile_and_run(tmp_path, ["pump_q.c", "pump_q_classes.c"], driver)
    assert [int(v) for v in out.split()] == fixed_point_decisions(report, x_q).tolist()
    agreement = fixed_point_class_agreement(report, net, X)
    decided = np.argmax(net.predict(X), axis=1)
    differing = np.flatnonzero(fixed_point_decisions(report, x_q) != decided)
    assert agreement.differing_rows == tuple(differing.tolist()) and agreement.rows == 300
    ordered = np.sort(net.predict(X)[differing], axis=1)
    np.testing.assert_array_equal(agreement.margins, ordered[:, -1] - ordered[:, -2])
    assert agreement.differing <= 3  # only rows on the decision boundary may flip
    print(agreement)


def test_label_strings_cannot_break_out_of_the_c_literal():
    assert c_string('a"b\\c?\n*/') == '"a\\042b\\134c\\077\\012\\052/"'
    assert c_string("°C") == '"\\302\\260C"'
    with pytest.raises(ValueError, match="outputs"):
        tp.export_python(tp.build_mlp([2, 3], seed=0), tempfile.mkdtemp(), labels=("a", "b"))
