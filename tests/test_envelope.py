"""The operating envelope (tinyprop.envelope): construction, widening, checks, metadata round trip, recipes.

Data are synthetic (hypothesis-generated or small hand-made rows); the distances in the
check report are compared with values worked out by hand beside each test.
"""

from __future__ import annotations

import json
import math
import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

import tinyprop as tp
from tinyprop.envelope import InputOutside

finite = st.floats(min_value=-1e6, max_value=1e6, allow_nan=False, allow_infinity=False)


@st.composite
def data_rows(draw: st.DrawFn) -> np.ndarray:
    n_rows = draw(st.integers(1, 12))
    n_in = draw(st.integers(1, 5))
    return draw(arrays(np.float64, (n_rows, n_in), elements=finite))


# ----------------------------------------------------------------------------- properties
@settings(max_examples=60, deadline=None)
@given(data_rows())
def test_the_envelope_of_rows_contains_every_row_and_touches_each_limit(X):
    env = tp.Envelope.of_rows(X)
    assert env.contains(X) and env.check(X).inside and not env.check(X).outside_rows.any()
    assert np.array_equal(env.low, X.min(axis=0)) and np.array_equal(env.high, X.max(axis=0))
    assert env.source == "training data" and env.n_in == X.shape[1]


@settings(max_examples=60, deadline=None)
@given(data_rows(), st.floats(min_value=0.0, max_value=10.0))
def test_a_widened_envelope_contains_the_original_and_grows_by_the_stated_rule(X, fraction):
    env = tp.Envelope.of_rows(X)
    wide = env.widened(fraction)
    assert np.all(wide.low <= env.low) and np.all(wide.high >= env.high)
    assert wide.contains(np.vstack([env.low, env.high, X]))
    grow = fraction * np.where(env.width > 0, env.width, np.maximum(np.abs(env.low), 1.0))
    assert np.array_equal(wide.low, env.low - grow) and np.array_equal(wide.high, env.high + grow)


@settings(max_examples=60, deadline=None)
@given(data_rows(), st.booleans(), st.text(min_size=1, max_size=20))
def test_the_metadata_round_trip_through_json_and_a_model_file_is_exact(X, named, source):
    names = [f"input {j} \u00b0C" for j in range(X.shape[1])] if named else None
    env = tp.Envelope.of_rows(X, names=names, source=source).widened(0.37)
    stored = json.loads(json.dumps(env.to_metadata()))
    assert tp.Envelope.from_metadata(stored) == env
    net = tp.Network([tp.Affine(X.shape[1], 1)], seed=0)
    arrays_, manifest = tp.model_parts(net, {"data": "synthetic", **env.to_metadata()})
    back = tp.Envelope.from_metadata(tp.model_from_parts(arrays_, manifest).metadata, n_in=X.shape[1])
    assert back == env and back.low.tobytes() == env.low.tobytes() and back.high.tobytes() == env.high.tobytes()


@settings(max_examples=60, deadline=None)
@given(data_rows(), data_rows())
def test_the_check_counts_exactly_the_values_beyond_a_limit(X, Y):
    if X.shape[1] != Y.shape[1]:
        Y = np.resize(Y, (Y.shape[0], X.shape[1]))
    env = tp.Envelope.of_rows(X)
    result = env.check(Y)
    below, above = Y < env.low, Y > env.high
    assert np.array_equal(result.outside_rows, (below | above).any(axis=1))
    assert [entry.index for entry in result.inputs] == list(np.flatnonzero((below | above).any(axis=0)))
    for entry in result.inputs:
        j = entry.index
        distance = np.maximum(np.maximum(env.low[j] - Y[:, j], Y[:, j] - env.high[j]), 0.0)
        assert entry.rows == int((below | above)[:, j].sum()) and entry.largest == distance.max() > 0


