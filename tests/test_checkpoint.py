"""Checkpoint files and resume: bit-identical continuation after a crash, refusals of bad files.

All data here is synthetic (seeded normal draws).
"""

from __future__ import annotations

import numpy as np
import pytest

import tinyprop as tp


def _data(seed=0):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(90, 3))
    return X, np.sin(X[:, :1]) + 0.1 * X[:, 1:2] * X[:, 2:3]


def _run(path=None, *, epochs=10, callback=None, resume=None, patience=None):
    X, y = _data()
    net = tp.build_mlp([3, 7, 1], seed=5)
    return net, tp.train(
        net, X, y, loss=tp.MeanSquaredError(), optimizer=tp.Adam(0.01), epochs=epochs, batch_size=16,
        validation=(X[:20], y[:20]), patience=patience, seed=11, checkpoint=path, checkpoint_every=2,
        callback=callback, resume=resume,
    )


class _Crash(Exception):
    pass


@pytest.mark.parametrize("patience", [None, 50])
def test_resume_after_a_crash_is_bit_identical(tmp_path, patience):
    reference_net, reference = _run(patience=patience)

    path = tmp_path / "run.ckpt"

    def crash_after_epoch_5(info):
        if info.epoch == 5:
            raise _Crash  # the process dies after epoch 5; the checkpoint of epoch 4 is on disk

    with pytest.raises(_Crash):
        _run(path, callback=crash_after_epoch_5, patience=patience)
    state = tp.load_checkpoint(path)
    assert state.epoch == 4  # written every 2 epochs, before the callback

    resumed_net, resumed = _run(resume=state, patience=patience)  # a fresh network and optimizer
    for a, b in zip(resumed_net.params, reference_net.params):
        assert np.array_equal(a, b)
    assert resumed.history.training == reference.history.training
    assert resumed.history.validation == reference.history.validation
    assert resumed.epochs_run == reference.epochs_run == 10


def test_the_last_epoch_is_checkpointed(tmp_path):
    path = tmp_path / "run.ckpt"
    net, result = _run(path, epochs=7)
    state = tp.load_checkpoint(path)
    assert state.epoch == 7
    for a, b in zip(state.weights, result.state.weights):
        assert np.array_equal(a, b)


def test_a_crash_while_writing_keeps_the_previous_checkpoint(tmp_path, monkeypatch):
    path = tmp_path / "run.ckpt"
    _run(path, epochs=4)
    before = path.read_bytes()

    import tinyprop.archive as archive

    def failing_replace(src, dst):
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(archive.os, "replace", failing_replace)
    with pytest.raises(OSError, match="simulated"):
        _run(path, epochs=2)
    assert path.read_bytes() == before
    assert tp.load_checkpoint(path).epoch == 4
    assert [p.name for p in tmp_path.iterdir()] == ["run.ckpt"]  # no temporary file left


def test_damaged_or_foreign_files_are_refused(tmp_path):
    path = tmp_path / "run.ckpt"
    _run(path, epochs=2)
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0xFF
    (tmp_path / "damaged.ckpt").write_bytes(bytes(data))
    with pytest.raises(tp.CheckpointError, match="damaged"):
        tp.load_checkpoint(tmp_path / "damaged.ckpt")
    model = tmp_path / "model.npz"
    tp.save(tp.build_mlp([3, 7, 1], seed=0), model)
    with pytest.raises(tp.CheckpointError, match="not a tinyprop checkpoint"):
        tp.load_checkpoint(model)


def test_resume_refuses_a_state_from_another_run(tmp_path):
    path = tmp_path / "run.ckpt"
    _run(path, epochs=2)
    X, y = _data()
    net = tp.build_mlp([3, 7, 1], seed=5)
    with pytest.raises(ValueError, match="batch_size"):
        tp.train(net, X, y, loss=tp.MeanSquaredError(), optimizer=tp.Adam(0.01), epochs=4, batch_size=32,
                 validation=(X[:20], y[:20]), seed=11, resume=tp.load_checkpoint(path))


def test_bad_checkpoint_arguments():
    X, y = _data()
    net = tp.build_mlp([3, 7, 1], seed=5)
    with pytest.raises(TypeError, match="checkpoint must be a file path"):
        tp.train(net, X, y, loss=tp.MeanSquaredError(), optimizer=tp.Adam(0.01), epochs=1, batch_size=16, checkpoint=3)
    with pytest.raises(ValueError, match="checkpoint_every must be a positive integer"):
        tp.train(net, X, y, loss=tp.MeanSquaredError(), optimizer=tp.Adam(0.01), epochs=1, batch_size=16,
                 checkpoint="x.ckpt", checkpoint_every=0)
    with pytest.raises(TypeError, match="TrainingState"):
        tp.save_checkpoint({"epoch": 1}, "x.ckpt")
