"""Stacked training equals training each network alone, bit for bit; its refusals.

The reference for every stacked network is :func:`tinyprop.train` on that
network alone with the same seed, optimizer settings and data. All data here
are synthetic (seeded normal draws).
"""

from __future__ import annotations

import copy

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import tinyprop as tp
from net_strategies import LOSSES, _targets, networks
from tinyprop.optim import SGD, Adam, RMSProp
from tinyprop.train import TrainingDiverged

OPTIMIZERS = {
    "sgd": lambda lr, decay: SGD(lr),
    "momentum": lambda lr, decay: SGD(lr, momentum=0.9),
    "nesterov": lambda lr, decay: SGD(lr, momentum=0.8, nesterov=True),
    "rmsprop": lambda lr, decay: RMSProp(lr, schedule=tp.CosineSchedule(40)),
    "adam": lambda lr, decay: Adam(lr),
    "adamw": lambda lr, decay: Adam(lr, decoupled_decay=decay, schedule=tp.LinearWarmUp(5)),
}


def _members(template: tp.Network, seeds: list[int]) -> list[tp.Network]:
    """Networks with the template's layers and dtype, each with its own initial weights."""
    return [tp.Network(copy.deepcopy(template.layers), seed=s, dtype=template.dtype) for s in seeds]


def _assert_same_run(alone: tp.Network, stacked: tp.Network, reference, result, opt_alone, opt_stacked) -> None:
    assert alone.get_vector().tobytes() == stacked.get_vector().tobytes()  # every bit, the signs of zeros too
    assert result.history == reference.history
    for name in ("epochs_run", "stop_reason", "message", "best_epoch", "best_validation_loss", "updates"):
        assert getattr(result, name) == getattr(reference, name), name
    state, expected = opt_stacked.get_state(), opt_alone.get_state()
    assert (state.kind, state.settings, state.steps) == (expected.kind, expected.settings, expected.steps)
    assert state.arrays.keys() == expected.arrays.keys()
    for key in state.arrays:
        assert state.arrays[key].tobytes() == expected.arrays[key].tobytes(), key
    assert result.state.rng == reference.state.rng


