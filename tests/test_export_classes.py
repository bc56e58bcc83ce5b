"""Class decisions in generated code: compiled C, plain Python and integer-only C against the library.

The generated code must decide the same class as ``argmax`` of ``Network.predict`` (or, for one
sigmoid output, ``z > 0``) exactly, wherever the two largest logits (the logit and 0) are further
apart than the rounding bound of the logits, ``agreement_bound``, allows them to swap, and give
probabilities within the bound that ``probability_bound`` derives from it. C is compiled with
``gcc -std=c99 -Wall -Wextra -Werror -pedantic`` as in ``test_export_c.py``. Networks and inputs are
generated (synthetic).
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
from tinyprop.classify import class_probabilities, decided_classes
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
    """Rows whose two largest logits (one sigmoid logit: it and 0) are further apart than twice the rounding bound."""
    if reference.shape[1] == 1:
        reference = np.concatenate([np.zeros_like(reference), reference], axis=1)
    ordered = np.sort(reference, axis=1)
    return ordered[:, -1] - ordered[:, -2] > 2 * bound.max(axis=1)


def _import(path: Path):
    spec = importlib.util.spec_from_file_location(f"generated_{abs(hash(path))}", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@needs_cc
@pytest.mark.parametrize("dtype", ["float32", "float64"])
@settings(max_examples=12, deadline=None)
@given(net=networks(max_depth=4, max_width=6, dtype=np.float64), n=st.integers(1, 6), seed=st.integers(0, 999),
       yes_no=st.booleans())
def test_exported_c_and_python_decide_like_predict(dtype, net, n, seed, yes_no):
    """Softmax networks and (one output, two labels) sigmoid networks (about half the examples): labels exactly,
    probabilities within probability_bound."""
    if yes_no and net.n_out != 1:  # end the drawn network in one logit
        net = tp.Network([*net.copy().layers, tp.Affine(net.n_out, 1)], seed=seed, dtype=np.float64)
    labels = tuple(f"state {k}" for k in range(max(net.n_out, 2)))
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
    expected = decided_classes(reference)
    assert np.array_equal(decided, expected)
    assert [f"{parts[1]} {parts[2]}" for parts in lines] == [labels[k] for k in expected]
    p_c = np.array([[float(v) for v in parts[3:]] for parts in lines])
    p_ref = class_probabilities(reference)
    allowed = probability_bound(bound, len(labels), dtype)[:, None]
    assert np.all(np.abs(p_c - p_ref) <= allowed), (np.abs(p_c - p_ref).max(), allowed.min())
    # plain Python computes in binary64 from the float64 network
    reference64 = net.predict(X.astype(np.float64))
    bound64 = tp.agreement_bound(net, X.astype(np.float64), dtype="float64")
    if np.all(_decidable(reference64, bound64)):
        results = [module.classify(list(map(float, row))) for row in X]
        assert [index for index, _ in results] == list(decided_classes(reference64))
        p_py = np.array([p for _, p in results])
        allowed64 = probability_bound(bound64, len(labels), "float64")[:, None]
        assert np.all(np.abs(p_py - class_probabilities(reference64)) <= allowed64)
        assert module.LABELS == labels and module.N_CLASSES == len(labels)


@needs_cc
@pytest.mark.parametrize("yes_no", [False, True])
def test_integer_code_decides_like_its_python_model_and_reports_disagreement(tmp_path, yes_no):
    """Synthetic pump states (or 'cavitating?' yes/no, one sigmoid output): the compiled integer code returns
    exactly fixed_point_decisions; the report counts the rows where it differs from the float64 network and
    gives the top-two logit gaps there (|z| for one sigmoid logit)."""
    X, states = machine_states(300, seed=2)
    if yes_no:
        states = np.where(states == "cavitation", "yes", "no")
    fitted = tp.fit_tabular_classification(X, states, hidden=6, epochs=30, penalty=1e-3)
    assert fitted.classifier.net.n_out == (1 if yes_no else 4)
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
    z = net.predict(X)
    decided = (z[:, 0] > 0).astype(int) if yes_no else np.argmax(z, axis=1)
    differing = np.flatnonzero(fixed_point_decisions(report, x_q) != decided)
    assert agreement.differing_rows == tuple(differing.tolist()) and agreement.rows == 300
    if yes_no:
        np.testing.assert_array_equal(agreement.margins, np.abs(z[differing, 0]))
    else:
        ordered = np.sort(z[differing], axis=1)
        np.testing.assert_array_equal(agreement.margins, ordered[:, -1] - ordered[:, -2])
    assert agreement.differing <= 3  # only rows on the decision boundary may flip
    print(agreement)


@needs_cc
@pytest.mark.parametrize("dtype", ["float32", "float64"])
def test_one_sigmoid_output_gives_finite_probabilities_for_huge_logits_in_c_and_python(tmp_path, dtype):
    """z = x through one affine unit, for |z| up to 1e30: the two-branch logistic never overflows; the decision is
    z > 0 (z = 0 decides the first class, as the library does); probabilities match the library's to a few ulp
    (the same operations; only exp may round differently)."""
    net = tp.Network([tp.Affine(1, 1)], dtype=dtype)
    net.layers[0].params[0][...] = 1.0
    net.layers[0].params[1][...] = 0.0
    z = np.array([-1e30, -1000.0, -100.0, -30.0, -1e-3, -0.0, 0.0, 1e-3, 30.0, 100.0, 1000.0, 1e30])
    X = z[:, None].astype(dtype)
    labels = ("off", "on")
    tp.export_c(net, tmp_path, name="unit", dtype=dtype, labels=labels)
    out = compile_and_run(tmp_path, ["unit.c", "unit_classes.c"], _classify_driver("unit", CTYPE[dtype], X))
    lines = [line.split(" ") for line in out.splitlines()]
    expected = tp.Classifier(net, labels).predict_indices(X)
    assert expected.tolist() == [0] * 7 + [1] * 5
    assert [int(parts[0]) for parts in lines] == expected.tolist()
    p_c = np.array([[float(v) for v in parts[2:]] for parts in lines])
    p_ref = tp.Classifier(net, labels).probabilities(X).astype(np.float64)
    assert np.all(np.isfinite(p_c)) and np.all(p_c >= 0) and np.all(p_c <= 1)
    eps = float(np.finfo(np.dtype(dtype)).eps)
    np.testing.assert_allclose(p_c, p_ref, rtol=8 * eps, atol=float(np.finfo(np.dtype(dtype)).tiny))
    module = _import(tp.export_python(net.copy(dtype=np.float64), tmp_path, name="unit", labels=labels))
    results = [module.classify([float(v)]) for v in z]
    assert [index for index, _ in results] == expected.tolist()
    p_ref64 = tp.Classifier(net.copy(dtype=np.float64), labels).probabilities(z[:, None])
    np.testing.assert_allclose(np.array([p for _, p in results]), p_ref64, rtol=8e-16, atol=1e-300)
    assert module.N_CLASSES == 2 and module.N_OUTPUTS == 1


def test_label_strings_cannot_break_out_of_the_c_literal():
    assert c_string('a"b\\c?\n*/') == '"a\\042b\\134c\\077\\012\\052/"'
    assert c_string("°C") == '"\\302\\260C"'
    with pytest.raises(ValueError, match="outputs"):
        tp.export_python(tp.build_mlp([2, 3], seed=0), tempfile.mkdtemp(), labels=("a", "b"))
