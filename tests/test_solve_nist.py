"""Second-order fitting against NIST StRD certified values.

Reference: NIST/ITL Statistical Reference Datasets, nonlinear regression
(https://www.itl.nist.gov/div898/strd/), certified parameter values and
residual sums of squares to 11 significant digits (bundled in
``tinyprop/datasets/nist``, see its PROVENANCE.md). Accuracy measure: the log
relative error LRE = -log10(|estimate - certified| / |certified|)
(McCullough (1998), The American Statistician 52(4)), capped at 11, the number
of digits NIST certifies.

Each model is written as a network (mapping as in the datasets' PROVENANCE
table): Rat42 uses the built-in Sigmoid; Misra1a, Misra1b, Misra1d and
Lanczos3 use the custom activations below, each verified with
``check_activation`` on points where it is defined. Both NIST starting vectors
are used as published.

Bars (from issue 3): Levenberg-Marquardt, LRE >= 6 for every parameter and
>= 8 for the RSS from both starts; L-BFGS, LRE >= 4 for the RSS.

Run ``python tests/test_solve_nist.py`` to print the LRE table.
"""

from __future__ import annotations

import sys

import numpy as np
import pytest

import tinyprop as tp
from fake_terminal import FakeTerminal
from tinyprop.datasets import load_nist
from tinyprop.solve import solve

PROBLEMS = ("Rat42", "Misra1a", "Misra1b", "Misra1d", "Lanczos3")
LRE_CAP = 11.0


class OneMinusExp(tp.Activation):
    """Misra1a: ``f(z) = 1 - exp(-z)``, ``f'(z) = exp(-z)``."""

    def value(self, z):
        return -np.expm1(-z)

    def derivative(self, z, a):
        return np.exp(-z)


class OneMinusInverseSquare(tp.Activation):
    """Misra1b: ``f(z) = 1 - (1 + z/2)**-2``, ``f'(z) = (1 + z/2)**-3``; pole at z = -2."""

    def value(self, z):
        return 1.0 - (1.0 + z / 2) ** -2

    def derivative(self, z, a):
        return (1.0 + z / 2) ** -3


class Saturation(tp.Activation):
    """Misra1d: ``f(z) = z / (1 + z)``, ``f'(z) = (1 + z)**-2``; pole at z = -1."""

    def value(self, z):
        return z / (1.0 + z)

    def derivative(self, z, a):
        return (1.0 + z) ** -2


class Decay(tp.Activation):
    """Lanczos3: ``f(z) = exp(-z)``, ``f'(z) = -exp(-z) = -a``."""

    def value(self, z):
        return np.exp(-z)

    def derivative(self, z, a):
        return -a


# Points for check_activation: the data give z = b2 * x in about [0, 0.8]
# (Misra) and z = b * x in [0, 9] (Lanczos3); the grids cover that with room,
# and stay clear of exp overflow and, by more than check_activation's
# differencing step of 0.5, of the poles.
ACTIVATIONS = {
    "Misra1a": (OneMinusExp(), np.linspace(-5.0, 20.0, 101)),
    "Misra1b": (OneMinusInverseSquare(), np.linspace(-1.25, 20.0, 86)),
    "Misra1d": (Saturation(), np.linspace(-0.25, 20.0, 82)),
    "Lanczos3": (Decay(), np.linspace(-5.0, 20.0, 101)),
}


def build(name: str, b: np.ndarray) -> tp.Network:
    """The NIST model ``name`` as a network with parameters ``b = (b1, ..., bk)``."""
    b = np.asarray(b, dtype=np.float64)
    if name == "Rat42":  # b1 / (1 + exp(b2 - b3 x)) = b1 * sigmoid(b3 x - b2)
        inner, outer = tp.Affine(1, 1), tp.Affine(1, 1, bias=False)
        inner.weight[0, 0], inner.bias[0], outer.weight[0, 0] = b[2], -b[1], b[0]
        return tp.Network([inner, tp.Sigmoid(), outer], init=None)
    if name == "Lanczos3":  # sum_j b_{2j-1} exp(-b_{2j} x)
        inner, outer = tp.Affine(1, 3, bias=False), tp.Affine(3, 1, bias=False)
        inner.weight[:, 0], outer.weight[0, :] = b[[1, 3, 5]], b[[0, 2, 4]]
        return tp.Network([inner, ACTIVATIONS[name][0], outer], init=None)
    inner, outer = tp.Affine(1, 1, bias=False), tp.Affine(1, 1, bias=False)  # b1 * f(b2 x)
    inner.weight[0, 0], outer.weight[0, 0] = b[1], b[0]
    return tp.Network([inner, ACTIVATIONS[name][0], outer], init=None)


