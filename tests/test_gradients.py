"""Backpropagation against scipy's numerical differentiation, on generated networks.

External reference: scipy.differentiate (Richardson-extrapolated central
differences), through tinyprop.check_gradient; see tinyprop/check.py for the
exact error metric: error = |g - r| / max(|r|, floor),
floor = max(1e-3 * max|r|, 1e-5 * max(1, |E|)).
"""

from __future__ import annotations

import pickle

import numpy as np
import pytest
from hypothesis import assume, given, reject, settings
from hypothesis import strategies as st
from scipy import differentiate

import tinyprop as tp
from net_strategies import networks, training_cases

# float64: the bar from the project's verification policy.
# float32: backprop in float32 carries its own rounding (unit roundoff 6e-8,
# accumulated over sums of up to ~100 terms and up to 6 layers, so ~1e-5..1e-4
# observed); 1e-3 leaves margin while any wrong derivative shows as O(1).
BOUND = {np.dtype(np.float64): 1e-6, np.dtype(np.float32): 1e-3}


@settings(max_examples=80, deadline=None)
@given(training_cases())
def test_backprop_gradient_matches_numerical(case):
    net, X, y, loss = case
    try:
        report = tp.check_gradient(net, X, y, loss)
    except ValueError:
        reject()  # a pre-activation exactly on a ReLU kink: no numerical reference exists
    assume(report.kink_margin >= 1e-4)  # differences too close to a kink are not a reference
    assert report.max_rel_error <= BOUND[net.dtype], str(report)
    assert report.passed


def _numerical_jacobian(f, x):
    return differentiate.jacobian(f, x, initial_step=0.05).df


def _columnwise(net, X):
    """theta (p, ...) -> outputs (n*n_out, ...), for scipy's vectorised jacobian."""

    def f(theta):
        cols = theta.reshape(theta.shape[0], -1)
        out = np.empty((X.shape[0] * net.n_out, cols.shape[1]))
        for j in range(cols.shape[1]):
            net.set_vector(cols[:, j])
            out[:, j] = net.predict(X).ravel()
        return out.reshape((out.shape[0],) + theta.shape[1:])

    return f


SMOOTH = (tp.Sigmoid(), tp.Tanh(), tp.Softplus(), tp.Identity())


@settings(max_examples=25, deadline=None)
@given(networks(max_depth=4, max_width=6, dtype=np.float64, activations=SMOOTH), st.integers(1, 5), st.integers(0, 999))
def test_jacobian_matches_numerical_jacobian(net, n, seed):
    X = np.random.default_rng(seed).normal(size=(n, net.n_in))
    J = net.jacobian(X)
    theta = net.get_vector()
    reference = _numerical_jacobian(_columnwise(net.copy(), X), theta)
    assert J.shape == (n * net.n_out, net.n_params)
    scale = max(1.0, np.abs(reference).max())
    np.testing.assert_allclose(J, reference, rtol=1e-7, atol=1e-8 * scale)


@settings(max_examples=40, deadline=None)
@given(networks(max_depth=5, max_width=8, dtype=np.float64), st.integers(1, 6), st.integers(0, 999))
def test_jacobian_rows_weighted_by_residuals_give_squared_error_gradient(net, n, seed):
    rng = np.random.default_rng(seed)
    X, y = rng.normal(size=(n, net.n_in)), rng.normal(size=(n, net.n_out))
    out, trace = net.forward(X)
    grads, _ = net.backward(trace, tp.SquaredError().gradient(out, y))
    residual = (out - y).ravel()  # row i*n_out + k of J pairs with residual[i, k]
    via_jacobian = net.jacobian(X).T @ residual
    np.testing.assert_allclose(via_jacobian, np.concatenate([g.ravel() for g in grads]), rtol=1e-10, atol=1e-12)


@settings(max_examples=25, deadline=None)
@given(networks(max_depth=4, max_width=6, dtype=np.float64, activations=SMOOTH), st.integers(1, 4), st.integers(0, 999))
def test_input_gradient_matches_numerical(net, n, seed):
    X = np.random.default_rng(seed).normal(size=(n, net.n_in))
    G = net.input_gradient(X)
    assert G.shape == (n, net.n_out, net.n_in)
    for i in range(n):
        def f(x):
            cols = x.reshape(x.shape[0], -1)
            out = np.stack([net.predict(cols[:, j][None, :])[0] for j in range(cols.shape[1])], axis=1)
            return out.reshape((net.n_out,) + x.shape[1:])

        reference = _numerical_jacobian(f, X[i])
        np.testing.assert_allclose(G[i], reference, rtol=1e-7, atol=1e-9)


