"""Fixed scalings at the edges of float64: tiny scales, huge columns (issue 14 items 5 and 10). Synthetic data."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest

import tinyprop as tp


@pytest.mark.parametrize("layer", [tp.Standardize, tp.Unstandardize])
def test_a_scale_whose_inverse_overflows_is_refused(layer):
    with pytest.raises(ValueError, match=r"scale must be at least .* got 1e-310 at column 0"):
        layer([0.0], [1e-310])


def test_a_constant_column_still_gets_scale_one():
    layer = tp.Standardize.from_data(np.array([[5.0, 1.0], [5.0, 2.0]]))
    assert layer.scale[0] == 1.0


@pytest.mark.parametrize("values", [[1e308, -1e308, 1e308, -1e308], [1e200, 3e200, 2e200, 1.5e200], [1.7e308] * 4])
def test_huge_finite_columns_are_standardised_without_overflow(values):
    data = np.array(values).reshape(-1, 1)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no RuntimeWarning may leak
        layer = tp.Standardize.from_data(data)
        out = layer.value(data)
    assert np.isfinite(layer.mean).all() and np.isfinite(layer.scale).all() and np.isfinite(out).all()
    # mean and population standard deviation of the column, computed exactly with Python's fractions
    from fractions import Fraction
    exact = [Fraction(v) for v in values]
    mean = sum(exact) / len(exact)
    variance = sum((v - mean) ** 2 for v in exact) / len(exact)
    assert layer.mean[0] == pytest.approx(float(mean), rel=1e-12, abs=1e-12 * max(map(abs, values)))
    expected_scale = float(math.isqrt(int(variance))) if variance else 1.0
    assert layer.scale[0] == pytest.approx(expected_scale, rel=1e-12)


@pytest.mark.parametrize("dtype,size", [(np.float64, 1e200), (np.float32, 1e30)])
def test_divergence_from_overflowing_targets_says_so(dtype, size):
    # issue 14 item 15: the message names the targets, not the learning rate
    rng = np.random.default_rng(0)  # synthetic
    X = rng.normal(size=(16, 2))
    y = (X[:, :1] + X[:, 1:]) * size
    net = tp.Network([tp.Affine(2, 3), tp.Tanh(), tp.Affine(3, 1), tp.Unstandardize.from_data(y)], seed=0, dtype=dtype)
    with pytest.raises(tp.TrainingDiverged) as caught:
        tp.train(net, X, y, loss=tp.MeanSquaredError(), optimizer=tp.Adam(1e-3), epochs=2, batch_size=8)
    message = str(caught.value)
    assert "targets are too large for the loss" in message and "Lower the learning rate" not in message