def parameters(name: str, net: tp.Network) -> np.ndarray:
    """Map the network's weights back to ``b1, ..., bk``."""
    p = net.params
    if name == "Rat42":
        return np.array([p[2][0, 0], -p[1][0], p[0][0, 0]])
    if name == "Lanczos3":
        b = np.empty(6)
        b[[1, 3, 5]], b[[0, 2, 4]] = p[0][:, 0], p[1][0, :]
        return b
    return np.array([p[1][0, 0], p[0][0, 0]])


def lre(estimate, certified) -> np.ndarray:
    """Log relative error, capped at the 11 certified digits."""
    error = np.abs(np.asarray(estimate, dtype=np.float64) - certified) / np.abs(certified)
    with np.errstate(divide="ignore"):
        return np.minimum(-np.log10(error), LRE_CAP)


def fit(name: str, start: str, method: str):
    problem = load_nist(name)
    net = build(name, getattr(problem, start))
    result = solve(net, problem.x, problem.y, method=method)
    return problem, net, result


@pytest.mark.parametrize("name", sorted(ACTIVATIONS))
def test_custom_activations_pass_check_activation(name):
    activation, points = ACTIVATIONS[name]
    report = tp.check_activation(activation, points=points)
    assert report.passed, str(report)


@pytest.mark.parametrize("start", ["start1", "start2"])
@pytest.mark.parametrize("name", PROBLEMS)
def test_levenberg_marquardt_reproduces_certified_values(name, start):
    problem, net, result = fit(name, start, "levenberg-marquardt")
    assert result.success, result.message
    b = parameters(name, net)
    assert np.all(lre(b, problem.certified) >= 6.0), (b, problem.certified, lre(b, problem.certified))
    assert lre(result.rss, problem.certified_rss) >= 8.0
    np.testing.assert_array_equal(net.get_vector(), result.theta)


@pytest.mark.parametrize("start", ["start1", "start2"])
@pytest.mark.parametrize("name", PROBLEMS)
def test_lbfgs_reaches_certified_rss(name, start):
    problem, net, result = fit(name, start, "lbfgs")
    assert lre(result.rss, problem.certified_rss) >= 4.0, result
    assert result.rss == pytest.approx(2 * result.loss)


@pytest.mark.parametrize("name", PROBLEMS)
def test_kept_jacobian_gives_certified_standard_deviations(name):
    # NIST certifies sd(b_j) = sqrt(s^2 [(J^T J)^-1]_jj), s^2 = RSS / (n - k). The kept
    # Jacobian is in network parameters; the map to b is linear with slopes +-1
    # (Rat42's bias is -b2), so the standard deviations carry over unchanged.
    problem, net, result = fit(name, "start2", "levenberg-marquardt")
    n, k = result.jacobian.shape
    s2 = result.rss / (n - k)
    sd_theta = np.sqrt(s2 * np.diag(np.linalg.inv(result.jacobian.T @ result.jacobian)))
    probe = net.copy()
    probe.set_vector(sd_theta)
    sd_b = np.abs(parameters(name, probe))
    assert np.all(lre(sd_b, problem.certified_sd) >= 4.0), lre(sd_b, problem.certified_sd)


def test_result_carries_residuals_and_jacobian_at_the_solution():
    problem, net, result = fit("Rat42", "start1", "levenberg-marquardt")
    np.testing.assert_array_equal(result.residuals, net.predict(problem.x).ravel() - problem.y)
    np.testing.assert_array_equal(result.jacobian, net.jacobian(problem.x))
    assert result.rss == pytest.approx(float(result.residuals @ result.residuals), rel=1e-15)
    scale = np.linalg.norm(result.jacobian, 2) * np.linalg.norm(result.residuals)
    assert result.gradient_norm < 1e-8 * scale  # J^T r = 0 at a least-squares minimum
    assert result.iterations == result.jacobian_evaluations <= result.function_evaluations


