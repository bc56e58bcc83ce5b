"""Bad input to the core (Network, forward/backward, vectors, checks): clear errors,
nothing the caller passed is modified."""

from __future__ import annotations

import numpy as np
import pytest

import tinyprop as tp


@pytest.fixture
def net():
    return tp.build_mlp([3, 4, 2], seed=0)


@pytest.mark.parametrize(
    "X, error, words",
    [
        (np.zeros((5, 4)), ValueError, r"shape \(n_samples, 3\), got shape \(5, 4\)"),
        (np.zeros(3), ValueError, r"reshape\(1, -1\)"),
        (np.zeros((0, 3)), ValueError, "empty"),
        (np.array([["a", "b", "c"]]), TypeError, "real numbers.*<U1"),
        (np.array([[1 + 2j, 0, 0]]), TypeError, "complex128"),
        (np.array([[0.0, 1.0, 2.0], [0.0, np.nan, 1.0]]), ValueError, r"non-finite value \(nan\) at row 1, column 1"),
        (np.array([[0.0, np.inf, 2.0]]), ValueError, r"\(inf\) at row 0"),
        ([[1.0, 2.0], [3.0]], TypeError, "could not convert"),
    ],
)
def test_predict_refuses_bad_X(net, X, error, words):
    with pytest.raises(error, match=words):
        net.predict(X)


def test_float32_overflow_on_conversion_is_reported(net):
    net32 = net.copy(np.float32)
    with pytest.raises(ValueError, match="after conversion from float64 to float32"):
        net32.predict(np.array([[1e39, 0.0, 0.0]]))


def test_backward_refuses_wrong_d_out_and_foreign_trace(net):
    out, trace = net.forward(np.ones((2, 3)))
    with pytest.raises(ValueError, match=r"output's shape \(2, 2\), got shape \(2, 3\)"):
        net.backward(trace, np.ones((2, 3)))
    other = tp.build_mlp([3, 5, 5, 2], seed=0)
    _, foreign = other.forward(np.ones((2, 3)))
    with pytest.raises(TypeError, match="Trace returned by this network"):
        net.backward(foreign, out)


def test_set_vector_refuses_wrong_length_and_nan(net):
    before = net.get_vector()
    with pytest.raises(ValueError, match=rf"shape \({net.n_params},\), got shape \(3,\)"):
        net.set_vector(np.zeros(3))
    bad = np.zeros(net.n_params)
    bad[4] = np.nan
    with pytest.raises(ValueError, match="entry 4"):
        net.set_vector(bad)
    np.testing.assert_array_equal(net.get_vector(), before)


def test_layer_widths_must_chain():
    with pytest.raises(ValueError, match=r"layer 2 .*expects 5 inputs but the layer before it produces 4"):
        tp.Network([tp.Affine(3, 4), tp.Tanh(), tp.Affine(5, 1)])
    with pytest.raises(TypeError, match="layer 1 is a str"):
        tp.Network([tp.Affine(3, 4), "tanh"])
    with pytest.raises(ValueError, match="at least one Affine"):
        tp.Network([tp.Tanh()])
    with pytest.raises(ValueError, match="at least one layer"):
        tp.Network([])


def test_bad_constructor_arguments():
    with pytest.raises(TypeError, match="float32 or float64"):
        tp.Network([tp.Affine(1, 1)], dtype=np.int32)
    with pytest.raises(ValueError, match="init must be one of"):
        tp.Network([tp.Affine(1, 1)], init="xavier-ish")
    with pytest.raises(ValueError, match="n_out must be a positive integer, got 0"):
        tp.Affine(3, 0)
    with pytest.raises(TypeError, match="n_in must be a positive integer"):
        tp.Affine(2.5, 1)
    with pytest.raises(ValueError, match=r"sizes needs at least \[n_in, n_out\]"):
        tp.build_mlp([3])


def test_check_gradient_refuses_mismatched_samples(net):
    with pytest.raises(ValueError, match=r"y must have shape \(4, 2\).*got shape \(3, 2\)"):
        tp.check_gradient(net, np.zeros((4, 3)), np.zeros((3, 2)), tp.SquaredError())
    with pytest.raises(TypeError, match="loss must be a tinyprop Loss"):
        tp.check_gradient(net, np.zeros((4, 3)), np.zeros((4, 2)), "mse")


def test_nothing_passed_in_is_modified(net):
    X = np.random.default_rng(0).normal(size=(6, 3))
    y = np.random.default_rng(1).normal(size=(6, 2))
    X_before, y_before, theta_before = X.copy(), y.copy(), net.get_vector()
    X.setflags(write=False)  # a read-only array must be accepted and left alone
    out, trace = net.forward(X)
    net.backward(trace, tp.SquaredError().gradient(out, y))
    net.jacobian(X)
    net.input_gradient(X)
    tp.check_gradient(net, X, y, tp.SquaredError())
    np.testing.assert_array_equal(X, X_before)
    np.testing.assert_array_equal(y, y_before)
    np.testing.assert_array_equal(net.get_vector(), theta_before)


def test_integer_inputs_are_converted_once_to_the_network_dtype(net):
    out = net.predict(np.array([[1, 2, 3]]))
    assert out.dtype == np.float64
    np.testing.assert_array_equal(out, net.predict(np.array([[1.0, 2.0, 3.0]])))


@pytest.mark.parametrize("dtype, big", [(np.float64, 1e200), (np.float32, 1e30)])
def test_finite_inputs_whose_squares_overflow_are_accepted_as_they_are(dtype, big):
    """The quick input check (a sum of squares) overflows here; the exact check accepts the batch, silently."""
    X = np.array([[big, -big, 0.5], [0.0, 1.0, -2.0]], dtype=dtype)  # C-contiguous, the network's dtype
    net = tp.build_mlp([3, 4, 2], seed=0, dtype=dtype)
    with np.errstate(all="raise"):  # no numpy warning may come from the check
        out, trace = net.forward(X)
    assert trace.values[0] is X
    np.testing.assert_array_equal(out, net.predict(X))


@pytest.mark.parametrize("order", ["C", "F"])
def test_a_nan_in_a_batch_of_the_right_dtype_and_shape_is_refused(net, order):
    X = np.asarray(np.arange(12.0).reshape(4, 3), order=order)
    X[2, 1] = np.nan
    with pytest.raises(ValueError, match=r"non-finite value \(nan\) at row 2, column 1"):
        net.forward(X)