def _alone(template, seed, X, y, loss, optimizer, shuffle_seed, **options):
    net = _members(template, [seed])[0]
    try:
        result = tp.train(net, X, y, loss=loss, optimizer=optimizer, seed=shuffle_seed, **options)
    except TrainingDiverged as diverged:
        result = diverged.result
    return net, result


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    template=networks(max_depth=3, max_width=6),
    K=st.integers(1, 4),
    kind=st.sampled_from(sorted(OPTIMIZERS)),
    loss=st.sampled_from(LOSSES),
    rows=st.integers(1, 40),
    batch_size=st.integers(1, 16),
    validate=st.booleans(),
    per_network_rows=st.booleans(),
    data_seed=st.integers(0, 2**32 - 1),
)
def test_stacked_training_equals_training_each_network_alone(
    template, K, kind, loss, rows, batch_size, validate, per_network_rows, data_seed
):
    rng = np.random.default_rng(data_seed)
    blocks = K if per_network_rows else 1
    X = rng.normal(size=(blocks, rows, template.n_in))
    y = np.stack([_targets(rng, loss, rows, template.n_out) for _ in range(blocks)])
    X_val = rng.normal(size=(blocks, 7, template.n_in))
    y_val = np.stack([_targets(rng, loss, 7, template.n_out) for _ in range(blocks)])
    if not per_network_rows:
        X, y, X_val, y_val = X[0], y[0], X_val[0], y_val[0]
    lrs = [float(v) for v in rng.uniform(1e-3, 5e-2, K)]
    decays = [float(v) for v in rng.choice([0.0, 1e-3, 1e-2], K)]
    init_seeds = [int(s) for s in rng.integers(0, 2**31, K)]
    shuffle_seeds = [int(s) for s in rng.integers(0, 2**31, K)]
    options = dict(epochs=4, batch_size=batch_size, l2=float(rng.choice([0.0, 1e-3])))
    if validate:
        options.update(patience=2, training_loss=str(rng.choice(["running", "exact"])))
    nets = _members(template, init_seeds)
    optimizers = [OPTIMIZERS[kind](lr, d) for lr, d in zip(lrs, decays)]
    results = tp.train_stacked(nets, X, y, loss=loss, optimizers=optimizers, seeds=shuffle_seeds,
                               validation=(X_val, y_val) if validate else None, **options)
    assert len(results) == K
    for k in range(K):
        data = (X[k], y[k], X_val[k], y_val[k]) if per_network_rows else (X, y, X_val, y_val)
        optimizer = OPTIMIZERS[kind](lrs[k], decays[k])
        alone, reference = _alone(template, init_seeds[k], data[0], data[1], loss, optimizer, shuffle_seeds[k],
                                  validation=(data[2], data[3]) if validate else None, **options)
        _assert_same_run(alone, nets[k], reference, results[k], optimizer, optimizers[k])


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_one_hundred_steps_of_eight_networks_are_bit_identical(dtype):
    # The yardstick: within 1e-9 relative after 100 steps (float64); we get equality.
    rng = np.random.default_rng(3)
    X = rng.normal(size=(160, 4)).astype(dtype)
    y = np.tanh(X[:, :1] - X[:, 1:2] * X[:, 2:3])
    template = tp.build_mlp([4, 16, 16, 1], dtype=dtype)
    lrs = [1e-3 * (k + 1) for k in range(8)]
    nets = _members(template, list(range(8)))
    optimizers = [Adam(lr, decoupled_decay=1e-3 * (k % 2)) for k, lr in enumerate(lrs)]
    results = tp.train_stacked(nets, X, y, loss=tp.MeanSquaredError(), optimizers=optimizers, epochs=10,
                               batch_size=16, seeds=list(range(100, 108)))
    for k in range(8):
        optimizer = Adam(lrs[k], decoupled_decay=1e-3 * (k % 2))
        alone, reference = _alone(template, k, X, y, tp.MeanSquaredError(), optimizer, 100 + k, epochs=10,
                                  batch_size=16)
        assert reference.updates == 100
        _assert_same_run(alone, nets[k], reference, results[k], optimizer, optimizers[k])


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("sizes", [[8, 64, 64, 1], [3, 33, 17, 2], [5, 16, 2]])
def test_wide_layers_and_a_one_row_batch_are_bit_identical(sizes, dtype):
    # Wider layers than the property test draws, and a last batch of one row: the stack multiplies by a
    # contiguous copy of W^T only for the shapes where this BLAS gives the transposed view's bits (not for
    # 33 -> 17 at 32 rows, nor for one row, on OpenBLAS), and by the view elsewhere.
    rng = np.random.default_rng(11)
    X = rng.normal(size=(65, sizes[0])).astype(dtype)
    y = np.tanh(X[:, :sizes[-1]] - 0.5 * X[:, -1:])
    template = tp.build_mlp(sizes, dtype=dtype)
    nets = _members(template, [0, 1, 2])
    optimizers = [Adam(lr) for lr in (1e-3, 3e-3, 1e-2)]
    results = tp.train_stacked(nets, X, y, loss=tp.MeanSquaredError(), optimizers=optimizers, epochs=2,
                               batch_size=32, seeds=[7, 8, 9])
    for k, lr in enumerate((1e-3, 3e-3, 1e-2)):
        optimizer = Adam(lr)
        alone, reference = _alone(template, k, X, y, tp.MeanSquaredError(), optimizer, 7 + k, epochs=2,
                                  batch_size=32)
        _assert_same_run(alone, nets[k], reference, results[k], optimizer, optimizers[k])


def test_a_diverging_network_leaves_the_stack_and_the_others_go_on():
    rng = np.random.default_rng(5)
    X = rng.normal(size=(40, 3))
    y = X[:, :1] * 10.0
    template = tp.build_mlp([3, 6, 1])
    lrs = [1e-2, 1e6, 3e-2]  # the middle one diverges in its first epoch
    nets = _members(template, [0, 1, 2])
    optimizers = [SGD(lr) for lr in lrs]
    results = tp.train_stacked(nets, X, y, loss=tp.MeanSquaredError(), optimizers=optimizers, epochs=5,
                               batch_size=8, seeds=[0, 1, 2])
    assert [r.stop_reason for r in results] == ["epochs", "diverged", "epochs"]
    for k in range(3):
        optimizer = SGD(lrs[k])
        alone, reference = _alone(template, k, X, y, tp.MeanSquaredError(), optimizer, k, epochs=5, batch_size=8)
        _assert_same_run(alone, nets[k], reference, results[k], optimizer, optimizers[k])
    assert np.isfinite(nets[1].get_vector()).all() and "training diverged" in results[1].message


