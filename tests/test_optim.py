"""Optimizers and learning-rate schedules.

References named beside each check:
- Kingma & Ba (2015), "Adam: A Method for Stochastic Optimization", ICLR, Algorithm 1;
- Loshchilov & Hutter (2019), "Decoupled Weight Decay Regularization", ICLR, Algorithm 2;
- Sutskever, Martens, Dahl & Hinton (2013), ICML, eq. (3)-(4) (momentum, Nesterov);
- Goodfellow, Bengio & Courville (2016), "Deep Learning", Algorithm 8.5 (RMSProp, from memory);
- Pascanu, Mikolov & Bengio (2013), ICML, Algorithm 1 (gradient-norm clipping);
- Loshchilov & Hutter (2017), "SGDR", ICLR, eq. (5) (cosine schedule).
The reference loops below are written directly from those formulas, in the
papers' notation, independently of tinyprop's in-place implementation.
Test data are synthetic (seeded random arrays).
"""

from __future__ import annotations

import json
import math
import re
import tracemalloc

import numpy as np
import pytest

from tinyprop.optim import SGD, Adam, OptimizerState, RMSProp, optimizer_from_state
from tinyprop.schedules import CosineSchedule, ExponentialSchedule, LinearWarmUp, StepSchedule

SHAPES = [(3, 4), (3,), (1, 3)]


def _params_and_grads(seed: int, n_steps: int, dtype=np.float64):
    rng = np.random.default_rng(seed)
    params = [rng.normal(size=s).astype(dtype) for s in SHAPES]
    grads = [[rng.normal(size=s).astype(dtype) for s in SHAPES] for _ in range(n_steps)]
    return params, grads


# ----------------------------------------------------------------- reference formulas
def _reference_sgd(theta, grads, lr, mu, nesterov, eta):
    v = np.zeros_like(theta)
    for t, g in enumerate(grads):
        lr_t = lr * eta(t)
        v_new = mu * v - lr_t * g  # Sutskever et al. (2013) eq. (3), gradient at current theta
        theta = theta + (mu * v_new - lr_t * g if nesterov else v_new)
        v = v_new
    return theta


def _reference_rmsprop(theta, grads, lr, rho, delta, eta):
    r = np.zeros_like(theta)
    for t, g in enumerate(grads):
        r = rho * r + (1 - rho) * g * g  # Goodfellow et al. (2016), Algorithm 8.5
        theta = theta - lr * eta(t) * g / np.sqrt(delta + r)
    return theta


def _reference_adamw(theta, grads, alpha, b1, b2, eps, lam, eta):
    m = np.zeros_like(theta)
    v = np.zeros_like(theta)
    for t, g in enumerate(grads, start=1):
        m = b1 * m + (1 - b1) * g  # Kingma & Ba (2015), Algorithm 1
        v = b2 * v + (1 - b2) * g**2
        m_hat = m / (1 - b1**t)
        v_hat = v / (1 - b2**t)
        # Loshchilov & Hutter (2019), Algorithm 2, line 12
        theta = theta - eta(t - 1) * (alpha * m_hat / (np.sqrt(v_hat) + eps) + lam * theta)
    return theta


def _constant(t):
    return 1.0


CASES = [
    ("sgd", lambda s: SGD(0.1, schedule=s), lambda th, gs, eta: _reference_sgd(th, gs, 0.1, 0.0, False, eta)),
    ("momentum", lambda s: SGD(0.1, momentum=0.8, schedule=s), lambda th, gs, eta: _reference_sgd(th, gs, 0.1, 0.8,
                                                                                                  False, eta)),
    (
        "nesterov",
        lambda s: SGD(0.1, momentum=0.8, nesterov=True, schedule=s),
        lambda th, gs, eta: _reference_sgd(th, gs, 0.1, 0.8, True, eta),
    ),
    (
        "rmsprop",
        lambda s: RMSProp(0.01, beta=0.85, epsilon=1e-6, schedule=s),
        lambda th, gs, eta: _reference_rmsprop(th, gs, 0.01, 0.85, 1e-6, eta),
    ),
    (
        "adam",
        lambda s: Adam(0.01, beta1=0.8, beta2=0.95, epsilon=1e-7, schedule=s),
        lambda th, gs, eta: _reference_adamw(th, gs, 0.01, 0.8, 0.95, 1e-7, 0.0, eta),
    ),
    (
        "adamw",
        lambda s: Adam(0.01, decoupled_decay=0.05, schedule=s),
        lambda th, gs, eta: _reference_adamw(th, gs, 0.01, 0.9, 0.999, 1e-8, 0.05, eta),
    ),
]


@pytest.mark.parametrize("name,make,reference", CASES, ids=[c[0] for c in CASES])
@pytest.mark.parametrize("with_schedule", [False, True])
def test_update_matches_published_formula(name, make, reference, with_schedule):
    schedule = LinearWarmUp(3, then=CosineSchedule(10, floor=0.1)) if with_schedule else None
    eta = schedule.multiplier if schedule is not None else _constant
    params, grads = _params_and_grads(0, 12)
    expected = [reference(p.copy(), [g[i] for g in grads], eta) for i, p in enumerate(params)]
    opt = make(schedule)
    for g in grads:
        opt.update(params, g)
    assert opt.steps == 12
    for got, want in zip(params, expected):
        np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-14)


