"""Evidence-framework regularisation and the posterior intervals of a regularised fit.

References: the re-estimation formulas and predictive variance of MacKay (1992),
"A practical Bayesian framework for backpropagation networks", Neural
Computation 4(3) (named in tinyprop.evidence and tinyprop.posterior); the
coverage checks use synthetic scenarios with known noise (labelled below), and
the standard normal distribution (scipy.stats) for the expected coverage.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import tinyprop as tp
from tinyprop import evidence
from tinyprop.normal_equations import NormalEquations
from tinyprop.posterior import PosteriorUncertainty
from tinyprop.solve import solve
from tinyprop.uncertainty import uncertainty_report


def heat_exchanger(n: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Synthetic scenario: outlet temperature (noise sd 0.5 K) and pressure drop (noise sd 0.02 bar)
    of a heat exchanger against flow (0.2-2 kg/s) and inlet temperature (20-80 C)."""
    X = np.column_stack([rng.uniform(0.2, 2.0, n), rng.uniform(20, 80, n)])
    Y = np.column_stack([X[:, 1] - 30 * (1 - np.exp(-0.8 / X[:, 0])), 1.5 * X[:, 0] ** 1.8])
    noise = np.array([0.5, 0.02])
    return X, Y + rng.normal(size=Y.shape) * noise, noise


def scaled_network(X: np.ndarray, Y: np.ndarray, hidden: list[int], seed: int = 0) -> tp.Network:
    mlp = tp.build_mlp([X.shape[1], *hidden, Y.shape[1]], seed=seed)
    return tp.Network([tp.Standardize.from_data(X), *mlp.layers, tp.Unstandardize.from_data(Y)], init=None)


@settings(max_examples=40, deadline=None)
@given(st.integers(1, 6), st.integers(1, 3), st.integers(0, 2**32 - 1))
def test_effective_parameters_add_up(p, m, seed):
    # sum_k gamma_k = p - alpha tr(H^-1), H = sum_k beta_k A_k + alpha I (tr(H H^-1) = p)
    rng = np.random.default_rng(seed)
    J = rng.normal(size=(m, 5, p))
    normal = NormalEquations(np.einsum("kni,knj->kij", J, J), rng.normal(size=(m, p)), rng.uniform(0.5, 2, m), 5)
    hyper = evidence.Hyperparameters(float(rng.uniform(0.1, 3)), rng.uniform(0.1, 3, m), np.zeros(m), False)
    theta = rng.normal(size=p)
    new = evidence.reestimate(normal, theta, hyper)
    H = evidence.hessian(normal, hyper)
    expected = p - hyper.alpha * np.trace(np.linalg.inv(H))
    assert new.gamma == pytest.approx(expected, rel=1e-9, abs=1e-9)
    assert 0 < new.gamma < p
    np.testing.assert_allclose(new.beta, np.maximum(5 - new.gamma_per_target, 5e-3) / (2 * normal.half_squares))
    assert new.alpha == pytest.approx(new.gamma / (theta @ theta))


def test_two_targets_with_different_noise_get_their_own_noise_level_and_95_percent_intervals():
    # Synthetic: noise sd 0.5 and 0.02, 400 rows; 20,000 fresh samples. With that many, the
    # coverage of a correct 95% interval lies in 94.7-95.3% with probability 0.95 (binomial sd 0.15%);
    # the bar 93-97% leaves room for the estimation error of the fit itself.
    rng = np.random.default_rng(0)
    X, Y, noise = heat_exchanger(400, rng)
    net = scaled_network(X, Y, [8])
    result = solve(net, X, Y, regularization="evidence")
    assert result.method == "blocked-levenberg-marquardt" and result.success, result.message
    np.testing.assert_allclose(result.noise_sd, noise, rtol=0.1)
    assert 0 < result.effective_parameters < net.n_params and result.penalty > 0
    np.testing.assert_allclose(result.effective_parameters_per_target.sum(), result.effective_parameters)
    posterior = tp.parameter_uncertainty(net, result=result)
    assert isinstance(posterior, PosteriorUncertainty)
    X_new, Y_new, _ = heat_exchanger(20_000, rng)
    intervals = posterior.prediction_intervals(X_new, level=0.95)
    coverage = intervals.contains(Y_new).mean(axis=0)
    assert np.all((coverage >= 0.93) & (coverage <= 0.97)), coverage
    assert intervals.degrees_of_freedom is None and intervals.t_quantile == pytest.approx(1.959964, rel=1e-6)
    ratio = intervals.half_width.mean(axis=0) / noise
    assert np.all((ratio > 1.9) & (ratio < 2.3)), ratio  # about z * sigma_k: each target its own width


