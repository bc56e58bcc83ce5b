"""The blocked Levenberg-Marquardt engine and its normal equations.

External references: scipy.differentiate (numerical gradient of the
regularised objective), NIST StRD certified values (the engine on the shipped
nonlinear-regression problems; machinery in test_solve_nist.py), MINPACK via
scipy.optimize.least_squares (same minimum on a synthetic problem). Data other
than NIST's are synthetic.
"""

from __future__ import annotations

import tracemalloc

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import tinyprop as tp
from net_strategies import networks
from test_solve_nist import PROBLEMS, build, lre, parameters
from tinyprop import evidence
from tinyprop.datasets import load_nist
from tinyprop.normal_equations import accumulate, rows_per_block
from tinyprop.solve import solve

SMOOTH = (tp.Tanh(), tp.Sigmoid(), tp.Softplus(), tp.Identity())


@settings(max_examples=25, deadline=None)
@given(networks(max_depth=3, max_width=5, dtype=np.float64, activations=SMOOTH), st.integers(1, 30),
       st.integers(1, 7), st.integers(0, 2**32 - 1))
def test_blocks_sum_to_the_whole_jacobian_products(net, n, block, seed):
    # A_k = J_k^T J_k, b_k = J_k^T r_k, E_k = r_k^T r_k / 2 from the whole Jacobian (synthetic data)
    rng = np.random.default_rng(seed)
    X, Y = rng.normal(size=(n, net.n_in)), rng.normal(size=(n, net.n_out))
    normal = accumulate(net, X, Y, block)
    J = net.jacobian(X).reshape(n, net.n_out, net.n_params)
    r = net.predict(X) - Y
    for k in range(net.n_out):
        np.testing.assert_allclose(normal.matrices[k], J[:, k].T @ J[:, k], rtol=1e-10, atol=1e-10)
        np.testing.assert_allclose(normal.gradients[k], J[:, k].T @ r[:, k], rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(normal.half_squares, 0.5 * (r**2).sum(axis=0), rtol=1e-12)
    assert normal.n_rows == n


@settings(max_examples=25, deadline=None)
@given(networks(max_depth=3, max_width=5, dtype=np.float64, activations=SMOOTH), st.integers(1, 12),
       st.integers(0, 2**32 - 1))
def test_gradient_of_the_regularised_objective_matches_scipy_differentiate(net, n, seed):
    # g = sum_k beta_k J_k^T r_k + alpha theta is the gradient of
    # F = sum_k beta_k E_k + alpha/2 ||theta||^2; reference: scipy.differentiate.jacobian
    from scipy import differentiate

    rng = np.random.default_rng(seed)
    X, Y = rng.normal(size=(n, net.n_in)), rng.normal(size=(n, net.n_out))
    hyper = evidence.Hyperparameters(
        alpha=float(rng.uniform(0.01, 3.0)), beta=rng.uniform(0.1, 5.0, net.n_out),
        gamma_per_target=np.zeros(net.n_out), fixed_alpha=True,
    )
    theta0 = net.get_vector().copy()
    normal = accumulate(net, X, Y)
    g = np.einsum("k,kj->j", hyper.beta, normal.gradients) + hyper.alpha * theta0
    probe = net.copy()

    def objective(theta: np.ndarray) -> np.ndarray:
        columns = theta.reshape(theta.shape[0], -1)
        values = []
        for j in range(columns.shape[1]):
            probe.set_vector(columns[:, j])
            r = probe.predict(X) - Y
            values.append(hyper.objective(0.5 * (r**2).sum(axis=0), columns[:, j]))
        return np.asarray(values).reshape(theta.shape[1:])

    reference = differentiate.jacobian(objective, theta0, initial_step=1e-2).df
    scale = max(1.0, float(np.max(np.abs(reference))))
    np.testing.assert_allclose(g, reference, rtol=1e-6, atol=1e-7 * scale)


@pytest.mark.parametrize("start", ["start1", "start2"])
@pytest.mark.parametrize("name", PROBLEMS)
def test_blocked_engine_reaches_nist_certified_values(name, start):
    # NIST StRD certified values (see test_solve_nist.py); the normal equations square the
    # condition number, yet every certified parameter keeps LRE >= 6 on these problems
    problem = load_nist(name)
    net = build(name, getattr(problem, start))
    result = solve(net, problem.x, problem.y, method="blocked-levenberg-marquardt")
    assert result.success and result.status == 1, result.message
    assert np.all(lre(parameters(name, net), problem.certified) >= 6.0), lre(parameters(name, net), problem.certified)
    assert lre(result.rss, problem.certified_rss) >= 8.0
    assert result.jacobian is None and result.normal_matrices.shape == (1, net.n_params, net.n_params)
    assert result.effective_parameters is None and result.noise_sd is None


def _synthetic(n: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Synthetic: two smooth responses of two inputs with noise."""
    rng = np.random.default_rng(seed)
    X = rng.uniform(-2, 2, (n, 2))
    Y = np.column_stack([np.sin(X[:, 0]) * X[:, 1], np.tanh(X[:, 0] - X[:, 1])]) + rng.normal(0, 0.05, (n, 2))
    return X, Y


def test_same_minimum_as_minpack_with_far_fewer_evaluations_on_a_slow_fit():
    # MINPACK creeps here (about 5,300 Jacobians to its xtol); the stall rule ends the blocked
    # engine after a few hundred steps, within 1e-3 of MINPACK's residual sum of squares
    X, Y = _synthetic(200)
    start = tp.build_mlp([2, 3, 2], seed=3)
    a = solve(start.copy(), X, Y, method="levenberg-marquardt")
    b = solve(start.copy(), X, Y, method="blocked-levenberg-marquardt")
    assert b.rss == pytest.approx(a.rss, rel=1e-3) and b.rss >= a.rss * (1 - 1e-9)
    assert b.success and b.function_evaluations * 5 < a.function_evaluations


def test_default_method_choice():
    X, Y = _synthetic(50)
    assert solve(tp.build_mlp([2, 2, 2], seed=0), X, Y).method == "levenberg-marquardt"
    regularised = solve(tp.build_mlp([2, 2, 2], seed=0), X, Y, regularization="evidence")
    assert regularised.method == "blocked-levenberg-marquardt"
    # the contract's spelling of the method with a penalty runs the blocked engine (MINPACK cannot add one)
    named = solve(tp.build_mlp([2, 2, 2], seed=0), X, Y, method="levenberg-marquardt", regularization=0.1)
    assert named.method == "blocked-levenberg-marquardt"
    with pytest.raises(ValueError, match="needs a Levenberg-Marquardt method"):
        solve(tp.build_mlp([2, 2, 2], seed=0), X, Y, method="lbfgs", regularization=0.1)
    with pytest.raises(ValueError, match="regularization must be None, 'evidence' or a penalty > 0, got 'bayes'"):
        solve(tp.build_mlp([2, 2, 2], seed=0), X, Y, regularization="bayes")
    with pytest.raises(ValueError, match="regularization"):
        solve(tp.build_mlp([2, 2, 2], seed=0), X, Y, regularization=-1.0)


def test_over_parameterised_plain_fit_stops_on_its_own():
    # 100 noisy residuals, 2 -> 6 -> 6 -> 1 (67 parameters): the fit creeps towards the noise;
    # MINPACK runs into the evaluation limit, the blocked engine's stall rule ends it early
    X, Y = _synthetic(100)
    minpack = solve(tp.build_mlp([2, 6, 6, 1], seed=1), X, Y[:, :1], method="levenberg-marquardt", max_evaluations=3000)
    blocked = solve(tp.build_mlp([2, 6, 6, 1], seed=1), X, Y[:, :1], method="blocked-levenberg-marquardt",
                    max_evaluations=3000)
    assert minpack.function_evaluations >= 3000 and not minpack.success
    assert blocked.function_evaluations < 1000 and blocked.status == 1, blocked.message
    assert "in the last 10 steps" in blocked.message and blocked.rss <= minpack.rss


def test_progress_line_for_the_blocked_engine(capsys):
    X, Y = _synthetic(60)
    result = solve(tp.build_mlp([2, 3, 2], seed=0), X, Y, regularization="evidence", progress=True)
    final = capsys.readouterr().err.splitlines()[-1]
    assert final.startswith("blocked-levenberg-marquardt: ") and " Jacobians, lowest rss " in final
    assert int(final.split(": ")[1].split(" of at most ")[0]) == result.function_evaluations


def test_memory_stays_that_of_one_block():
    # 30,000 rows x 2 outputs x 402 parameters: the whole Jacobian would take 193 MB
    rng = np.random.default_rng(0)
    X = rng.normal(size=(30_000, 4))
    Y = rng.normal(size=(30_000, 2))
    net = tp.build_mlp([4, 20, 14, 2], seed=0)
    whole = X.shape[0] * net.n_out * net.n_params * 8
    assert rows_per_block(net.n_out, net.n_params) * net.n_out * net.n_params * 8 <= 16 * 2**20
    tracemalloc.start()
    try:
        accumulate(net, X, Y)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 5 * 16 * 2**20 < whole / 2, (peak, whole)  # a few copies of one 16 MB block, not J