@pytest.mark.parametrize("dtype, huge", [(np.float64, [1e306, 3e307, 1e200]), (np.float32, [1e37, 3e37, 1e30])])
@pytest.mark.parametrize("batch_size", [13, 39, 40])
def test_weights_made_non_finite_inside_and_at_the_end_of_an_epoch(dtype, huge, batch_size):
    # The stack checks the weights once per epoch and replays a failed network's epoch alone, as train does:
    # an update that overflows a weight in the middle of an epoch (batch 13, float64) shows first as a
    # non-finite mini-batch loss, one at the last update of an epoch (batches 39 and 40) only in the
    # end-of-epoch check.
    rng = np.random.default_rng(5)
    X = rng.normal(size=(40, 3)).astype(dtype)
    y = X[:, :1] * 10.0
    template = tp.build_mlp([3, 6, 1], dtype=dtype)
    lrs = [1e-2, *huge, 3e-2]
    nets = _members(template, list(range(len(lrs))))
    optimizers = [SGD(lr) for lr in lrs]
    results = tp.train_stacked(nets, X, y, loss=tp.MeanSquaredError(), optimizers=optimizers, epochs=3,
                               batch_size=batch_size, seeds=list(range(len(lrs))))
    messages = []
    for k, lr in enumerate(lrs):
        optimizer = SGD(lr)
        alone, reference = _alone(template, k, X, y, tp.MeanSquaredError(), optimizer, k, epochs=3,
                                  batch_size=batch_size)
        _assert_same_run(alone, nets[k], reference, results[k], optimizer, optimizers[k])
        messages.append(reference.message)
    overflowed = ["the update made a weight non-finite" in m for m in messages]
    assert any(overflowed) or (batch_size, dtype) == (13, np.float32)  # float32's overflow comes in the loss first


def _stack_args(K=2, **changes):
    X = np.random.default_rng(0).normal(size=(20, 2))
    arguments = dict(
        nets=[tp.build_mlp([2, 3, 1], seed=k) for k in range(K)], X=X, y=X[:, :1], loss=tp.MeanSquaredError(),
        optimizers=[Adam(1e-3) for _ in range(K)], epochs=1, batch_size=5, seeds=list(range(K)),
    )
    arguments.update(changes)
    return arguments


@pytest.mark.parametrize(
    "changes, error, message",
    [
        (dict(nets=[]), ValueError, "nets is empty"),
        (dict(seeds=[0]), ValueError, "need one optimizer and one seed per network: 2 nets, 2 optimizers, 1 seeds"),
        (dict(nets=tp.build_mlp([2, 3, 1])), TypeError, "nets must be a list with one entry per network, got Network"),
        (dict(nets=[tp.build_mlp([2, 3, 1]), tp.build_mlp([2, 4, 1])]), ValueError,
         r"nets\[1\] .* does not have the layers"),
        (dict(nets=[tp.build_mlp([2, 3, 1]), tp.build_mlp([2, 3, 1], dtype=np.float32)]), ValueError,
         "does not have the layers and dtype"),
        (dict(optimizers=[Adam(1e-3), SGD(1e-3)]), ValueError, "every optimizer must be of one kind"),
        (dict(optimizers=[Adam(1e-3), Adam(1e-3, beta2=0.99)]), ValueError,
         r"only \['lr', 'decoupled_decay'\] may differ"),
        (dict(optimizers=[Adam(1e-3, clip_norm=1.0), Adam(1e-3, clip_norm=1.0)]), ValueError,
         "cannot clip per network"),
        (dict(X=np.zeros((3, 20, 2))), ValueError, r"X with one block of rows per network must have shape \(2, n, 2\)"),
        (dict(X=np.zeros((2, 20, 2)), y=np.zeros((2, 19, 1))), ValueError, r"y must have shape \(2, 20, 1\)"),
    ],
)
def test_refusals_say_what_was_expected(changes, error, message):
    with pytest.raises(error, match=message):
        tp.train_stacked(**_stack_args(**changes))


def test_refuses_shared_and_used_optimizers_and_subclasses():
    opt = Adam(1e-3)
    with pytest.raises(ValueError, match="optimizers must be 2 distinct objects"):
        tp.train_stacked(**_stack_args(optimizers=[opt, opt]))
    used = Adam(1e-3)
    used.update([np.zeros(3)], [np.ones(3)])
    with pytest.raises(ValueError, match=r"optimizers\[1\] has already made 1 updates"):
        tp.train_stacked(**_stack_args(optimizers=[Adam(1e-3), used]))

    class Mine(SGD):
        pass

    expected = r"optimizers\[0\] must be a tinyprop SGD, RMSProp or Adam \(not a subclass\), got Mine"
    with pytest.raises(TypeError, match=expected):
        tp.train_stacked(**_stack_args(optimizers=[Mine(1e-3), Mine(1e-3)]))


def test_the_callers_arrays_are_not_modified():
    arguments = _stack_args(X=np.random.default_rng(1).normal(size=(2, 20, 2)), y=np.ones((2, 20)))
    X, y = arguments["X"].copy(), arguments["y"].copy()
    tp.train_stacked(**arguments)
    assert np.array_equal(arguments["X"], X) and np.array_equal(arguments["y"], y)
