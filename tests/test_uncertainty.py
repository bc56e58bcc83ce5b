"""Parameter standard errors and delta-method intervals against outside references.

1. NIST/ITL Statistical Reference Datasets, nonlinear regression
   (https://www.itl.nist.gov/div898/strd/; bundled in ``tinyprop/datasets/nist``):
   each file certifies, to 11 digits, the standard deviation of every
   parameter, ``sd(b_j) = sqrt(s^2 [(J^T J)^-1]_jj)``, and the residual
   standard deviation ``s = sqrt(RSS / (n - k))``. Rat42, Misra1a, Misra1b,
   Misra1d and Lanczos3 are built as networks exactly as in
   ``test_solve_nist.py`` (imported from there), fitted by ``solve`` with
   Levenberg-Marquardt from both NIST starting vectors, and the standard
   errors are mapped back to ``b1..bk`` by the delta method
   ``Cov(b) = A C A^T`` with ``A = d b / d theta``. The map is linear, so the
   delta method is exact here: ``A`` is a signed permutation (Rat42: weights
   give ``b1`` and ``b3``, and ``b2`` is minus the hidden bias, ``d b2 / d bias
   = -1``; the others: ``b`` read straight from the weights). Accuracy: the
   log relative error LRE = -log10(|estimate - certified| / |certified|)
   (McCullough (1998), The American Statistician 52(4)), capped at 11 digits.
   Bars (issue 9): LRE >= 4 for every certified standard deviation, >= 6 for
   the residual standard deviation.
2. The standard error of the fitted mean at new inputs, against the textbook
   formula ``s * ||R^-T g||`` (``J_b = Q R``) applied to the NIST model
   *formula* in ``b`` with derivatives from scipy's numerical differentiation
   (``scipy.differentiate.jacobian``) instead of backpropagation.
3. A straight line (a network with one Affine layer) is ordinary linear
   regression, where the formulas are exact: standard errors against
   ``scipy.stats.linregress``; intervals against the simple-linear-regression
   formulas ``s sqrt(1/n + (x0 - xbar)^2 / Sxx)`` and
   ``t s sqrt(1 + 1/n + (x0 - xbar)^2 / Sxx)`` (from memory: Draper & Smith,
   "Applied Regression Analysis", Wiley). Data there are synthetic.

Run ``python tests/test_uncertainty.py`` to print the LRE table.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import differentiate, stats

import tinyprop as tp
from test_solve_nist import PROBLEMS, build, fit, lre, parameters
from tinyprop.datasets import load_nist
from tinyprop.solve import solve
from tinyprop.uncertainty import (
    ParameterUncertainty,
    RankDeficientError,
    parameter_labels,
    parameter_uncertainty,
    uncertainty_report,
)

STARTS = ("start1", "start2")

# The model lines of the NIST files (problem.model), in b = (b1, ..., bk).
MODELS = {
    "Rat42": ("b1 / (1+exp[b2-b3*x])", lambda b, x: b[0] / (1 + np.exp(b[1] - b[2] * x))),
    "Misra1a": ("b1*(1-exp[-b2*x])", lambda b, x: b[0] * (1 - np.exp(-b[1] * x))),
    "Misra1b": ("b1 * (1-(1+b2*x/2)**(-2))", lambda b, x: b[0] * (1 - (1 + b[1] * x / 2) ** -2)),
    "Misra1d": ("b1*b2*x*((1+b2*x)**(-1))", lambda b, x: b[0] * b[1] * x / (1 + b[1] * x)),
    "Lanczos3": (
        "b1*exp(-b2*x) + b3*exp(-b4*x) + b5*exp(-b6*x)",
        lambda b, x: b[0] * np.exp(-b[1] * x) + b[2] * np.exp(-b[3] * x) + b[4] * np.exp(-b[5] * x),
    ),
}


def mapping_gradient(name: str, net: tp.Network) -> np.ndarray:
    """``A = d b / d theta`` of the map from the network's parameters to ``b1..bk``.

    ``parameters`` (from the solve tests) is linear in the weights, so column
    ``j`` is the image of the unit vector ``e_j``.
    """
    probe = net.copy()
    columns = []
    for j in range(net.n_params):
        probe.set_vector(np.eye(net.n_params)[j])
        columns.append(parameters(name, probe))
    return np.column_stack(columns)


def certified_comparison(name: str, start: str) -> tuple[np.ndarray, float, ParameterUncertainty]:
    """LRE of each sd(b_j) and of s, for the fit from ``start``."""
    problem, net, result = fit(name, start, "levenberg-marquardt")
    assert result.success, result.message
    uncertainty = parameter_uncertainty(net, result=result)
    A = mapping_gradient(name, net)
    sd_b = np.sqrt(np.diag(A @ uncertainty.covariance @ A.T))
    residual_lre = float(lre(uncertainty.residual_sd, problem.certified_residual_sd))
    return lre(sd_b, problem.certified_sd), residual_lre, uncertainty


@pytest.mark.parametrize("start", STARTS)
@pytest.mark.parametrize("name", PROBLEMS)
def test_standard_errors_reproduce_nist_certified_standard_deviations(name, start):
    sd_lre, residual_lre, uncertainty = certified_comparison(name, start)
    assert np.all(sd_lre >= 4.0), sd_lre
    assert residual_lre >= 6.0, residual_lre
    assert uncertainty.degrees_of_freedom == load_nist(name).n_observations - load_nist(name).n_parameters


@pytest.mark.parametrize("name", PROBLEMS)
def test_mapping_to_nist_parameters_is_a_signed_permutation(name):
    _, net, _ = fit(name, "start1", "levenberg-marquardt")
    A = mapping_gradient(name, net)
    assert A.shape[0] == A.shape[1] == net.n_params
    assert np.all(np.sort(np.abs(A), axis=1)[:, :-1] == 0) and np.all(np.abs(A).sum(axis=1) == 1)
    expected_signs = {"Rat42": [1, -1, 1]}.get(name, [1] * net.n_params)  # Rat42: bias = -b2
    np.testing.assert_array_equal(A.sum(axis=1), expected_signs)


@pytest.mark.parametrize("name", PROBLEMS)
def test_data_and_solve_result_give_the_same_uncertainty(name):
    problem, net, result = fit(name, "start2", "levenberg-marquardt")
    from_result = parameter_uncertainty(net, result=result)
    from_data = parameter_uncertainty(net, problem.x, problem.y)
    np.testing.assert_allclose(from_data.standard_errors, from_result.standard_errors, rtol=1e-12)
    np.testing.assert_allclose(from_data.covariance, from_result.covariance, rtol=1e-10, atol=0)
    assert from_data.rss == pytest.approx(result.rss, rel=1e-13)
    assert from_result.gradient_cosine < 1e-8  # a least-squares solution: J^T r = 0


@pytest.mark.parametrize("name", PROBLEMS)
def test_mean_standard_error_matches_model_formula_with_numerical_derivatives(name):
    problem, net, result = fit(name, "start1", "levenberg-marquardt")
    model_text, model = MODELS[name]
    assert model_text in problem.model
    b = parameters(name, net)
    x_data = problem.x[:, 0]
    x_new = np.linspace(x_data.min(), x_data.max(), 7)

    def gradient_in_b(x: np.ndarray) -> np.ndarray:  # (len(x), k), by scipy.differentiate
        def f(bb):
            return model(bb, x.reshape(-1, *([1] * (bb.ndim - 1))))
        # steps relative to b: Misra1b and Misra1d have a pole at b2 x = -2 and -1,
        # which the default absolute step of 0.5 would cross (b2 is about 3e-4); the absolute
        # tolerance lets exact-zero derivatives (Lanczos3 at x = 0) converge
        found = differentiate.jacobian(f, b, initial_step=0.01 * np.abs(b), tolerances={"atol": 1e-12})
        assert np.all(found.success), found.status
        return found.df

    J_b, g_b = gradient_in_b(x_data), gradient_in_b(x_new)
    s = np.sqrt(result.rss / (len(x_data) - len(b)))
    R = np.linalg.qr(J_b, mode="r")
    reference = s * np.linalg.norm(np.linalg.solve(R.T, g_b.T), axis=0)  # sqrt(g^T s^2 (J^T J)^-1 g)
    intervals = parameter_uncertainty(net, result=result).prediction_intervals(x_new.reshape(-1, 1))
    np.testing.assert_allclose(intervals.mean_standard_error[:, 0], reference, rtol=1e-8)  # measured <= 3.3e-10
    np.testing.assert_allclose(intervals.prediction[:, 0], model(b, x_new), rtol=1e-12)


# --------------------------------------------------------------------------- ordinary linear regression
def straight_line_data(n: int = 25, seed: int = 3) -> tuple[np.ndarray, np.ndarray]:
    """Synthetic: y = 2 - 0.7 x + N(0, 0.3^2) on x in [0, 10)."""
    rng = np.random.default_rng(seed)
    x = rng.uniform(0.0, 10.0, n)
    return x.reshape(-1, 1), 2.0 - 0.7 * x + rng.normal(0.0, 0.3, n)


def test_straight_line_standard_errors_match_scipy_linregress():
    X, y = straight_line_data()
    net = tp.Network([tp.Affine(1, 1)], seed=0)
    result = solve(net, X, y)
    uncertainty = parameter_uncertainty(net, result=result)
    reference = stats.linregress(X[:, 0], y)  # reference: scipy.stats.linregress
    np.testing.assert_allclose(uncertainty.theta, [reference.slope, reference.intercept], rtol=1e-12)
    np.testing.assert_allclose(
        uncertainty.standard_errors, [reference.stderr, reference.intercept_stderr], rtol=1e-10
    )
    # r = correlation of x and y; the slope-intercept correlation is -xbar / sqrt(mean(x^2)) (textbook)
    x = X[:, 0]
    assert uncertainty.correlation[0, 1] == pytest.approx(-x.mean() / np.sqrt(np.mean(x**2)), rel=1e-10)


@pytest.mark.parametrize("level", [0.5, 0.9, 0.95, 0.99])
def test_straight_line_intervals_match_textbook_formulas(level):
    X, y = straight_line_data()
    net = tp.Network([tp.Affine(1, 1)], seed=0)
    uncertainty = parameter_uncertainty(net, result=solve(net, X, y))
    x, n = X[:, 0], X.shape[0]
    x0 = np.array([-2.0, 0.0, 4.5, 10.0, 14.0])
    s = np.sqrt(np.sum((y - net.predict(X)[:, 0]) ** 2) / (n - 2))
    leverage = 1 / n + (x0 - x.mean()) ** 2 / np.sum((x - x.mean()) ** 2)
    t = stats.t.ppf((1 + level) / 2, n - 2)
    intervals = uncertainty.prediction_intervals(x0.reshape(-1, 1), level=level)
    np.testing.assert_allclose(intervals.mean_standard_error[:, 0], s * np.sqrt(leverage), rtol=1e-10)
    np.testing.assert_allclose(intervals.half_width[:, 0], t * s * np.sqrt(1 + leverage), rtol=1e-10)
    np.testing.assert_allclose(intervals.upper - intervals.prediction, intervals.half_width, rtol=1e-12)
    np.testing.assert_allclose(intervals.mean_upper - intervals.mean_lower, 2 * t * intervals.mean_standard_error)
    assert intervals.t_quantile == t and intervals.degrees_of_freedom == n - 2


def test_several_outputs_share_one_residual_variance():
    # Two outputs, each a plane in two inputs (synthetic). J^T J is block-diagonal, so each
    # output's standard errors are ordinary least squares with the pooled variance
    # s^2 = (RSS_1 + RSS_2) / (2 n - 6), the documented convention.
    rng = np.random.default_rng(7)
    n = 30
    X = rng.uniform(-1.0, 1.0, (n, 2))
    Y = np.column_stack([X @ [1.0, -2.0] + 0.5, X @ [0.3, 0.8] - 1.0]) + rng.normal(0.0, 0.1, (n, 2))
    net = tp.Network([tp.Affine(2, 2)], seed=0)
    uncertainty = parameter_uncertainty(net, result=solve(net, X, Y))
    design = np.column_stack([X, np.ones(n)])
    coef, rss, *_ = np.linalg.lstsq(design, Y, rcond=None)
    s2 = rss.sum() / (2 * n - 6)
    unscaled = np.linalg.inv(design.T @ design)  # small, well conditioned: an independent route
    assert uncertainty.residual_variance == pytest.approx(s2, rel=1e-10)
    # theta order: weight[0, :], weight[1, :], bias[0], bias[1]
    se = np.sqrt(s2 * np.diag(unscaled))
    np.testing.assert_allclose(uncertainty.standard_errors, [se[0], se[1], se[0], se[1], se[2], se[2]], rtol=1e-10)
    X0 = rng.uniform(-1.5, 1.5, (4, 2))
    D0 = np.column_stack([X0, np.ones(4)])
    mean_se = np.sqrt(s2 * np.einsum("ij,jk,ik->i", D0, unscaled, D0))
    intervals = uncertainty.prediction_intervals(X0)
    np.testing.assert_allclose(intervals.mean_standard_error, np.column_stack([mean_se, mean_se]), rtol=1e-10)
    np.testing.assert_allclose(intervals.prediction, D0 @ coef, rtol=1e-10)


# --------------------------------------------------------------------------- result object, report, bad inputs
def test_result_fields_are_consistent():
    problem, net, result = fit("Lanczos3", "start1", "levenberg-marquardt")
    u = parameter_uncertainty(net, result=result)
    assert u.labels == parameter_labels(net) and len(u.labels) == u.n_params == 6
    np.testing.assert_allclose(u.covariance, u.covariance.T, rtol=1e-14, atol=0)
    np.testing.assert_allclose(u.covariance, np.outer(u.standard_errors, u.standard_errors) * u.correlation, rtol=1e-12)
    assert np.all(np.abs(u.correlation) <= 1.0) and np.all(np.diag(u.correlation) == 1.0)
    assert u.residual_sd**2 == pytest.approx(u.residual_variance, rel=1e-15)
    assert u.n_residuals - u.n_params == u.degrees_of_freedom == 18
    assert u.condition_number == pytest.approx(u.singular_values[0] / u.singular_values[-1])
    np.testing.assert_array_equal(u.theta, result.theta)
    assert "residual_sd=" in repr(u) and "covariance" not in repr(u)


def test_float32_network_is_analysed_in_float64():
    problem, net, _ = fit("Misra1a", "start2", "levenberg-marquardt")
    net32 = net.copy(np.float32)
    before = net32.get_vector()
    u32 = parameter_uncertainty(net32, problem.x, problem.y)
    u64 = parameter_uncertainty(net, problem.x, problem.y)
    assert u32.theta.dtype == np.float64
    np.testing.assert_allclose(u32.standard_errors, u64.standard_errors, rtol=1e-5)  # theta rounded to float32
    np.testing.assert_array_equal(net32.get_vector(), before)


def test_report_is_plain_json():
    problem, net, _ = fit("Misra1a", "start1", "levenberg-marquardt")
    report = uncertainty_report(net, problem.x, problem.y, input_names=["x"], output_names=["y"])
    text = json.dumps(report, allow_nan=False)
    assert json.loads(text) == report
    parameters_part = report["parameters"]
    assert parameters_part["rank_deficient"] is False
    assert [p["label"] for p in parameters_part["parameters"]] == ["layer 0 weight[0, 0]", "layer 2 weight[0, 0]"]
    assert parameters_part["residual_sd"] == pytest.approx(problem.certified_residual_sd, rel=1e-6)
    half = report["prediction_interval"]["half_width_on_data"]["y"]
    assert 0 < half["mean"] <= half["max"]
    assert set(report["input_sensitivity"]["outputs"]["y"]["x"]) == {"mean_abs", "sd_abs", "mean"}


def test_bad_inputs_are_refused_and_nothing_is_modified():
    problem, net, result = fit("Misra1a", "start1", "levenberg-marquardt")
    x, y, theta = problem.x.copy(), problem.y.copy(), net.get_vector()
    with pytest.raises(TypeError, match="net must be a tinyprop Network"):
        parameter_uncertainty("net", problem.x, problem.y)
    with pytest.raises(TypeError, match="give the fitted data X and y, or result="):
        parameter_uncertainty(net, problem.x)
    with pytest.raises(TypeError, match="not both"):
        parameter_uncertainty(net, problem.x, problem.y, result=result)
    with pytest.raises(TypeError, match="result must be the SolveResult"):
        parameter_uncertainty(net, result="fit")
    with pytest.raises(ValueError, match=r"y must have shape \(14, 1\)"):
        parameter_uncertainty(net, problem.x, problem.y[:3])
    with pytest.raises(ValueError, match=r"X must have shape \(n_samples, 1\)"):
        parameter_uncertainty(net, problem.x.T, problem.y)
    with pytest.raises(ValueError, match="no degrees of freedom .* 2 residuals .* for 2 parameters"):
        parameter_uncertainty(net, problem.x[:2], problem.y[:2])
    overflowing = build("Misra1a", [500.0, -10.0])  # exp(10 x) overflows to inf on the data
    with np.errstate(over="ignore", invalid="ignore"):
        with pytest.raises(ValueError, match=r"the residual vector \(network output - y\) has a non-finite value"):
            parameter_uncertainty(overflowing, problem.x, problem.y)
    other = fit("Rat42", "start1", "levenberg-marquardt")[2]
    with pytest.raises(ValueError, match="result does not belong to this network: it has 3 parameters"):
        parameter_uncertainty(net, result=other)
    moved = net.copy()
    moved.set_vector(theta * 1.01)
    with pytest.raises(ValueError, match="differ from result.theta"):
        parameter_uncertainty(moved, result=result)
    u = parameter_uncertainty(net, result=result)
    for level in (0.0, 1.0, 95):
        with pytest.raises(ValueError, match="level must be a finite number in"):
            u.prediction_intervals(problem.x, level=level)
    with pytest.raises(TypeError, match="level must be a real number"):
        u.prediction_intervals(problem.x, level="95%")
    with pytest.raises(ValueError, match="non-finite value"):
        u.prediction_intervals(np.array([[np.nan]]))
    with pytest.raises(ValueError, match=r"y must have shape \(14, 1\)"):
        u.prediction_intervals(problem.x).contains(problem.y[:4])
    np.testing.assert_array_equal(problem.x, x)
    np.testing.assert_array_equal(problem.y, y)
    np.testing.assert_array_equal(net.get_vector(), theta)
    assert issubclass(RankDeficientError, ValueError)


def lre_table() -> str:
    """LRE of every certified standard deviation and of the residual SD, both starts (Markdown)."""
    lines = [
        "| problem | start | LRE sd(b1..bk) | LRE residual sd | condition number (column-scaled J) |",
        "|---|---|---|---|---|",
    ]
    for name in PROBLEMS:
        for start in STARTS:
            sd_lre, residual_lre, uncertainty = certified_comparison(name, start)
            sds = " ".join(f"{v:.1f}" for v in sd_lre)
            lines.append(f"| {name} | {start[-1]} | {sds} | {residual_lre:.1f} | {uncertainty.condition_number:.3g} |")
    return "\n".join(lines)


if __name__ == "__main__":
    print(lre_table())


def test_uncertainty_from_the_solve_result_equals_the_one_from_the_data():
    """parameter_uncertainty(net, result=...) uses the SolveResult's float64 Jacobian and residuals."""
    problem = load_nist("Rat42")
    net = build("Rat42", problem.start1)
    result = tp.solve(net, problem.x, problem.y)
    direct = tp.parameter_uncertainty(net, problem.x, problem.y)
    np.testing.assert_allclose(tp.parameter_uncertainty(net, result=result).standard_errors, direct.standard_errors,
                               rtol=1e-10)
