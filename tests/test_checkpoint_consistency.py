"""Training states whose fields contradict each other, or that belong to another network or other data.

A refused resume must leave the caller's network and optimizer exactly as they
were. All data is synthetic (seeded normal draws).
"""

from __future__ import annotations

import copy
import dataclasses

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import tinyprop as tp
from tinyprop.checkpoint import CheckpointError


def _data(seed=0):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(40, 3))
    return X, np.sin(X[:, :1]) + 0.1 * X[:, 1:2]


def _net(activation=None):
    return tp.Network([tp.Affine(3, 5), activation or tp.Tanh(), tp.Affine(5, 1)], seed=5)


def _train(net, optimizer, *, epochs, resume=None, X=None, y=None, patience=2):
    X0, y0 = _data()
    X = X0 if X is None else X
    y = y0 if y is None else y
    return tp.train(net, X, y, loss=tp.MeanSquaredError(), optimizer=optimizer, epochs=epochs, batch_size=8,
                    validation=(X0[:10], y0[:10]), patience=patience, seed=3, resume=resume)


def _state(epochs=4, patience=2):
    return _train(_net(), tp.Adam(0.05), epochs=epochs, patience=patience).state


def _snapshot(net, optimizer):
    state = optimizer.get_state()
    return [p.copy() for p in net.params], state.steps, {k: v.copy() for k, v in state.arrays.items()}


def _assert_unchanged(before, net, optimizer):
    params, steps, arrays = _snapshot(net, optimizer)
    assert all(np.array_equal(a, b) for a, b in zip(before[0], params)), "the network changed"
    assert steps == before[1], "the optimizer's step count changed"
    assert arrays.keys() == before[2].keys() and all(np.array_equal(arrays[k], before[2][k]) for k in arrays)


def _refused_without_change(state, *, net=None, match=None, X=None, y=None):
    net = _net() if net is None else net
    optimizer = tp.Adam(0.05)
    before = _snapshot(net, optimizer)
    with pytest.raises(ValueError, match=match):
        _train(net, optimizer, epochs=8, resume=state, X=X, y=y)
    _assert_unchanged(before, net, optimizer)


# ------------------------------------------------------------------ item 1: best weights missing
def test_best_epoch_without_best_weights_is_refused_by_save_load_and_resume(tmp_path):
    state = dataclasses.replace(_state(), best_weights=None, best_loss=-1.0)
    with pytest.raises(CheckpointError, match="best_epoch, best_loss"):
        tp.save_checkpoint(state, tmp_path / "bad.ckpt")
    assert not (tmp_path / "bad.ckpt").exists()
    _refused_without_change(state, match="best_epoch, best_loss")
    # the same state written by hand (bypassing save_checkpoint) is refused on load
    from tinyprop.archive import write_archive

    scalars, arrays = state.to_parts()
    write_archive(tmp_path / "crafted.ckpt", arrays, {"kind": "tinyprop checkpoint", **scalars})
    with pytest.raises(CheckpointError, match="best_epoch, best_loss"):
        tp.load_checkpoint(tmp_path / "crafted.ckpt")


def test_best_weights_missing_with_matching_best_loss_is_refused():
    state = _state()
    _refused_without_change(dataclasses.replace(state, best_weights=None), match="best_weights are missing")


# ------------------------------------------------------------------ item 4: optimizer arrays of the wrong shape
def test_optimizer_arrays_of_the_wrong_shape_change_nothing():
    state = _state()
    arrays = {name: np.zeros(3) for name in state.optimizer.arrays}
    bad = dataclasses.replace(state, optimizer=dataclasses.replace(state.optimizer, arrays=arrays))
    _refused_without_change(bad, match="state array 0 has shape")


def test_optimizer_steps_without_arrays_is_refused():
    state = _state()
    bad = dataclasses.replace(state, optimizer=dataclasses.replace(state.optimizer, arrays={}))
    _refused_without_change(bad, match="holds no")


# ------------------------------------------------------------------ item 9: crafted states
def test_out_of_range_generator_state_is_a_value_error():
    state = _state()
    rng = copy.deepcopy(state.rng)
    rng["state"]["state"] = 2**200
    _refused_without_change(dataclasses.replace(state, rng=rng), match="unusable rng state")