@settings(max_examples=30, deadline=None)
@given(networks(max_depth=5, max_width=8), st.integers(1, 6), st.integers(0, 999))
def test_backward_input_delta_is_the_output_weighted_input_gradient(net, n, seed):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, net.n_in))
    d_out = rng.normal(size=(n, net.n_out)).astype(net.dtype)
    _, trace = net.forward(X)
    _, d_input = net.backward(trace, d_out)
    expected = np.einsum("ik,ikj->ij", d_out, net.input_gradient(X))
    tol = 1e-10 if net.dtype == np.float64 else 1e-4
    np.testing.assert_allclose(d_input, expected, rtol=tol, atol=tol)


@settings(max_examples=30, deadline=None)
@given(networks(max_depth=4, max_width=6), st.integers(1, 5), st.integers(0, 999))
def test_float32_stays_float32_throughout(net, n, seed):
    X = np.random.default_rng(seed).normal(size=(n, net.n_in))  # float64 in, converted once
    out, trace = net.forward(X)
    grads, d_input = net.backward(trace, np.ones_like(out))
    arrays = [*trace.values, *grads, d_input, *net.params, net.jacobian(X), net.input_gradient(X)]
    assert {a.dtype for a in arrays} == {net.dtype}


def test_backward_without_input_delta_gives_the_same_parameter_gradients():
    net = tp.build_mlp([3, 4, 2], seed=3)
    X = np.random.default_rng(0).normal(size=(5, 3))
    out, trace = net.forward(X)
    with_input, d_input = net.backward(trace, out)
    without, none = net.backward(trace, out, need_input=False)
    assert none is None and d_input.shape == (5, 3)
    for a, b in zip(with_input, without):
        np.testing.assert_array_equal(a, b)


def test_vector_round_trip_keeps_the_live_arrays():
    net = tp.build_mlp([3, 4, 2], seed=1)
    ids = [id(p) for p in net.params]
    theta = np.arange(net.n_params, dtype=float)
    net.set_vector(theta)
    np.testing.assert_array_equal(net.get_vector(), theta)
    assert [id(p) for p in net.params] == ids
    assert net.layers[0].weight[1, 0] == 3.0  # row-major: weight (4, 3) fills first


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_same_seed_same_weights(dtype):
    a = tp.build_mlp([5, 7, 3], seed=42, dtype=dtype)
    b = tp.build_mlp([5, 7, 3], seed=42, dtype=dtype)
    c = tp.build_mlp([5, 7, 3], seed=43, dtype=dtype)
    assert np.array_equal(a.get_vector(), b.get_vector())
    assert not np.array_equal(a.get_vector(), c.get_vector())


@settings(max_examples=60, deadline=None)
@given(training_cases(), st.integers(0, 3))
def test_workspace_passes_equal_the_allocating_passes(case, spare_rows):
    """The in-place workspace path (training) computes what the plain path computes."""
    net, X, y, loss = case
    out, trace = net.forward(X)
    grads, d_input = net.backward(trace, loss.gradient(out, y))
    work = net.workspace(X.shape[0] + spare_rows)
    for _ in range(2):  # a second step reuses the same arrays
        out_w, trace_w = net.forward(X, workspace=work)
        np.testing.assert_array_equal(out_w, out)
        d_out = loss.gradient(out_w, y)
        d_out_before = d_out.copy()
        grads_w, d_input_w = net.backward(trace_w, d_out)
        np.testing.assert_array_equal(d_out, d_out_before)  # the caller's d_out is never overwritten
        tol = 1e-12 if net.dtype == np.float64 else 1e-5
        for g, g_w in zip(grads, grads_w):
            np.testing.assert_allclose(g_w, g, rtol=tol, atol=tol * max(1.0, np.abs(g).max()))
        np.testing.assert_allclose(d_input_w, d_input, rtol=tol, atol=tol * max(1.0, np.abs(d_input).max()))
    assert all(a is b for a, b in zip(grads_w, work.grads))


def test_workspace_trace_serves_one_backward_and_is_invalidated_by_the_next_forward():
    net = tp.build_mlp([3, 5, 1], seed=0)
    work = net.workspace(4)
    X = np.ones((4, 3))
    out, trace = net.forward(X, workspace=work)
    net.backward(trace, out)
    with pytest.raises(ValueError, match="run forward"):
        net.backward(trace, out)
    out, old = net.forward(X, workspace=work)
    net.forward(X, workspace=work)
    with pytest.raises(ValueError, match="overwritten"):
        net.backward(old, out)
    with pytest.raises(ValueError, match="at most 4"):
        net.forward(np.ones((5, 3)), workspace=work)
    with pytest.raises(TypeError, match="this network"):
        tp.build_mlp([3, 5, 1]).forward(X, workspace=work)


@pytest.mark.parametrize("hidden", [tp.Tanh(), tp.Sigmoid(), tp.ReLU(), tp.LeakyReLU(0.1), tp.Softplus(),
                                    tp.Identity()], ids=repr)
