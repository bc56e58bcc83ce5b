"""A user-defined activation: verified by check_activation, trained inside a network,
and a deliberately wrong derivative caught by both checks."""

from __future__ import annotations

import numpy as np

import tinyprop as tp


class Softsign(tp.Activation):
    """f(z) = z / (1 + |z|), f'(z) = 1 / (1 + |z|)^2.

    f' has a corner at 0 (f'' jumps from +2 to -2), so 0 is declared a kink:
    the numerical check then differentiates one-sidedly there.
    """

    kinks = (0.0,)

    def value(self, z):
        return z / (1.0 + np.abs(z))

    def derivative(self, z, a):
        return 1.0 / (1.0 + np.abs(z)) ** 2


class WrongSoftsign(Softsign):
    """The same function with a plausible but wrong derivative (missing the square)."""

    def derivative(self, z, a):
        return 1.0 / (1.0 + np.abs(z))


class Swish(tp.Activation):
    """f(z) = z sigmoid(z), f'(z) = s + z s (1 - s) with s = sigmoid(z)."""

    def value(self, z):
        return z * tp.Sigmoid().value(z)

    def derivative(self, z, a):
        s = tp.Sigmoid().value(z)
        return s + z * s * (1.0 - s)


def _data(n=40, seed=0):
    rng = np.random.default_rng(seed)  # synthetic regression data
    X = rng.uniform(-2, 2, size=(n, 2))
    return X, np.sin(X[:, :1]) * X[:, 1:]


def test_custom_activations_pass_check_activation():
    for act in (Softsign(), Swish()):
        report = tp.check_activation(act)
        assert report.passed, str(report)


def test_wrong_derivative_is_caught_by_check_activation():
    report = tp.check_activation(WrongSoftsign())
    assert not report.passed
    assert any("derivative wrong at z" in p for p in report.problems)


def test_wrong_derivative_is_caught_by_check_gradient():
    X, y = _data()
    good = tp.Network([tp.Affine(2, 5), Softsign(), tp.Affine(5, 1)], seed=0)
    bad = tp.Network([tp.Affine(2, 5), WrongSoftsign(), tp.Affine(5, 1)], seed=0)
    assert tp.check_gradient(good, X, y, tp.MeanSquaredError()).passed
    report = tp.check_gradient(bad, X, y, tp.MeanSquaredError())
    assert not report.passed
    assert "FAIL layer 0 weight" in str(report)  # names the array below the wrong unit
    assert {a.name for a in report.failures} >= {"layer 0 weight"}


def test_custom_activation_trains_with_a_correct_gradient():
    X, y = _data()
    net = tp.Network([tp.Affine(2, 8), Swish(), tp.Affine(8, 1)], seed=1)
    loss = tp.MeanSquaredError()
    assert tp.check_gradient(net, X, y, loss).passed
    start = loss.value(net.predict(X), y)
    for _ in range(300):  # plain gradient descent, written out here
        out, trace = net.forward(X)
        grads, _ = net.backward(trace, loss.gradient(out, y), need_input=False)
        for p, g in zip(net.params, grads):
            p -= 0.1 * g
    assert loss.value(net.predict(X), y) < 0.2 * start


def test_check_activation_reports_non_finite_and_upcasting():
    class Exploding(tp.Activation):
        def value(self, z):
            return np.exp(z)

        def derivative(self, z, a):
            return a

    report = tp.check_activation(Exploding())
    assert not report.passed
    assert "floating-point error" in report.problems[0]  # exp(1e4) overflows

    class Upcasting(tp.Activation):
        def value(self, z):
            return np.asarray(z, dtype=np.float64) * 2.0

        def derivative(self, z, a):
            return np.full(np.shape(z), 2.0)

    report = tp.check_activation(Upcasting())
    assert any("float32" in p for p in report.problems)


def test_a_sampled_gradient_check_still_catches_a_wrong_derivative():
    """One parameter from every array is always in the sample, so the arrays below a wrong unit fail."""
    X, y = _data()
    bad = tp.Network([tp.Affine(2, 5), WrongSoftsign(), tp.Affine(5, 1)], seed=0)
    report = tp.check_gradient(bad, X, y, tp.MeanSquaredError(), parameters=4, seed=1)
    assert report.indices.size == 4 and not report.passed
    assert "checked a random sample of 4 of 21 parameters" in str(report)
    assert {a.name for a in report.failures} >= {"layer 0 weight"}