def test_first_adam_step_has_size_lr():
    # Kingma & Ba (2015), section 2.1: with bias correction the first effective
    # step is alpha * g / |g| (up to epsilon) in every coordinate.
    theta = np.array([0.0, 0.0, 0.0])
    Adam(lr=0.01).update([theta], [np.array([1e-3, -5.0, 300.0])])
    np.testing.assert_allclose(theta, [-0.01, 0.01, -0.01], rtol=1e-4)


def test_decoupled_decay_alone_shrinks_geometrically():
    # Loshchilov & Hutter (2019), Algorithm 2 with g = 0: theta_t = (1 - eta lambda)^t theta_0.
    theta = np.array([2.0, -3.0])
    opt = Adam(lr=0.1, decoupled_decay=0.2, schedule=StepSchedule(every=2, factor=0.5))
    for _ in range(5):
        opt.update([theta], [np.zeros(2)])
    shrink = (1 - 0.2) ** 2 * (1 - 0.1) ** 2 * (1 - 0.05)
    np.testing.assert_allclose(theta, np.array([2.0, -3.0]) * shrink, rtol=1e-14)


def test_gradient_clipping_scales_to_the_norm_and_leaves_grads_alone():
    # Pascanu et al. (2013), Algorithm 1: g <- c g / ||g|| when ||g|| > c.
    params = [np.zeros(2), np.zeros(1)]
    grads = [np.array([3.0, 0.0]), np.array([4.0])]  # global norm 5
    before = [g.copy() for g in grads]
    SGD(1.0, clip_norm=1.0).update(params, grads)
    np.testing.assert_allclose(params[0], [-0.6, 0.0])
    np.testing.assert_allclose(params[1], [-0.8])
    for g, b in zip(grads, before):
        np.testing.assert_array_equal(g, b)
    params = [np.zeros(2), np.zeros(1)]
    SGD(1.0, clip_norm=10.0).update(params, grads)  # below the limit: unchanged gradient
    np.testing.assert_allclose(params[0], [-3.0, 0.0])