@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_workspace_row_blocks_cover_large_batches(hidden, dtype):
    """A batch spanning many ~256 KiB row blocks gives the plain path's gradients."""
    net = tp.build_mlp([5, 96, 64, 2], activation=hidden, seed=1, dtype=dtype)
    X = np.random.default_rng(2).normal(size=(2500, 5))
    work = net.workspace(2500)
    assert len(work.row_blocks(2500, 96)) > 3
    out, trace = net.forward(X)
    grads, _ = net.backward(trace, out)
    out_w, trace_w = net.forward(X, workspace=work)
    grads_w, _ = net.backward(trace_w, out_w)
    tol = 1e-12 if dtype == np.float64 else 1e-5
    for g, g_w in zip(grads, grads_w):
        np.testing.assert_allclose(g_w, g, rtol=tol, atol=tol * np.abs(g).max())


def test_params_are_views_of_the_flat_vector_and_relink_after_assignment():
    net = tp.build_mlp([3, 4, 2], seed=1)
    vector = net.vector
    assert all(p.base is vector for p in net.params)
    vector[0] = 7.0
    assert net.layers[0].weight[0, 0] == 7.0
    net.layers[2].weight = np.full((2, 4), 0.5)  # replaced by assignment, not in place
    np.testing.assert_array_equal(net.get_vector()[-10:-2], 0.5)
    assert all(p.base is net.vector for p in net.params)
    work = net.workspace(5)
    assert all(g.base is work.grad_vector for g in work.grads)
    opt = tp.SGD(0.1)
    before = net.get_vector()
    out, trace = net.forward(np.ones((5, 3)), workspace=work)
    grads, _ = net.backward(trace, out, need_input=False)
    opt.update([net.vector], [work.grad_vector])  # one update of every array
    np.testing.assert_allclose(net.get_vector(), before - 0.1 * np.concatenate([g.ravel() for g in grads]), rtol=1e-15)


@pytest.mark.parametrize("hidden", [tp.Tanh(), tp.ReLU()], ids=repr)
@pytest.mark.parametrize("with_workspace", [False, True])
def test_a_pickled_network_backpropagates_like_the_original(hidden, with_workspace):
    """Process pools (tp.sweep) move networks by pickle; the copy must run the same passes."""
    net = tp.build_mlp([3, 6, 5, 2], activation=hidden, seed=3)
    X = np.random.default_rng(4).normal(size=(7, 3))
    results = []
    for network in (net, pickle.loads(pickle.dumps(net))):
        work = network.workspace(7) if with_workspace else None
        out, trace = network.forward(X, workspace=work)
        grads, _ = network.backward(trace, out, need_input=False)
        results.append((out.copy(), [g.copy() for g in grads], network.predict(X)))
    (out, grads, predicted), (out_copy, grads_copy, predicted_copy) = results
    assert np.array_equal(out, out_copy) and np.array_equal(predicted, predicted_copy)
    assert all(np.array_equal(g, g_copy) for g, g_copy in zip(grads, grads_copy))


def test_a_residual_near_the_huber_threshold_shortens_only_its_own_rows_steps():
    """One residual 3e-5 from |r| = c: the check still reaches 1e-6 (a batch-wide short step gave 1.4e-5)."""
    net = tp.build_mlp([3, 6, 4], seed=5)
    X = np.random.default_rng(6).normal(size=(6, 3))
    loss = tp.HuberError(0.5)
    out = net.predict(X)
    y = out - np.random.default_rng(7).uniform(-1.5, 1.5, size=out.shape)
    y[2, 1] = out[2, 1] - (0.5 + 3e-5)  # this residual sits 3e-5 beyond the threshold
    report = tp.check_gradient(net, X, y, loss)
    assert report.kink_margin == pytest.approx(3e-5, rel=1e-6)
    assert report.max_rel_error <= 1e-6, str(report)


@settings(max_examples=15, deadline=None)
@given(training_cases(dtype=np.float64), st.integers(0, 10**6))
def test_a_sampled_check_equals_the_full_check_at_the_sampled_parameters(case, seed):
    """``parameters=k``: k distinct positions, one in every array, and the full check's numbers there."""
    net, X, y, loss = case
    k = len(net.params) + (net.n_params - len(net.params)) // 2
    try:
        full = tp.check_gradient(net, X, y, loss)
    except ValueError:
        reject()  # a pre-activation exactly on a kink
    part = tp.check_gradient(net, X, y, loss, parameters=k, seed=seed)
    assert part.indices.size == min(k, net.n_params) and np.all(np.diff(part.indices) > 0)
    starts = np.cumsum([0] + [p.size for p in net.params])
    assert all(np.any((part.indices >= lo) & (part.indices < hi)) for lo, hi in zip(starts[:-1], starts[1:]))
    np.testing.assert_array_equal(part.analytic, full.analytic[part.indices])
    np.testing.assert_allclose(part.numerical, full.numerical[part.indices], rtol=1e-9,
                               atol=1e-12 * np.abs(full.numerical).max())
    again = tp.check_gradient(net, X, y, loss, parameters=k, seed=seed)
    np.testing.assert_array_equal(again.indices, part.indices)
