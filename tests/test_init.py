"""Weight initialisation: limits and variances from the papers' formulas."""

from __future__ import annotations

import math

import numpy as np
import pytest

import tinyprop as tp


@pytest.mark.parametrize(
    "hidden, limit",
    [
        # Glorot & Bengio (2010), eq. 16: U(-sqrt(6/(n_in+n_out)), +...)
        (tp.Tanh(), lambda n_in, n_out: math.sqrt(6 / (n_in + n_out))),
        # He et al. (2015): variance 2/n_in, i.e. U(-sqrt(6/n_in), +...)
        (tp.ReLU(), lambda n_in, n_out: math.sqrt(6 / n_in)),
    ],
)
def test_limits_and_variance(hidden, limit):
    net = tp.build_mlp([400, 300, 1], activation=hidden, seed=0)
    w = net.layers[0].weight
    r = limit(400, 300)
    assert np.abs(w).max() <= r
    assert np.abs(w).max() > 0.99 * r
    assert w.var() == pytest.approx(r * r / 3, rel=0.02)  # variance of U(-r, r) is r^2/3
    assert np.all(net.layers[0].bias == 0)


def test_init_none_keeps_weights():
    layer = tp.Affine(2, 1)
    layer.weight[:] = [[1.5, -2.0]]
    net = tp.Network([layer], init=None)
    np.testing.assert_array_equal(net.layers[0].weight, [[1.5, -2.0]])