# ----------------------------------------------------------------------------- examples
def test_the_report_names_each_input_its_rows_and_distances_in_units_and_widths():
    # synthetic: a heater's inlet temperature 10..30 degC and flow 0..2 l/s
    env = tp.Envelope([10.0, 0.0], [30.0, 2.0], names=["inlet", "flow"], source="training data")
    X = np.array([[20.0, 1.0], [5.0, 1.0], [35.0, 2.5], [31.0, 1.0]])
    result = env.check(X)
    # by hand: inlet is outside on rows 1, 2, 3 (5 < 10, 35 > 30, 31 > 30), worst 5 degC = 0.25 of 20;
    # flow is outside on row 2 only (2.5 > 2), by 0.5 l/s = 0.25 of 2
    assert result.inputs == (InputOutside(0, "inlet", 3, 5.0, 0.25, 5.0, 35.0),
                             InputOutside(1, "flow", 1, 0.5, 0.25, 1.0, 2.5))
    assert result.outside_rows.tolist() == [False, True, True, True]
    lines = result.lines(["degC", "l/s"])
    assert lines[0].startswith("input 'inlet': 3 of 4 rows outside the envelope [10, 30] degC, up to 5 degC beyond "
                               "(0.25 of its width")
    assert lines[1].startswith("input 'flow': 1 of 4 rows outside the envelope [0, 2] l/s, up to 0.5 l/s beyond")
    assert str(result).startswith("3 of 4 rows outside the envelope (training data):")
    assert str(env.check(X[:1])) == "all 1 row inside the envelope (training data)"


def test_the_limits_themselves_are_inside_and_nan_is_refused():
    env = tp.Envelope([0.0, -1.0], [1.0, 1.0])
    assert env.contains([[0.0, -1.0], [1.0, 1.0]])
    assert not env.contains([np.nextafter(0.0, -1.0), 0.0])
    with pytest.raises(ValueError, match="non-finite value"):
        env.check([[np.nan, 0.0]])


def test_a_zero_width_input_grows_by_the_larger_of_its_magnitude_and_one():
    env = tp.Envelope.of_rows([[5.0, 0.2, -300.0], [5.0, 0.2, -300.0]])
    wide = env.widened(0.1)
    assert wide.low.tolist() == [5.0 - 0.5, 0.2 - 0.1, -300.0 - 30.0]
    assert wide.high.tolist() == [5.0 + 0.5, 0.2 + 0.1, -300.0 + 30.0]
    assert "widened by 0.1" in wide.source and env.widened(0.0) == env
    zero = env.check([[6.0, 0.2, -300.0]])
    assert zero.inputs[0].largest == 1.0 and math.isinf(zero.inputs[0].largest_in_widths)
    assert "its range has zero width" in zero.lines()[0]


def test_one_input_is_set_by_index_or_name_and_the_source_says_so():
    env = tp.Envelope.of_rows([[1.0, 2.0], [3.0, 4.0]], names=["a", "b"])
    by_name, by_index = env.with_limits("b", -1.0, 9.0), env.with_limits(1, -1.0, 9.0)
    assert by_name == by_index and by_name.low.tolist() == [1.0, -1.0] and by_name.high.tolist() == [3.0, 9.0]
    assert by_name.source == "training data; b set by user"
    with pytest.raises(ValueError, match="no input named 'c'"):
        env.with_limits("c", 0.0, 1.0)
    with pytest.raises(ValueError, match="input index must be in 0 .. 1, got 2"):
        env.with_limits(2, 0.0, 1.0)
    with pytest.raises(ValueError, match="low must not exceed high; input 0"):
        env.with_limits(0, 5.0, 4.0)


@pytest.mark.parametrize("low, high, names, message", [
    ([1.0, 2.0], [0.0, 3.0], None, r"low must not exceed high; input 0 has low 1.0 > high 0.0"),
    ([0.0, 0.0], [1.0], None, "one entry per input each, got 2 and 1"),
    ([[0.0]], [[1.0]], None, "low must be 1-D"),
    ([0.0, np.inf], [1.0, np.inf], None, "non-finite value"),
    ([0.0], [1.0], ["a", "b"], r"names must hold one string per input \(1\)"),
    ([], [], None, "empty"),
])
def test_malformed_limits_are_refused_with_what_was_expected(low, high, names, message):
    with pytest.raises(ValueError, match=message):
        tp.Envelope(low, high, names)


def test_the_callers_arrays_are_copied_and_the_limits_are_read_only():
    low, high = np.array([0.0, 1.0]), np.array([2.0, 3.0])
    env = tp.Envelope(low, high)
    low[0] = 99.0
    assert env.low[0] == 0.0
    with pytest.raises(ValueError, match="read-only"):
        env.high[0] = 5.0
    X = np.array([[1.0, 4.0]])
    before = X.copy()
    env.check(X)
    assert np.array_equal(X, before)