def test_float32_network_is_fitted_in_float64_and_rounded_back():
    problem = load_nist("Misra1a")
    net = build("Misra1a", problem.start2).copy(np.float32)
    x_before = problem.x.copy()
    result = solve(net, problem.x, problem.y)
    assert net.dtype == np.float32 and result.theta.dtype == np.float64
    np.testing.assert_array_equal(net.get_vector(), result.theta.astype(np.float32))
    assert np.all(lre(parameters("Misra1a", net), problem.certified) >= 6.0)  # float32 keeps ~7 digits
    np.testing.assert_array_equal(problem.x, x_before)


def test_bad_inputs_are_refused():
    problem = load_nist("Misra1a")
    net = build("Misra1a", problem.start1)
    before = net.get_vector()
    with pytest.raises(ValueError, match="method must be one of"):
        solve(net, problem.x, problem.y, method="newton")
    with pytest.raises(ValueError, match="at least as many residuals as parameters: 1 residuals"):
        solve(net, problem.x[:1], problem.y[:1])
    with pytest.raises(ValueError, match=r"y must have shape \(14, 1\)"):
        solve(net, problem.x, problem.y[:5])
    with pytest.raises(ValueError, match="tolerance must be"):
        solve(net, problem.x, problem.y, tolerance=1e-17)
    with pytest.raises(TypeError, match="net must be a tinyprop Network"):
        solve("net", problem.x, problem.y)
    bad = build("Misra1a", [500.0, -10.0])  # exp(10 x) overflows: non-finite at the start
    with np.errstate(over="ignore"):
        with pytest.raises(ValueError, match="residuals at the starting weights are not finite"):
            solve(bad, problem.x, problem.y)
    np.testing.assert_array_equal(net.get_vector(), before)


def test_progress_shows_evaluations_and_the_lowest_rss_on_stderr(capsys):
    problem = load_nist("Misra1a")
    net = build("Misra1a", problem.start1)
    result = solve(net, problem.x, problem.y, progress=True)
    lines = capsys.readouterr().err.splitlines()
    assert lines and "\r" not in "".join(lines)  # not a terminal: one plain line per update
    final = lines[-1]
    assert final.startswith("levenberg-marquardt: ") and " Jacobians, lowest rss " in final
    evaluations = int(final.split(": ")[1].split(" of at most ")[0])
    assert abs(evaluations - result.function_evaluations) <= 1  # MINPACK's own count may include one more
    lowest = float(final.split("lowest rss ")[1].split(",")[0])
    assert lowest == pytest.approx(result.rss, rel=1e-5)  # printed with 6 significant digits
    solve(build("Misra1a", problem.start1), problem.x, problem.y, method="lbfgs")
    assert capsys.readouterr().err == ""  # silent unless asked


def test_progress_rewrites_one_line_on_a_terminal_and_refuses_non_booleans(monkeypatch):
    monkeypatch.setattr(sys, "stderr", terminal := FakeTerminal())
    problem = load_nist("Misra1a")
    solve(build("Misra1a", problem.start1), problem.x, problem.y, method="lbfgs", progress=True)
    text = terminal.getvalue()
    assert text.startswith("\rlbfgs: ") and text.endswith("\n") and text.count("\n") == 1 and " gradients, " in text
    with pytest.raises(TypeError, match="progress must be True or False"):
        solve(build("Misra1a", problem.start1), problem.x, problem.y, progress="yes")


def lre_table() -> str:
    """The LRE of every parameter and of the RSS, both starts, both methods (Markdown)."""
    lines = ["| problem | start | method | LRE b1..bk | LRE RSS | iterations |", "|---|---|---|---|---|---|"]
    for name in PROBLEMS:
        for start in ("start1", "start2"):
            for method in ("levenberg-marquardt", "lbfgs"):
                problem, net, result = fit(name, start, method)
                b = " ".join(f"{v:.1f}" for v in lre(parameters(name, net), problem.certified))
                lines.append(
                    f"| {name} | {start[-1]} | {method} | {b} | {lre(result.rss, problem.certified_rss):.1f} "
                    f"| {result.iterations} |"
                )
    return "\n".join(lines)


if __name__ == "__main__":
    print(lre_table())