def test_posterior_covariance_is_the_inverse_of_the_regularised_gauss_newton_matrix():
    rng = np.random.default_rng(1)
    X, Y, _ = heat_exchanger(100, rng)
    net = scaled_network(X, Y, [4])
    result = solve(net, X, Y, regularization="evidence")
    posterior = tp.parameter_uncertainty(net, result=result)
    J = net.jacobian(X).reshape(100, 2, net.n_params)
    beta = 1 / result.noise_sd**2
    H = sum(beta[k] * J[:, k].T @ J[:, k] for k in range(2)) + result.penalty * np.eye(net.n_params)
    np.testing.assert_allclose(posterior.covariance @ H, np.eye(net.n_params), atol=1e-8)
    np.testing.assert_allclose(posterior.standard_errors, np.sqrt(np.diag(np.linalg.inv(H))), rtol=1e-8)


def test_fixed_penalty_keeps_alpha_and_estimates_the_noise():
    rng = np.random.default_rng(2)
    X, Y, noise = heat_exchanger(300, rng)
    net = scaled_network(X, Y, [6])
    result = solve(net, X, Y, regularization=0.5)
    assert result.penalty == 0.5 and result.regularization == 0.5
    np.testing.assert_allclose(result.noise_sd, noise, rtol=0.15)
    assert 0 < result.effective_parameters < net.n_params
    assert result.log_evidence is not None and np.isfinite(result.log_evidence)


def test_report_gives_the_posterior_per_target():
    rng = np.random.default_rng(3)
    X, Y, noise = heat_exchanger(200, rng)
    net = scaled_network(X, Y, [5])
    result = solve(net, X, Y, regularization="evidence")
    report = uncertainty_report(net, X, Y, result=result, output_names=["t_out", "dp"])
    assert report["parameters"]["posterior"] is True
    assert len(report["parameters"]["noise_sd"]) == 2
    widths = report["prediction_interval"]["half_width_on_data"]
    assert widths["t_out"]["mean"] > 10 * widths["dp"]["mean"]  # noise 0.5 vs 0.02


def test_result_of_another_network_is_refused():
    rng = np.random.default_rng(4)
    X, Y, _ = heat_exchanger(50, rng)
    net = scaled_network(X, Y, [3])
    result = solve(net, X, Y, regularization="evidence")
    with pytest.raises(ValueError, match="result does not belong to this network"):
        tp.parameter_uncertainty(scaled_network(X, Y, [4]), result=result)
    fitted = scaled_network(X, Y, [3])
    plain = solve(fitted, X, Y, method="blocked-levenberg-marquardt")
    with pytest.raises(ValueError, match="keeps no Jacobian"):
        tp.parameter_uncertainty(fitted, result=plain)


def test_three_rows_drive_the_weights_to_zero_without_overflow():
    # synthetic: y = sin(3x) at x = -1, 0, 1. With 61 parameters the evidence keeps almost none
    # (the fit tends to the mean); alpha = gamma / ||theta||^2 used to run to ~1e304 and overflow
    # in the step ("overflow encountered in multiply"); it is now kept within 1e12 of the data term
    X = np.array([[-1.0], [0.0], [1.0]])
    y = np.sin(3 * X)
    with np.errstate(all="raise"):
        net, result = tp.fit_tabular_regression(X, y, seed=0)
    fit = result.solved
    assert np.isfinite(fit.penalty) and fit.effective_parameters < 1
    assert np.all(np.isfinite(net.predict(X)))


def test_noise_free_targets_keep_the_hessian_factorable():
    # synthetic: 30 rows, 50 parameters (A rank-deficient) and residuals of 1e-30, as in a fit through
    # every point of a noise-free target. beta_k = (n - gamma_k) / (2 E_k) jumps to ~1e31 in one round;
    # alpha used to stay near gamma / ||theta||^2 ~ 1, so the next H = beta A + alpha I, positive definite
    # in exact arithmetic, failed its Cholesky factor in float64 ("leading minor not positive definite";
    # seen with tp.fit_tabular_regression on an exact sigmoid of two inputs, 120 rows, 20 tanh units)
    rng = np.random.default_rng(0)
    J = rng.normal(size=(30, 50))
    normal = NormalEquations(matrices=(J.T @ J)[None], gradients=np.zeros((1, 50)),
                             half_squares=np.array([1e-30]), n_rows=30)
    theta = rng.normal(size=50)
    hyper = evidence.initial(normal, theta, None)
    for _ in range(3):
        hyper = evidence.reestimate(normal, theta, hyper)
        assert np.isfinite(evidence.log_evidence(normal, theta, hyper))
    data_curvature = hyper.beta[0] * np.trace(normal.matrices[0]) / 50
    assert 1e-10 * data_curvature <= hyper.alpha <= 1e12 * data_curvature
