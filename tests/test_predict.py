"""``Network.predict`` on large inputs: evaluated in row blocks, same outputs as one pass."""

from __future__ import annotations

import tracemalloc

import numpy as np
import pytest

import tinyprop as tp


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_large_predict_runs_in_row_blocks_with_bounded_memory(dtype):
    """Above 4096 rows, predict evaluates blocks: the forward pass's outputs, a fraction of its memory."""
    net = tp.build_mlp([3, 256, 256, 2], seed=4, dtype=dtype)
    X = np.random.default_rng(5).normal(size=(20000, 3)).astype(dtype)
    out, _ = net.forward(X)  # the whole batch at once, every hidden layer kept
    tracemalloc.start()
    try:
        blocked = net.predict(X)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    tol = 1e-12 if dtype == np.float64 else 1e-5
    np.testing.assert_allclose(blocked, out, rtol=tol, atol=tol * np.abs(out).max())
    one_hidden_layer = 20000 * 256 * np.dtype(dtype).itemsize
    assert peak < one_hidden_layer / 2
