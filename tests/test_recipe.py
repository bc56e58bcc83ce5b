"""The default recipe (tinyprop.recipes.fit_tabular_regression): its choice of method and its fits.

Data are synthetic scenarios of our own, labelled below; the UCI benchmark runs are in
test_uci.py. The recipe's bit-for-bit agreement with `tinyprop train` is in test_cli.py.
"""

from __future__ import annotations

import time

import numpy as np
import pytest

from tinyprop.recipes import choose_method, fit_tabular_regression


def pump(n: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Synthetic pump test stand: flow (noise sd 0.8 m3/h) and shaft power (noise sd 0.05 kW)
    against speed (500-3000 rpm) and head (0.5-5 m)."""
    X = np.column_stack([rng.uniform(500, 3000, n), rng.uniform(0.5, 5.0, n)])
    s, h = X[:, 0] / 3000, X[:, 1] / 5
    flow = 40 * s * np.sqrt(np.clip(1.2 - h / (s**2 + 0.3), 0.05, None))
    power = 2.0 * s**3 + 0.8 * s * h + 0.3 * np.sin(3 * h)
    noise = np.array([0.8, 0.05])
    Y = np.column_stack([flow, power])
    return X, Y + rng.normal(size=Y.shape) * noise, noise


def test_method_choice_follows_the_cost_of_an_iteration():
    method, reason = choose_method(900, 1, 201)
    assert method == "evidence-lm" and "201 parameters" in reason and "affordable" in reason
    method, reason = choose_method(10**6, 1, 301)  # 9e10 multiply-adds per iteration
    assert method == "adam-early-stopping" and "beyond the limits" in reason
    method, reason = choose_method(100, 1, 6000)  # normal equations 275 MB
    assert method == "adam-early-stopping"
    assert choose_method(10**6, 1, 301, "evidence-lm") == ("evidence-lm", "requested")
    with pytest.raises(ValueError, match="method must be one of"):
        choose_method(10, 1, 10, "newton")


def test_restarts_keep_the_largest_log_evidence_and_the_fit_is_deterministic():
    rng = np.random.default_rng(0)
    X, Y, _ = pump(200, rng)
    net, result = fit_tabular_regression(X, Y, seed=4, hidden=6, restarts=3)
    assert result.method == "evidence-lm" and len(result.seeds) == len(result.log_evidence) == 3
    assert result.log_evidence[result.chosen] == max(result.log_evidence)
    assert result.solved.log_evidence == max(result.log_evidence)
    np.testing.assert_array_equal(net.get_vector(), result.solved.theta)
    again, _ = fit_tabular_regression(X, Y, seed=4, hidden=6, restarts=3)
    np.testing.assert_array_equal(again.get_vector(), net.get_vector())
    other, _ = fit_tabular_regression(X, Y, seed=5, hidden=6, restarts=3)
    assert not np.array_equal(other.get_vector(), net.get_vector())
    one, single = fit_tabular_regression(X, Y, seed=4, hidden=6)  # default: one start, the first of the three
    assert len(single.seeds) == 1 and single.seeds[0] == result.seeds[0]
    summary = result.summary()
    assert summary["recipe_method"] == "evidence-lm" and len(summary["noise_sd"]) == 2


def test_bad_settings_are_refused():
    X, Y, _ = pump(20, np.random.default_rng(1))
    with pytest.raises(ValueError, match="method must be one of"):
        fit_tabular_regression(X, Y, method="newton")
    with pytest.raises(ValueError, match="restarts"):
        fit_tabular_regression(X, Y, restarts=0)
    with pytest.raises(TypeError, match="hidden must be a width or a non-empty list"):
        fit_tabular_regression(X, Y, hidden=[])
    with pytest.raises(ValueError, match="seed must be an integer >= 0"):
        fit_tabular_regression(X, Y, seed=-1)


@pytest.mark.slow
def test_over_parameterised_pump_fit_does_not_fit_the_noise():
    # Synthetic pump scenario, 1,500 rows, 2 inputs, 2 targets with known noise, the 16,16 network
    # (354 parameters): the default recipe's fit must not go below the noise on the training rows
    # (bar: training RMSE >= 0.9 x noise), must use fewer effective parameters than it has, and
    # must end on its own (its time is printed, not asserted; measured in docs/training.md).
    rng = np.random.default_rng(1)
    X, Y, noise = pump(1500, rng)
    started = time.perf_counter()
    net, result = fit_tabular_regression(X, Y, hidden=[16, 16], seed=0)
    seconds = time.perf_counter() - started
    rmse = np.sqrt(np.mean((net.predict(X) - Y) ** 2, axis=0))
    print(f"pump fit: {seconds:.1f} s, {result.solved.iterations} iterations, training RMSE / noise "
          f"{np.round(rmse / noise, 3)}, gamma {result.solved.effective_parameters:.1f} of {net.n_params}")
    assert result.method == "evidence-lm" and result.solved.status == 1, result.solved.message
    assert np.all(rmse >= 0.9 * noise), rmse / noise
    assert result.solved.effective_parameters < net.n_params
    np.testing.assert_allclose(result.solved.noise_sd, noise, rtol=0.1)
    X_new, Y_new, _ = pump(20_000, rng)
    test_rmse = np.sqrt(np.mean((net.predict(X_new) - Y_new) ** 2, axis=0))
    assert np.all(test_rmse <= 1.1 * noise), test_rmse / noise
