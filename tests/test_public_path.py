"""The public training path without a workspace: forward, backward, opt.update(net.params, grads).

What the caller may keep (every array returned) is never overwritten by a later
call; the all-at-once update through the flat vectors equals the array-by-array
update bit for bit, and falls back to it whenever the lists are not the
network's own. All data here are synthetic (seeded normal draws).
"""

from __future__ import annotations

import pickle

import numpy as np
import pytest

import tinyprop as tp
from tinyprop.optim import SGD, Adam, RMSProp

OPTIMIZERS = [
    lambda: SGD(0.05),
    lambda: SGD(0.05, momentum=0.9, nesterov=True),
    lambda: RMSProp(0.01),
    lambda: Adam(0.01, decoupled_decay=1e-2, schedule=tp.CosineSchedule(10)),
    lambda: Adam(0.01, clip_norm=0.1),
]


def _data(seed=0, rows=16):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(rows, 4))
    return X, np.tanh(X[:, :1] - X[:, 1:2])


def test_arrays_the_caller_keeps_are_not_overwritten_by_later_calls():
    net, loss = tp.build_mlp([4, 8, 1], seed=0), tp.MeanSquaredError()
    X, y = _data(0)
    out, trace = net.forward(X)
    grads, d_input = net.backward(trace, loss.gradient(out, y))
    kept = [out.copy(), *(v.copy() for v in trace.values), *(g.copy() for g in grads), d_input.copy()]
    grads_again, _ = net.backward(trace, loss.gradient(out, y))  # a trace without workspace can be reused
    assert grads_again.vector is not grads.vector
    assert all(np.array_equal(a, b) for a, b in zip(grads_again, grads))
    for seed in (1, 2):  # more calls on other rows of the same size, and an update
        X2, y2 = _data(seed)
        out2, trace2 = net.forward(X2)
        grads2, _ = net.backward(trace2, loss.gradient(out2, y2))
        SGD(0.1).update(net.params, grads2)
    again = [out, *trace.values, *grads, d_input]
    assert all(np.array_equal(a, b) for a, b in zip(kept, again))


@pytest.mark.parametrize("make", OPTIMIZERS)
@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_update_of_the_network_lists_equals_the_array_by_array_update(make, dtype):
    X, y = _data(3)
    loss = tp.MeanSquaredError()
    at_once, one_by_one = (tp.build_mlp([4, 8, 8, 1], seed=1, dtype=dtype) for _ in range(2))
    opt_at_once, opt_one_by_one = make(), make()
    for _ in range(5):
        for net, opt, plain in ((at_once, opt_at_once, False), (one_by_one, opt_one_by_one, True)):
            out, trace = net.forward(X.astype(dtype))
            grads, _ = net.backward(trace, loss.gradient(out, y.astype(dtype)), need_input=False)
            params = net.params
            if plain:  # ordinary lists: updated array by array
                params, grads = list(params), list(grads)
            opt.update(params, grads)
    assert np.array_equal(at_once.get_vector(), one_by_one.get_vector())
    a, b = opt_at_once.get_state(), opt_one_by_one.get_state()
    assert a.arrays.keys() == b.arrays.keys() and all(np.array_equal(a.arrays[k], b.arrays[k]) for k in a.arrays)


def test_a_changed_list_is_updated_array_by_array_and_another_layout_refused():
    net = tp.build_mlp([4, 8, 1], seed=0)
    X, y = _data(0)
    out, trace = net.forward(X)
    grads, _ = net.backward(trace, tp.MeanSquaredError().gradient(out, y))
    opt = SGD(1.0)
    params = net.params
    spare = np.zeros_like(params[0])
    params[0] = spare  # the list no longer describes the network: only what it holds is updated
    before = net.get_vector()
    opt.update(params, grads)
    assert np.array_equal(spare, -grads[0])
    assert np.array_equal(net.get_vector()[grads[0].size:], before[grads[0].size:] - grads.vector[grads[0].size:])
    other = tp.build_mlp([4, 5, 4], seed=0)  # 49 parameters too, in other shapes
    out, trace = other.forward(X)
    other_grads, _ = other.backward(trace, tp.MeanSquaredError().gradient(out, np.ones_like(out)))
    assert other.n_params == net.n_params
    with pytest.raises(ValueError, match="use a new optimizer for a different network"):
        opt.update(other.params, other_grads)


def test_params_stop_being_flat_views_when_a_layer_array_is_replaced_or_pickled():
    net = tp.build_mlp([2, 3, 1], seed=0)
    layer = net.layers[0]
    layer.weight = layer.weight.copy()  # replaced by assignment
    assert type(net.params) is list
    _ = net.vector  # re-links the vector to the layers' arrays
    assert net.params[0] is layer.weight and layer.weight.base is net.vector
    copy = pickle.loads(pickle.dumps(net))  # views do not survive pickling
    X, y = _data(0, rows=5)[0][:, :2], np.ones((5, 1))
    out, trace = copy.forward(X)
    grads, _ = copy.backward(trace, tp.MeanSquaredError().gradient(out, y))
    before = copy.predict(X)
    SGD(0.5).update(copy.params, grads)
    assert not np.array_equal(copy.predict(X), before)  # the layers' own arrays were updated


def test_a_bias_added_after_construction_is_updated_too():
    net = tp.Network([tp.Affine(2, 1, bias=False)], seed=0)
    net.layers[0].bias = np.zeros(1)  # not part of the linked vector: params is an ordinary list again
    assert type(net.params) is list and len(net.params) == 2