@pytest.mark.parametrize("entry, message", [
    ([0.0, 1.0], "metadata\\['envelope'\\] must be an object .* found list"),
    ({"low": [0.0], "high": [1.0]}, r"found keys \['high', 'low'\] \(missing \['source'\]\)"),
    ({"low": [0.0], "high": [1.0], "source": "s", "lo": 1}, r"\(unknown \['lo'\]\)"),
    ({"low": [0.0, "1"], "high": [1.0, 2.0], "source": "s"}, r"\['low'\] must be a non-empty list of finite numbers, "
                                                              r"found \[0.0, '1'\]"),
    ({"low": [], "high": [], "source": "s"}, r"\['low'\] must be a non-empty list"),
    ({"low": [True], "high": [1.0], "source": "s"}, r"\['low'\] must be a non-empty list"),
    ({"low": [0.0], "high": [1.0, 2.0], "source": "s"}, "as many 'low' as 'high' limits, found 1 and 2"),
    ({"low": [2.0], "high": [1.0], "source": "s"}, "not a valid envelope: low must not exceed high"),
    ({"low": [0.0], "high": [1.0], "source": ""}, r"\['source'\] must be a non-empty text, found ''"),
    ({"low": [0.0], "high": [1.0], "source": "s", "names": "a"}, r"\['names'\] must be a list of texts"),
    ({"low": [0.0], "high": [1.0], "source": "s", "names": ["a", "b"]}, "not a valid envelope: names must hold"),
])
def test_a_malformed_stored_envelope_raises_envelope_error_saying_what_was_found(entry, message):
    with pytest.raises(tp.EnvelopeError, match=message):
        tp.Envelope.from_metadata({"description": "synthetic", "envelope": entry})


def test_from_metadata_without_an_envelope_gives_none_and_checks_the_input_count():
    assert tp.Envelope.from_metadata({"description": "no envelope"}) is None
    stored = tp.Envelope([0.0], [1.0]).to_metadata()
    with pytest.raises(tp.EnvelopeError, match="each of the model's 2 inputs, found 1"):
        tp.Envelope.from_metadata(stored, n_in=2)
    with pytest.raises(TypeError, match="metadata must be a dict, got list"):
        tp.Envelope.from_metadata([])  # type: ignore[arg-type]


def test_warn_outside_issues_one_warning_naming_the_inputs_and_nothing_when_inside():
    env = tp.Envelope([0.0, 0.0], [1.0, 1.0], names=["p", "q"])
    with pytest.warns(tp.OutsideEnvelope, match=r"input 'q': 1 of 2 rows outside the envelope \[0, 1\] bar"):
        result = env.warn_outside([[0.5, 0.5], [0.5, 3.0]], units=["", "bar"])
    assert [entry.name for entry in result.inputs] == ["q"]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert env.warn_outside([[0.5, 0.5]]).inside


# ----------------------------------------------------------------------------- recipes
def test_the_regression_recipe_records_the_envelope_of_its_rows_and_puts_it_in_metadata():
    rng = np.random.default_rng(3)
    X = rng.uniform([0.0, 10.0], [1.0, 20.0], size=(30, 2))  # synthetic
    y = np.sin(3 * X[:, 0]) + 0.1 * X[:, 1]
    X_before = X.copy()
    _, result = tp.fit_tabular_regression(X, y, hidden=2, method="evidence-lm")
    assert result.envelope == tp.Envelope.of_rows(X_before) and np.array_equal(X, X_before)
    assert tp.Envelope.from_metadata(result.metadata()) == result.envelope


def test_the_classification_recipe_records_the_envelope_of_its_rows_and_puts_it_in_metadata():
    rng = np.random.default_rng(4)
    X = rng.normal(size=(24, 3))  # synthetic
    labels = np.where(X[:, 0] > 0, "on", "off")
    fitted = tp.fit_tabular_classification(X, labels, hidden=3, penalty=1e-3, epochs=2)
    assert fitted.envelope == tp.Envelope.of_rows(X)
    metadata = fitted.metadata()
    assert tp.Envelope.from_metadata(metadata) == fitted.envelope
    assert {key: metadata[key] for key in fitted.classifier.metadata()} == fitted.classifier.metadata()


def test_extreme_limits_give_an_infinite_width_and_a_clear_refusal_to_widen_beyond_float64():
    env = tp.Envelope([-1e308], [1e308])
    assert env.width.tolist() == [math.inf] and env.contains([[0.0]])
    with pytest.raises(ValueError, match="widening by 0.5 of each width leaves the float64 range"):
        env.widened(0.5)
    far = tp.Envelope([-1e308], [-1e308 + 1e292]).check([[1e308]])
    assert far.inputs[0].largest == math.inf
