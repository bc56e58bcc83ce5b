"""tp.output_bounds and tp.gradient_bounds: soundness, tightness, monotonicity, errors.

Networks, boxes and weights here are synthetic (hypothesis draws them). The
external references are: ``net.predict`` and ``net.input_gradient`` themselves
(the bounds must hold for the network as evaluated), scipy.optimize's
L-BFGS-B local minima from sampled starts, and, for one-input networks, the
exact range from a dense grid refined by bracketing (scipy.optimize.minimize_scalar).
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import tinyprop as tp
from net_strategies import BUILT_IN_ACTIVATIONS, networks

SOUNDNESS = settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@st.composite
def boxed_networks(draw, max_width: int = 6):
    """A network of depth 1-4 with random (non-zero) biases, and a box of its inputs."""
    net = draw(networks(max_depth=4, max_width=max_width))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    theta = net.get_vector().astype(np.float64)
    net.set_vector(theta + 0.3 * rng.normal(size=theta.size))
    centre = rng.normal(scale=2.0, size=net.n_in)
    half = rng.uniform(0.0, 2.0, size=net.n_in) * draw(st.sampled_from([0.0, 1e-6, 0.1, 1.0]))  # 0: one point
    return net, centre - half, centre + half, rng


def _probe_points(rng, low, high, n):
    """Uniform points, all corners and the centre of the box."""
    bits = (np.arange(2 ** low.size)[:, None] >> np.arange(low.size)) & 1
    corners = np.where(bits == 1, high, low)
    return np.concatenate([low + rng.uniform(size=(n, low.size)) * (high - low), corners, [0.5 * (low + high)]])


def _local_extremes(net, low, high, rng, k, starts=4):
    """End points of L-BFGS-B (scipy.optimize) minimising and maximising output k from random starts."""
    from scipy.optimize import minimize

    ends = []
    for sign in (1.0, -1.0):
        def fun(x, sign=sign):
            row = x.reshape(1, -1)
            return sign * float(net.predict(row)[0, k]), sign * net.input_gradient(row)[0, k].astype(np.float64)

        for x0 in low + rng.uniform(size=(starts, low.size)) * (high - low):
            result = minimize(fun, x0, jac=True, method="L-BFGS-B", bounds=list(zip(low, high)))
            ends.append(np.clip(result.x, low, high))
    return np.array(ends)


@SOUNDNESS
@given(case=boxed_networks())
def test_output_bounds_hold_at_random_points_corners_and_local_extremes(case):
    net, low, high, rng = case
    result = tp.output_bounds(net, low, high, tolerance=1e-4, max_splits=30)
    points = _probe_points(rng, low, high, 2000)
    points = np.concatenate([points, *(_local_extremes(net, low, high, rng, k) for k in range(net.n_out))])
    y = net.predict(points)
    assert np.all(y >= result.lower), np.max(result.lower - y)
    assert np.all(y <= result.upper), np.max(y - result.upper)
    # the witnesses lie in the box and give the reported values
    for inputs, found in ((result.lowest_input, result.lowest_found), (result.highest_input, result.highest_found)):
        assert np.all((inputs >= low) & (inputs <= high))
        singly = [net.predict(x[None, :])[0, k] for k, x in enumerate(inputs)]
        assert np.array_equal(singly, found.astype(net.dtype))
    assert np.all(result.lower <= result.lowest_found) and np.all(result.highest_found <= result.upper)


@SOUNDNESS
@given(case=boxed_networks(max_width=4))
def test_gradient_bounds_hold_at_random_points_and_corners(case):
    net, low, high, rng = case
    result = tp.gradient_bounds(net, low, high, max_splits=10)
    G = net.input_gradient(_probe_points(rng, low, high, 2000))
    assert np.all(G >= result.lower), np.max(result.lower - G)
    assert np.all(G <= result.upper), np.max(G - result.upper)
    assert np.all(result.lipschitz >= np.abs(G).max(axis=0))
    for pairs, falls in ((result.falling_pairs, True), (result.rising_pairs, False)):
        for (k, j), (a, b) in pairs.items():  # every witness pair is real
            assert b[j] > a[j] and np.array_equal(np.delete(a, j), np.delete(b, j))
            ya, yb = net.predict(np.stack([a, b]))[:, k]
            assert (yb < ya) if falls else (yb > ya)
            assert result.direction[k, j] == 0


def _tanh_1_32_32_1(seed: int) -> tp.Network:
    """Synthetic weights: Glorot draws plus normal biases of scale 0.5."""
    net = tp.Network([tp.Affine(1, 32), tp.Tanh(), tp.Affine(32, 32), tp.Tanh(), tp.Affine(32, 1)], seed=seed)
    for layer in net.layers:
        if isinstance(layer, tp.Affine):
            layer.bias[...] = np.random.default_rng(seed + 1).normal(scale=0.5, size=layer.bias.shape)
    return net


def _exact_range(net, low, high):
    """Range of a one-input network: a dense grid, each grid minimum refined by bracketing (scipy)."""
    from scipy.optimize import minimize_scalar

    x = np.linspace(low, high, 20001)
    extremes = []
    for sign in (1.0, -1.0):
        y = sign * net.predict(x.reshape(-1, 1))[:, 0]
        best = y.min()
        local = np.flatnonzero((y[1:-1] <= y[:-2]) & (y[1:-1] <= y[2:])) + 1
        for i in local:
            found = minimize_scalar(lambda t, sign=sign: sign * net.predict([[t]])[0, 0], bounds=(x[i - 1], x[i + 1]),
                                    method="bounded", options={"xatol": 1e-12})
            best = min(best, found.fun)
        extremes.append(sign * min(best, y[0], y[-1]))
    return extremes[0], extremes[1]


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_tanh_1_32_32_1_reaches_a_gap_of_1e_6_of_the_range(seed):
    """Issue 18: gap <= 1e-6 of the output range; a split budget instead of a clock."""
    net = _tanh_1_32_32_1(seed)
    result = tp.output_bounds(net, -3.0, 3.0, tolerance=1e-6, max_seconds=600.0, max_splits=5000)
    low, high = _exact_range(net, -3.0, 3.0)
    span = high - low
    assert result.stopped == (("tolerance", "tolerance"),)
    assert result.met
    assert result.lower[0] <= low <= result.lowest_found[0] + 1e-12 * span
    assert result.highest_found[0] - 1e-12 * span <= high <= result.upper[0]
    assert low - result.lower[0] <= 1e-6 * span and result.upper[0] - high <= 1e-6 * span


def test_one_input_range_is_tight_for_every_activation():
    for activation in BUILT_IN_ACTIVATIONS:
        net = tp.Network([tp.Affine(1, 8), activation, tp.Affine(8, 8), activation, tp.Affine(8, 1)], seed=3)
        net.set_vector(net.get_vector() + np.random.default_rng(4).normal(scale=0.3, size=net.n_params))
        result = tp.output_bounds(net, -2.0, 2.5, tolerance=1e-6, max_splits=3000)
        low, high = _exact_range(net, -2.0, 2.5)
        span = max(high - low, 1e-300)
        assert result.lower[0] <= low and high <= result.upper[0]
        assert low - result.lower[0] <= 1e-6 * span and result.upper[0] - high <= 1e-6 * span, activation


MONOTONE = tuple(a for a in BUILT_IN_ACTIVATIONS)  # every built-in is non-decreasing


@settings(max_examples=20, deadline=None)
@given(net=networks(max_depth=4, max_width=4, activations=MONOTONE), data=st.data())
def test_networks_built_monotone_are_certified(net, data):
    """Non-negative weights and non-decreasing activations: every output non-decreasing in every input."""
    for layer in net.layers:
        if isinstance(layer, tp.Affine):
            layer.weight[...] = np.abs(layer.weight)
    low = np.array(data.draw(st.lists(st.floats(-5, 5), min_size=net.n_in, max_size=net.n_in)))
    high = low + data.draw(st.floats(0.0, 4.0))
    result = tp.gradient_bounds(net, low, high, max_splits=0)
    assert np.all(result.direction == 1)
    assert not result.falling_pairs


def _valley(scale: float, centre: float, dtype) -> tp.Network:
    """Synthetic: y = softplus(s (x - c)) + softplus(-s (x - c)), falling before c and rising after."""
    net = tp.Network([tp.Affine(1, 2), tp.Softplus(), tp.Affine(2, 1, bias=False)], init=None, dtype=dtype)
    net.set_vector([scale, -scale, -scale * centre, scale * centre, 1.0, 1.0])
    return net


@settings(max_examples=20, deadline=None)
@given(scale=st.floats(0.2, 5.0), centre=st.floats(-3, 3), left=st.floats(0.1, 3), right=st.floats(0.1, 3),
       dtype=st.sampled_from([np.float64, np.float32]))
def test_a_network_with_a_reversal_is_never_certified_and_its_witnesses_hold(scale, centre, left, right, dtype):
    net = _valley(scale, centre, dtype)
    low, high = centre - left, centre + right
    result = tp.gradient_bounds(net, low, high, max_splits=20)
    assert result.direction[0, 0] == 0
    for pairs, falls in ((result.falling_pairs, True), (result.rising_pairs, False)):
        a, b = pairs[(0, 0)]
        ya, yb = net.predict(np.stack([a, b]))[:, 0]
        assert b[0] > a[0] and low <= a[0] and b[0] <= high
        assert (yb < ya) if falls else (yb > ya)


def test_float32_network_bounds_cover_its_own_evaluation():
    """A float32 network is bounded as it computes, input rounding included (the box's ends are not float32)."""
    net = tp.Network([tp.Affine(2, 16), tp.Tanh(), tp.Affine(16, 16), tp.Sigmoid(), tp.Affine(16, 1)], seed=5,
                     dtype=np.float32)
    low, high = np.array([0.1, -0.3]), np.array([0.1 + 1e-7, -0.3 + 1e-7])  # a box narrower than float32's steps
    result = tp.output_bounds(net, low, high)
    X = np.random.default_rng(0).uniform(low, high, size=(1000, 2))
    y = net.predict(X)
    assert np.all((y >= result.lower) & (y <= result.upper))
    assert result.stopped[0][0] in ("tolerance", "rounding")


def test_the_caller_s_arrays_are_not_modified_and_results_print():
    net = tp.Network([tp.Standardize([1.0], [2.0]), tp.Affine(1, 3), tp.LeakyReLU(0.1), tp.Affine(3, 2),
                      tp.Unstandardize([0.0, 1.0], [2.0, 3.0])], seed=2)
    low, high = np.array([-1.0]), np.array([1.0])
    before = net.get_vector()
    out = tp.output_bounds(net, low, high, max_splits=50)
    slopes = tp.gradient_bounds(net, low, high, max_splits=50)
    assert np.array_equal(low, [-1.0]) and np.array_equal(high, [1.0]) and np.array_equal(net.get_vector(), before)
    assert "output 1:" in str(out) and "d output 1 / d input 0" in str(slopes)
    assert out.lower.shape == (2,) and slopes.lower.shape == (2, 1) and slopes.lipschitz.shape == (2, 1)


@pytest.mark.parametrize(
    "low, high, options, error, message",
    [
        ([0.0], [1.0], {}, ValueError, r"one number per network input \(2\), got shape \(1,\)"),
        ([0.0, 2.0], [1.0, 1.0], {}, ValueError, r"low\[1\] = 2.0 > high\[1\] = 1.0"),
        ([0.0, np.nan], [1.0, 1.0], {}, ValueError, "non-finite"),
        ([0.0, 0.0], [1.0, 1.0], {"tolerance": -1.0}, ValueError, "tolerance must be"),
        ([0.0, 0.0], [1.0, 1.0], {"max_seconds": 0}, ValueError, "max_seconds must be"),
        ([0.0, 0.0], [1.0, 1.0], {"max_splits": 1.5}, ValueError, "max_splits must be"),
        ([0.0, 0.0], [1.0, 1.0], {"seed": -1}, ValueError, "seed must be"),
        ([[0.0, 0.0]], [1.0, 1.0], {}, ValueError, "one number per network input"),
        (["a", "b"], [1.0, 1.0], {}, TypeError, "real numbers"),
    ],
)
def test_bad_arguments_are_refused(low, high, options, error, message):
    net = tp.Network([tp.Affine(2, 1)], seed=0)
    for function in (tp.output_bounds, tp.gradient_bounds):
        with pytest.raises(error, match=message):
            function(net, low, high, **options)
    with pytest.raises(TypeError, match="tinyprop.Network"):
        tp.output_bounds("model.npz", [0.0], [1.0])
    small = tp.Network([tp.Affine(1, 1)], seed=0, dtype=np.float32)
    with pytest.raises(ValueError, match="high has a non-finite value.*after conversion from float64 to float32"):
        tp.output_bounds(small, [0.0], [1e39])


@pytest.mark.slow
@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(case=boxed_networks(max_width=10))
def test_bounds_hold_at_100000_random_points(case):
    """Issue 18's soundness check at full size: 10**5 random points per network, values and slopes."""
    net, low, high, rng = case
    result = tp.output_bounds(net, low, high, tolerance=1e-5, max_seconds=5.0)
    slopes = tp.gradient_bounds(net, low, high, max_seconds=5.0)
    points = _probe_points(rng, low, high, 100_000)
    y = net.predict(points)
    assert np.all((y >= result.lower) & (y <= result.upper))
    G = net.input_gradient(points)
    assert np.all((G >= slopes.lower) & (G <= slopes.upper))


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_rounding_of_the_evaluation_is_covered_on_single_points(dtype):
    """On boxes of one point the bounds meet the computed values within rounding: each must cover them.

    Synthetic wide affine layers with cancelling terms make float32 and float64
    evaluations differ by many ulps; without the gamma_n margins this fails.
    """
    from tinyprop.bounds._program import Program
    from tinyprop.bounds._relax import linear_lower_bound, tight_intervals
    from tinyprop.bounds._slopes import gradient_intervals

    rng = np.random.default_rng(7)
    for layers in ([tp.Affine(64, 3)], [tp.Affine(64, 32), tp.Identity(), tp.Affine(32, 2)],
                   [tp.Affine(64, 48), tp.Affine(48, 2)],
                   [tp.Standardize(np.full(64, 0.3), np.full(64, 0.7)), tp.Affine(64, 16), tp.Tanh(),
                    tp.Affine(16, 2)]):
        net = tp.Network(layers, seed=int(rng.integers(1000)), dtype=dtype)
        net.set_vector(rng.normal(scale=10.0, size=net.n_params))
        X = rng.normal(scale=100.0, size=(2000, 64)).astype(dtype).astype(np.float64)
        program = Program(net)
        y = net.predict(X).astype(np.float64)
        for found in (program.intervals(X, X), tight_intervals(program, X, X)):
            assert np.all((y >= found.lo[-1]) & (y <= found.hi[-1]))
        for k in range(net.n_out):
            objective = np.eye(net.n_out)[k]
            assert np.all(y[:, k] >= linear_lower_bound(program, found, objective))
            assert np.all(y[:, k] <= -linear_lower_bound(program, found, -objective))
            g_lo, g_hi = gradient_intervals(program, found, k)
            G = net.input_gradient(X)[:, k, :]
            assert np.all((G >= g_lo) & (G <= g_hi))