def test_schedules_follow_their_formulas():
    t = np.arange(30)
    np.testing.assert_allclose([StepSchedule(7, 0.3).multiplier(k) for k in t], 0.3 ** (t // 7))
    np.testing.assert_allclose([ExponentialSchedule(0.5, every=4).multiplier(k) for k in t], 0.5 ** (t / 4))
    # SGDR eq. (5) with eta_min = floor, eta_max = 1, T_i = 20, no restart
    cosine = CosineSchedule(20, floor=0.1)
    want = 0.1 + 0.9 * 0.5 * (1 + np.cos(np.pi * np.minimum(t, 20) / 20))
    np.testing.assert_allclose([cosine.multiplier(k) for k in t], want, rtol=1e-15)
    warm = LinearWarmUp(5, then=cosine)
    assert [warm.multiplier(k) for k in range(5)] == [0.2, 0.4, 0.6, 0.8, 1.0]
    assert warm.multiplier(5) == cosine.multiplier(0) == 1.0
    assert warm.multiplier(25) == cosine.multiplier(20)
    assert LinearWarmUp(2).multiplier(100) == 1.0


@pytest.mark.parametrize("make", [lambda: SGD(0.1), lambda: SGD(0.1, momentum=0.9, nesterov=True),
                                  lambda: RMSProp(), lambda: Adam(decoupled_decay=0.01),
                                  lambda: Adam(clip_norm=0.5, schedule=CosineSchedule(100))],
                         ids=["sgd", "nesterov", "rmsprop", "adamw", "adam-clipped"])
@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_no_allocation_after_the_first_update(make, dtype):
    rng = np.random.default_rng(3)
    params = [rng.normal(size=(200, 100)).astype(dtype), rng.normal(size=(200,)).astype(dtype)]
    grads = [rng.normal(size=p.shape).astype(dtype) for p in params]
    opt = make()
    opt.update(params, grads)
    state_ids = [id(a) for slot in opt._slots.values() for a in slot]
    tracemalloc.start()
    try:
        base = tracemalloc.get_traced_memory()[0]
        tracemalloc.reset_peak()
        for _ in range(20):
            opt.update(params, grads)
        peak = tracemalloc.get_traced_memory()[1] - base
    finally:
        tracemalloc.stop()
    # one parameter array is 200*100*itemsize >= 80 kB; the loop may create only small Python objects
    assert peak < 4096, f"update allocated {peak} bytes"
    assert [id(a) for slot in opt._slots.values() for a in slot] == state_ids
    assert all(p.dtype == dtype for p in params)
    assert all(a.dtype == dtype for slot in opt._slots.values() for a in slot)


@pytest.mark.parametrize("make", [lambda: SGD(0.1, momentum=0.5), lambda: RMSProp(0.01),
                                  lambda: Adam(0.01, schedule=LinearWarmUp(4, then=ExponentialSchedule(0.5, 3)),
                                               clip_norm=2.0)],
                         ids=["momentum", "rmsprop", "adam"])
def test_state_export_and_import_continue_bit_identically(make):
    params, grads = _params_and_grads(5, 10)
    straight = [p.copy() for p in params]
    opt = make()
    for g in grads:
        opt.update(straight, g)

    first = make()
    for g in grads[:4]:
        first.update(params, g)
    state = first.get_state()
    for slot in first._slots.values():  # the exported state is a copy: wiping the original changes nothing
        for array in slot:
            array[...] = np.nan
    # the scalars survive a JSON round trip
    plain = json.loads(json.dumps({"kind": state.kind, "settings": state.settings, "steps": state.steps}))
    resumed = optimizer_from_state(OptimizerState(plain["kind"], plain["settings"], plain["steps"], state.arrays))
    for g in grads[4:]:
        resumed.update(params, g)
    for a, b in zip(params, straight):
        np.testing.assert_array_equal(a, b)


def test_fresh_state_round_trips():
    opt = Adam(0.1)
    state = opt.get_state()
    assert state.steps == 0 and state.arrays == {}
    copy = optimizer_from_state(state)
    assert isinstance(copy, Adam) and copy.settings() == opt.settings()


def test_set_state_refuses_mismatches():
    params, grads = _params_and_grads(0, 1)
    opt = Adam(0.01)
    opt.update(params, grads[0])
    state = opt.get_state()
    with pytest.raises(ValueError, match="Adam optimizer, this one is a RMSProp"):
        RMSProp(0.01).set_state(state)
    with pytest.raises(ValueError, match="settings"):
        Adam(0.02).set_state(state)
    broken = OptimizerState(state.kind, state.settings, state.steps,
                            {k: v for k, v in state.arrays.items() if k != "second_moment/1"})
    with pytest.raises(ValueError, match="'<slot>/<i>'"):
        Adam(0.01).set_state(broken)
    wrong_shape = dict(state.arrays)
    wrong_shape["second_moment/0"] = np.zeros((2, 2))
    with pytest.raises(ValueError, match="second_moment/0 has shape"):
        Adam(0.01).set_state(OptimizerState(state.kind, state.settings, state.steps, wrong_shape))
    with pytest.raises(ValueError, match="unknown optimizer kind"):
        optimizer_from_state(OptimizerState("Mystery", {}, 0))


def test_update_refuses_other_shapes_after_the_first():
    params, grads = _params_and_grads(0, 1)
    opt = SGD(0.1, momentum=0.9)
    opt.update(params, grads[0])
    with pytest.raises(ValueError, match=r"params\[0\] / grads\[0\] must have shape \(3, 4\)"):
        opt.update([np.zeros((4, 3))] + params[1:], [np.zeros((4, 3))] + grads[0][1:])
    with pytest.raises(ValueError, match="holds state for 3 parameter arrays"):
        opt.update(params[:2], grads[0][:2])


@pytest.mark.parametrize(
    "build,error,text",
    [
        (lambda: SGD(0.0), ValueError, "lr must be a finite number in (0.0"),
        (lambda: SGD(-1.0), ValueError, "lr must be"),
        (lambda: SGD(float("nan")), ValueError, "lr must be"),
        (lambda: SGD("0.1"), TypeError, "lr must be a real number"),
        (lambda: SGD(0.1, momentum=1.0), ValueError, "momentum must be"),
        (lambda: SGD(0.1, nesterov=True), ValueError, "nesterov=True needs a momentum"),
        (lambda: SGD(0.1, momentum=0.5, nesterov=1), TypeError, "nesterov must be True or False"),
        (lambda: Adam(beta2=1.0), ValueError, "beta2 must be"),
        (lambda: Adam(decoupled_decay=-0.1), ValueError, "decoupled_decay must be"),
        (lambda: Adam(schedule=0.5), TypeError, "schedule must be a tinyprop Schedule"),
        (lambda: RMSProp(clip_norm=0), ValueError, "clip_norm must be"),
        (lambda: CosineSchedule(0), ValueError, "steps must be a positive integer"),
        (lambda: StepSchedule(10, factor=1.5), ValueError, "factor must be"),
        (lambda: LinearWarmUp(3, then="cosine"), TypeError, "then must be a Schedule"),
    ],
)
def test_bad_settings_are_refused(build, error, text):
    with pytest.raises(error, match=re.escape(text)):
        build()


def test_integer_parameters_are_refused():
    with pytest.raises(TypeError, match="float array"):
        SGD(0.1).update([np.zeros(3, dtype=int)], [np.ones(3)])


def test_schedule_settings_are_json_and_repr_readable():
    s = LinearWarmUp(10, then=CosineSchedule(100, floor=0.05))
    assert json.loads(json.dumps(s.settings())) == s.settings()
    assert repr(s) == "LinearWarmUp(steps=10, then={'kind': 'CosineSchedule', 'steps': 100, 'floor': 0.05})"
    assert s == LinearWarmUp(10, then=CosineSchedule(100, floor=0.05))
    assert math.isclose(Adam(0.1, schedule=s).settings()["schedule"]["then"]["floor"], 0.05)