def test_validation_history_dropped_is_refused():
    state = _state()
    _refused_without_change(dataclasses.replace(state, validation_loss=None), match="validation_loss is None")


def test_validation_history_shorter_than_training_history_is_refused():
    state = _state()
    _refused_without_change(dataclasses.replace(state, validation_loss=state.validation_loss[:-1]),
                            match="validation losses for 4 epochs")


def test_a_state_from_another_activation_is_refused():
    state = _state()
    _refused_without_change(state, net=_net(tp.Sigmoid()), match="another network")


def test_a_state_with_tampered_weights_is_refused():
    state = _state()
    weights = [w.copy() for w in state.weights]
    weights[0][0, 0] += 1.0
    _refused_without_change(dataclasses.replace(state, weights=weights), match="another network")


def test_a_state_from_other_data_of_the_same_size_is_refused():
    state = _state()
    X, y = _data(seed=1)
    _refused_without_change(state, X=X, y=y, match="data_sha256")


def test_the_recorded_fingerprints_survive_a_file_round_trip(tmp_path):
    state = _state()
    tp.save_checkpoint(state, tmp_path / "run.ckpt")
    loaded = tp.load_checkpoint(tmp_path / "run.ckpt")
    assert loaded.network == state.network and len(loaded.network) == 64
    assert loaded.settings["data_sha256"] == state.settings["data_sha256"]


# ------------------------------------------------------------------ property: any inconsistent state
_REFERENCE = {}


def _reference_state():
    if "state" not in _REFERENCE:
        _REFERENCE["state"] = _state(epochs=4, patience=3)
    return _REFERENCE["state"]


_MUTATIONS = {
    "epoch": st.integers(0, 9),
    "best_epoch": st.one_of(st.none(), st.integers(0, 9)),
    "best_loss": st.one_of(st.none(), st.floats(-1.0, 5.0)),
    "epochs_since_best": st.integers(0, 9),
    "drop_best_weights": st.booleans(),
    "validation_loss": st.one_of(st.none(), st.lists(st.floats(0.0, 5.0), max_size=6)),
    "training_loss": st.lists(st.floats(0.0, 5.0), max_size=6),
    "optimizer_steps": st.integers(0, 100),
    "optimizer_shape": st.sampled_from([None, (3,), (2, 2), (0,)]),
    "weight_shape": st.sampled_from([None, (5, 2), (1,)]),
    "rng_state": st.one_of(st.none(), st.integers(-(2**130), 2**130)),
}


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.fixed_dictionaries({}, optional=_MUTATIONS))
def test_any_inconsistent_state_resumes_cleanly_or_is_refused_without_change(changes):
    state = copy.deepcopy(_reference_state())
    fields = {k: v for k, v in changes.items() if k in ("epoch", "best_epoch", "best_loss", "epochs_since_best",
                                                         "validation_loss", "training_loss")}
    state = dataclasses.replace(state, **fields)
    if changes.get("drop_best_weights"):
        state.best_weights = None
    if "optimizer_steps" in changes:
        state.optimizer.steps = changes["optimizer_steps"]
    if changes.get("optimizer_shape") is not None:
        state.optimizer.arrays = {k: np.zeros(changes["optimizer_shape"]) for k in state.optimizer.arrays}
    if changes.get("weight_shape") is not None:
        state.weights = [np.zeros(changes["weight_shape"]), *state.weights[1:]]
    if changes.get("rng_state") is not None:
        state.rng["state"]["state"] = changes["rng_state"]
    net, optimizer = _net(), tp.Adam(0.05)
    before = _snapshot(net, optimizer)
    try:
        result = _train(net, optimizer, epochs=8, resume=state, patience=3)
    except (ValueError, TypeError):  # the documented refusals
        _assert_unchanged(before, net, optimizer)
        return
    # a clean resume: the history continues the state's and every weight is finite
    assert result.history.training[: state.epoch] == tuple(state.training_loss)
    assert all(np.isfinite(p).all() for p in net.params)
