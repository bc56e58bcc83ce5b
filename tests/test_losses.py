"""Losses: values against their defining formulas, gradients against scipy's
numerical derivative, and stability of the cross-entropies for extreme logits."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import differentiate, special

import tinyprop as tp
from net_strategies import LOSSES, _targets


def _numerical_gradient(loss, y_hat, y):
    def f(flat):
        cols = flat.reshape(flat.shape[0], -1)
        vals = [loss.value(cols[:, j].reshape(y_hat.shape), y) for j in range(cols.shape[1])]
        return np.asarray(vals).reshape(flat.shape[1:])

    return differentiate.jacobian(f, y_hat.ravel(), initial_step=0.01).df.reshape(y_hat.shape)


@settings(max_examples=60, deadline=None)
@given(st.sampled_from(LOSSES), st.integers(1, 6), st.integers(1, 4), st.integers(0, 2**31))
def test_gradient_matches_scipy(loss, n, n_out, seed):
    rng = np.random.default_rng(seed)
    y_hat = rng.normal(scale=2.0, size=(n, n_out))
    y = _targets(rng, loss, n, n_out)
    if isinstance(loss, tp.HuberError):  # keep differences away from |r| = c
        y_hat += np.where(np.abs(np.abs(y_hat - y) - loss.threshold) < 0.05, 0.2, 0.0)
    np.testing.assert_allclose(loss.gradient(y_hat, y), _numerical_gradient(loss, y_hat, y), rtol=1e-7, atol=1e-9)


def test_values_against_defining_formulas():
    rng = np.random.default_rng(0)
    y_hat, y = rng.normal(size=(5, 3)), rng.normal(size=(5, 3))
    r = y_hat - y
    assert tp.SquaredError().value(y_hat, y) == pytest.approx(0.5 * np.sum(r**2), rel=1e-14)
    assert tp.MeanSquaredError().value(y_hat, y) == pytest.approx(np.sum(r**2) / 5, rel=1e-14)
    c = 0.7
    huber = np.where(np.abs(r) <= c, 0.5 * r**2, c * (np.abs(r) - 0.5 * c))  # Huber (1964)
    assert tp.HuberError(c).value(y_hat, y) == pytest.approx(huber.sum() / 5, rel=1e-14)
    p = rng.uniform(0.05, 0.95, size=(5, 3))
    z = special.logit(p)
    bce = -np.sum(p * np.log(special.expit(z)) + (1 - p) * np.log(1 - special.expit(z))) / 5
    assert tp.CrossEntropyOnSigmoid().value(z, p) == pytest.approx(bce, rel=1e-12)
    weighted = -np.sum(3.0 * p * np.log(special.expit(z)) + 0.5 * (1 - p) * np.log(1 - special.expit(z))) / 5
    assert tp.CrossEntropyOnSigmoid(target_weights=(0.5, 3.0)).value(z, p) == pytest.approx(weighted, rel=1e-12)
    onehot = np.eye(3)[[0, 2, 1, 1, 0]]
    cce = -np.sum(onehot * special.log_softmax(z, axis=1)) / 5  # scipy.special.log_softmax
    assert tp.CrossEntropyOnSoftmax().value(z, onehot) == pytest.approx(cce, rel=1e-12)


def test_one_dimensional_target_for_single_output():
    y_hat = np.array([[1.0], [2.0]])
    assert tp.SquaredError().value(y_hat, np.array([0.0, 0.0])) == 2.5
    assert tp.SquaredError().gradient(y_hat, np.array([0.0, 0.0])).shape == (2, 1)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_cross_entropies_are_finite_for_extreme_logits(dtype):
    z = np.array([[-1e4, 1e4, 0.0], [1e4, -1e4, 50.0]], dtype=dtype)
    y01 = np.array([[1.0, 0.0, 1.0], [0.0, 1.0, 0.0]], dtype=dtype)
    onehot = np.array([[1.0, 0.0, 0.0], [0.0, 0.0, 1.0]], dtype=dtype)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with np.errstate(over="raise", invalid="raise", divide="raise"):
            for loss, y in ((tp.CrossEntropyOnSigmoid(), y01), (tp.CrossEntropyOnSoftmax(), onehot)):
                assert np.isfinite(loss.value(z, y))
                g = loss.gradient(z, y)
                assert g.dtype == dtype and np.all(np.isfinite(g))
    # the sigmoid case: -1e4 logit with target 1 costs 1e4 (softplus(-z) = -z for large -z)
    assert tp.CrossEntropyOnSigmoid().value(np.array([[-1e4]]), np.array([[1.0]])) == pytest.approx(1e4)


def test_softmax_cross_entropy_delta_is_p_minus_y_for_one_hot_rows():
    z = np.array([[0.3, -1.2, 2.0]])
    y = np.array([[0.0, 1.0, 0.0]])
    loss = tp.CrossEntropyOnSoftmax()
    np.testing.assert_allclose(loss.gradient(z, y), loss.probabilities(z) - y, rtol=1e-15)


def test_shape_mismatch_is_refused_with_both_shapes():
    with pytest.raises(ValueError, match=r"\(3, 2\).*\(3,\)"):
        tp.SquaredError().value(np.zeros((3, 2)), np.zeros(3))


def test_sigmoid_target_weights_are_checked_and_kept_in_the_settings():
    assert tp.CrossEntropyOnSigmoid(target_weights=(1, 1)) == tp.CrossEntropyOnSigmoid()
    assert repr(tp.CrossEntropyOnSigmoid((0.5, 2))) == "CrossEntropyOnSigmoid(target_weights=(0.5, 2.0))"
    for bad in ((1.0,), (1.0, 0.0), (1.0, float("nan")), "ab", 3):
        with pytest.raises(ValueError, match="two finite numbers > 0"):
            tp.CrossEntropyOnSigmoid(target_weights=bad)


def test_huber_threshold_must_be_positive():
    with pytest.raises(ValueError, match="threshold"):
        tp.HuberError(0.0)
