"""Properties of the uncertainty estimates: coverage, rank deficiency, input sensitivities.

All data here are synthetic (generated in this file). External references:
scipy's numerical differentiation (``scipy.differentiate.jacobian``) for the
input sensitivities of random deep networks; the analytic derivative of a
linear network (its weights) for the exact case.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from scipy import differentiate

import tinyprop as tp
from net_strategies import networks
from tinyprop.solve import solve
from tinyprop.uncertainty import (
    RankDeficientError,
    input_sensitivity,
    parameter_uncertainty,
    uncertainty_report,
)

SMOOTH = (tp.Sigmoid(), tp.Tanh(), tp.Softplus(), tp.Identity())


# --------------------------------------------------------------------------- coverage
def true_function(x: np.ndarray) -> np.ndarray:
    """Synthetic smooth function of one input, in the model class of a 1-2-1 tanh network."""
    return 1.5 * np.tanh(2.0 * x - 1.0) - np.tanh(1.2 * x + 0.8) + 0.2


def coverage_trials(n_trials: int, *, n_fit: int = 50, n_fresh: int = 200, noise_sd: float = 0.1):
    """Fit a 1-2-1 tanh network by ``solve`` to ``n_fit`` noisy samples, ``n_trials`` times.

    Each trial (seed = trial number) draws ``x`` uniform on [-2, 2], ``y =
    true_function(x) + N(0, noise_sd^2)``, starts from the seeded Glorot
    weights, and checks the 95% intervals on ``n_fresh`` fresh samples.
    Fits refused as rank-deficient (local minima where a hidden unit
    saturates on all the data) get no intervals and are counted. Returns, per
    fit with intervals: the fraction of fresh observations inside the
    prediction interval, the fraction of true means inside the confidence
    interval of the mean, and the residual SD; and the number refused.
    """
    prediction, mean, residual_sd, refused = [], [], [], 0
    for seed in range(n_trials):
        rng = np.random.default_rng(seed)
        x = rng.uniform(-2.0, 2.0, (n_fit, 1))
        y = true_function(x[:, 0]) + rng.normal(0.0, noise_sd, n_fit)
        x_new = rng.uniform(-2.0, 2.0, (n_fresh, 1))
        f_new = true_function(x_new[:, 0])
        y_new = f_new + rng.normal(0.0, noise_sd, n_fresh)
        net = tp.Network([tp.Affine(1, 2), tp.Tanh(), tp.Affine(2, 1)], seed=seed)
        result = solve(net, x, y, tolerance=1e-10)
        try:
            uncertainty = parameter_uncertainty(net, result=result)
        except RankDeficientError:
            refused += 1
            continue
        intervals = uncertainty.prediction_intervals(x_new, level=0.95)
        prediction.append(intervals.contains(y_new).mean())
        mean.append(((intervals.mean_lower[:, 0] <= f_new) & (f_new <= intervals.mean_upper[:, 0])).mean())
        residual_sd.append(uncertainty.residual_sd)
    return np.array(prediction), np.array(mean), np.array(residual_sd), refused


def check_coverage(n_trials: int, refused_at_most: int, mean_bar: tuple[float, float]) -> None:
    prediction, mean, residual_sd, refused = coverage_trials(n_trials)
    assert refused <= refused_at_most, refused
    assert 0.92 <= prediction.mean() <= 0.98, prediction.mean()
    # The confidence interval of the mean assumes the right model. A fit stuck in a
    # local minimum (residual SD about 0.4, four times the true 0.1) is a wrong model:
    # its mean is biased (its prediction intervals widen with s and still cover).
    # Only fits at the global minimum are held to the nominal level.
    at_minimum = residual_sd < 1.3 * 0.1
    low, high = mean_bar
    assert low <= mean[at_minimum].mean() <= high, mean[at_minimum].mean()


def test_prediction_intervals_cover_95_percent_of_fresh_points():
    """40 trials x 200 fresh points (synthetic), measured: 39 fits with intervals (1 refused);
    95% prediction intervals contain 0.9535 of the fresh observations (bar, issue 9:
    0.92..0.98); 95% confidence intervals of the mean contain 0.9684 of the true means
    over the 32 fits at the global minimum (bar 0.90..0.99; 0.8840 over all 39 fits)."""
    check_coverage(40, refused_at_most=4, mean_bar=(0.90, 0.99))


@pytest.mark.slow
def test_prediction_intervals_cover_95_percent_of_fresh_points_many_trials():
    """1000 trials x 200 fresh points (synthetic), measured: 934 fits with intervals (66 refused);
    prediction-interval coverage 0.9535 (bar 0.92..0.98); confidence-interval-of-the-mean
    coverage 0.9551 over the 760 fits at the global minimum (bar 0.93..0.97; 0.8719 over all 934)."""
    check_coverage(1000, refused_at_most=100, mean_bar=(0.93, 0.97))


# --------------------------------------------------------------------------- rank deficiency
def duplicated_unit_network(output_weights: tuple[float, float]) -> tp.Network:
    """1-2-1 tanh network whose two hidden units are identical (same weight and bias)."""
    hidden, out = tp.Affine(1, 2), tp.Affine(2, 1)
    hidden.weight[:, 0], hidden.bias[:] = 0.8, -0.3
    out.weight[0, :], out.bias[0] = output_weights, 0.1
    return tp.Network([hidden, tp.Tanh(), out], init=None)


def noisy_curve(n: int = 30, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    x = np.linspace(-2.0, 2.0, n).reshape(-1, 1)
    return x, true_function(x[:, 0]) + rng.normal(0.0, 0.1, n)


@pytest.mark.parametrize("output_weights", [(0.6, 0.6), (0.6, -1.7)], ids=["identical", "collinear"])
def test_duplicated_hidden_unit_is_reported_as_rank_deficient(output_weights):
    # Identical units: the columns of J for their weights, their biases and (always)
    # their output weights are equal or proportional, so J has 3 null directions.
    x, y = noisy_curve()
    net = duplicated_unit_network(output_weights)
    with pytest.raises(RankDeficientError) as caught:
        parameter_uncertainty(net, x, y)
    error = caught.value
    assert error.rank == 4 and error.n_params == 7
    assert error.condition_number > 1e14
    message = str(error)
    assert "rank-deficient: numerical rank 4 of 7 parameters, condition number" in message
    assert f"{error.condition_number:.3g}" in message
    assert "duplicated hidden unit" in message
    named = {label for group in error.unidentifiable for label in group}
    assert {"layer 0 weight[0, 0]", "layer 0 weight[1, 0]", "layer 2 weight[0, 0]", "layer 2 weight[0, 1]"} <= named


def test_report_for_a_rank_deficient_network_carries_the_refusal():
    x, y = noisy_curve()
    report = uncertainty_report(duplicated_unit_network((0.6, 0.6)), x, y)
    assert report["parameters"]["rank_deficient"] is True and report["prediction_interval"] is None
    assert "numerical rank 4 of 7" in report["parameters"]["message"]
    assert report["parameters"]["rank"] == 4 and report["input_sensitivity"]["n_samples"] == 30
    json.dumps(report, allow_nan=False)


def test_input_constant_at_zero_gives_zero_columns_and_infinite_condition_number():
    # d output / d weight[k, j] = delta_k * x_j = 0 for every sample when input j is always 0
    x, y = noisy_curve()
    X = np.column_stack([x, np.zeros_like(x)])
    net = tp.Network([tp.Affine(2, 2), tp.Tanh(), tp.Affine(2, 1)], seed=1)
    with pytest.raises(RankDeficientError, match="numerical rank 7 of 9 parameters, condition number inf") as caught:
        parameter_uncertainty(net, X, y)
    assert caught.value.condition_number == np.inf
    assert {("layer 0 weight[0, 1]",), ("layer 0 weight[1, 1]",)} == set(caught.value.unidentifiable)
    assert caught.value.to_dict()["condition_number"] is None
    assert "Note:" not in str(caught.value)  # no piecewise-linear hidden units here


@pytest.mark.parametrize(
    "activation, rank",
    [(tp.ReLU(), 10), (tp.LeakyReLU(0.1), 10), (tp.Identity(), 3)],
    ids=["ReLU", "LeakyReLU", "Identity"],
)
def test_piecewise_linear_hidden_units_are_rank_deficient_by_construction(activation, rank):
    # f(c z) = c f(z): (w, b, v) -> (c w, c b, v / c) changes nothing, one null direction per
    # hidden unit (Euler's theorem on homogeneous functions), whatever the data: 13 - 3.
    # Identity hidden units make the network one affine map of 2 inputs: 3 parameters' worth.
    rng = np.random.default_rng(0)
    X = rng.normal(size=(40, 2))
    net = tp.Network([tp.Affine(2, 3), activation, tp.Affine(3, 1)], seed=2)
    name = type(activation).__name__
    with pytest.raises(RankDeficientError, match=f"rank {rank} of 13 parameters.*Note: this network has {name} hidden"):
        parameter_uncertainty(net, X, rng.normal(size=40))


def test_nearly_duplicated_unit_is_returned_with_its_large_condition_number():
    # Full rank but ill-conditioned: reported through condition_number, not refused.
    net = duplicated_unit_network((0.6, 0.6))
    net.layers[0].weight[1, 0] += 0.05
    x, y = noisy_curve()
    uncertainty = parameter_uncertainty(net, x, y)
    assert 1e3 < uncertainty.condition_number < 1e12
    assert np.max(np.abs(uncertainty.correlation - np.eye(7))) > 0.99


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    hidden=st.integers(1, 4),
    n_in=st.integers(1, 3),
    seed=st.integers(0, 2**32 - 1),
)
def test_intervals_do_not_depend_on_the_parametrisation(hidden, n_in, seed):
    # f(x; W, b) with inputs scaled by a fixed layer, (x - m) / c, and weights W c, b + W m
    # is the same function; the delta method is invariant under such a reparametrisation
    # (J' = J A with A invertible), so the standard error of the mean must not change.
    rng = np.random.default_rng(seed)
    net = tp.Network([tp.Affine(n_in, hidden), tp.Tanh(), tp.Affine(hidden, 1)], seed=seed)
    n = net.n_params + 10
    X = rng.normal(0.0, 1.0, (n, n_in)) * rng.uniform(0.1, 10.0, n_in) + rng.normal(0.0, 3.0, n_in)
    y = rng.normal(0.0, 1.0, n)  # synthetic; the formulas do not need a fitted network
    mean, scale = X.mean(axis=0), X.std(axis=0)
    first = net.layers[0]
    moved = tp.Affine(n_in, hidden)
    moved.weight[:], moved.bias[:] = first.weight * scale, first.bias + first.weight @ mean
    other = tp.Network([tp.Standardize(mean, scale), moved, tp.Tanh(), net.layers[2]], init=None)
    np.testing.assert_allclose(other.predict(X), net.predict(X), rtol=1e-10, atol=1e-12)
    try:
        u, v = parameter_uncertainty(net, X, y), parameter_uncertainty(other, X, y)
    except RankDeficientError:
        assume(False)
    X_new = rng.normal(0.0, 2.0, (5, n_in)) * scale + mean
    a, b = u.prediction_intervals(X_new), v.prediction_intervals(X_new)
    # agreement to rounding amplified by the conditioning (saturated units make it large)
    rtol = 1e-10 + 100 * np.finfo(float).eps * max(u.condition_number, v.condition_number)
    np.testing.assert_allclose(b.mean_standard_error, a.mean_standard_error, rtol=rtol)
    assert v.residual_sd == pytest.approx(u.residual_sd, rel=1e-10)


# --------------------------------------------------------------------------- input sensitivities
def test_linear_network_sensitivity_is_its_weights_exactly():
    layer = tp.Affine(3, 2)
    layer.weight[:] = [[0.75, -2.5, 0.0], [-0.125, 1.0, 4.0]]  # dyadic: the means are exact
    net = tp.Network([layer], init=None)
    X = np.random.default_rng(0).normal(size=(8, 3))
    table = input_sensitivity(net, X, input_names=["a", "b", "c"], output_names=["p", "q"])
    np.testing.assert_array_equal(table.mean_abs, np.abs(layer.weight))
    np.testing.assert_array_equal(table.mean, layer.weight)
    np.testing.assert_array_equal(table.sd_abs, np.zeros((2, 3)))
    assert table.n_samples == 8


@settings(max_examples=40, deadline=None)
@given(
    n_in=st.integers(1, 4),
    n_out=st.integers(1, 3),
    seed=st.integers(0, 2**32 - 1),
)
def test_sensitivity_through_scaling_layers_is_in_the_raw_units(n_in, n_out, seed):
    # y = ((x - m) / c) W^T * d + e: dy_k/dx_j = W_kj d_k / c_j (analytic)
    rng = np.random.default_rng(seed)
    c, d = rng.uniform(0.01, 100.0, n_in), rng.uniform(0.01, 100.0, n_out)
    layer = tp.Affine(n_in, n_out)
    net = tp.Network(
        [tp.Standardize(rng.normal(size=n_in), c), layer, tp.Unstandardize(rng.normal(size=n_out), d)], seed=seed
    )
    table = input_sensitivity(net, rng.normal(size=(6, n_in)))
    np.testing.assert_allclose(table.mean_abs, np.abs(layer.weight * d[:, None] / c[None, :]), rtol=1e-12)
    np.testing.assert_allclose(table.sd_abs, 0.0, atol=1e-12 * table.mean_abs.max())


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(net=networks(max_depth=4, max_width=6, dtype=np.float64, activations=SMOOTH), seed=st.integers(0, 2**32 - 1))
def test_sensitivity_of_random_deep_network_matches_numerical_differentiation(net, seed):
    X = np.random.default_rng(seed).normal(size=(7, net.n_in))

    def f(columns: np.ndarray) -> np.ndarray:  # (n_in, n, ...) -> (n_out, n, ...)
        rows = np.moveaxis(columns, 0, -1).reshape(-1, net.n_in)
        return np.moveaxis(net.predict(rows).reshape(*columns.shape[1:], net.n_out), -1, 0)

    found = differentiate.jacobian(f, X.T, tolerances={"atol": 1e-12})  # reference: scipy
    assert np.all(found.success)
    G = np.moveaxis(found.df, -1, 0)  # (n, n_out, n_in)
    table = input_sensitivity(net, X)
    scale = max(np.abs(G).max(), 1e-300)
    np.testing.assert_allclose(table.mean_abs, np.abs(G).mean(axis=0), rtol=1e-7, atol=1e-9 * scale)
    np.testing.assert_allclose(table.sd_abs, np.abs(G).std(axis=0), rtol=1e-6, atol=1e-9 * scale)
    np.testing.assert_allclose(table.mean, G.mean(axis=0), rtol=1e-7, atol=1e-9 * scale)


def test_sensitivity_table_reads_well_and_converts_to_json():
    layer = tp.Affine(3, 1)
    layer.weight[:] = [[0.5, -3.0, 0.02]]
    net = tp.Network([layer, tp.Tanh()], init=None)
    X = np.random.default_rng(1).normal(size=(50, 3))
    table = input_sensitivity(net, X, input_names=["voltage_V", "current_A", "temperature_C"], output_names=["soc"])
    lines = str(table).splitlines()
    assert lines[0] == "input sensitivity d output / d input over 50 samples (output units per input unit)"
    assert lines[1] == "soc:"
    assert lines[2].split() == ["input", "mean", "|d/dx|", "sd", "|d/dx|", "mean", "d/dx"]
    assert [line.split()[0] for line in lines[3:]] == ["current_A", "voltage_V", "temperature_C"]  # by mean |d/dx|
    assert lines[3].split()[-1].startswith("-")
    assert json.loads(json.dumps(table.to_dict(), allow_nan=False))["outputs"]["soc"]["current_A"]["mean"] < 0
    assert "input 2" in str(input_sensitivity(net, X))


def test_sensitivity_bad_inputs():
    net = tp.Network([tp.Affine(2, 1)], seed=0)
    X = np.zeros((3, 2))
    with pytest.raises(ValueError, match="input_names must have 2 entries .* got 3"):
        input_sensitivity(net, X, input_names=["a", "b", "c"])
    with pytest.raises(TypeError, match="input_names must be a sequence of 2 strings"):
        input_sensitivity(net, X, input_names="ab")
    with pytest.raises(TypeError, match="output_names must be a sequence of 1 strings"):
        input_sensitivity(net, X, output_names=[1])
    with pytest.raises(TypeError, match="output_names must be a sequence of 1 strings, got 5"):
        input_sensitivity(net, X, output_names=5)
    table = input_sensitivity(net, X, input_names=(name for name in ["a", "b"]))  # any iterable
    assert table.input_names == ("a", "b")
    with pytest.raises(ValueError, match=r"X must have shape \(n_samples, 2\)"):
        input_sensitivity(net, np.zeros((3, 3)))
    with pytest.raises(TypeError, match="net must be a tinyprop Network"):
        input_sensitivity(None, X)
