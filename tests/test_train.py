"""The training loop: determinism, convergence on convex problems, early stopping,
divergence guard, checkpoint/resume, progress output and input checks.

External references: ``numpy.linalg.lstsq`` (a general-purpose least-squares
solver) gives the optimum of the convex problems. All data here are synthetic
(seeded random arrays), labelled as such.
"""

from __future__ import annotations

import io
import json
import sys

import numpy as np
import pytest

import tinyprop as tp
from fake_terminal import FakeTerminal
from tinyprop._progress import EpochProgress
from tinyprop.checkpoint import TrainingState
from tinyprop.optim import SGD, Adam, RMSProp, optimizer_from_state
from tinyprop.schedules import CosineSchedule
from tinyprop.train import EpochInfo, TrainingDiverged, train

OPTIMIZERS = {
    "sgd": lambda: SGD(0.05),
    "momentum": lambda: SGD(0.02, momentum=0.9),
    "nesterov": lambda: SGD(0.02, momentum=0.9, nesterov=True),
    "rmsprop": lambda: RMSProp(0.005),
    "adam": lambda: Adam(0.01),
    "adamw": lambda: Adam(0.01, decoupled_decay=1e-3, clip_norm=5.0),
}


def _regression(n=120, seed=0):
    """Synthetic smooth regression data."""
    rng = np.random.default_rng(seed)
    X = rng.uniform(-1, 1, (n, 3))
    y = np.column_stack([np.sin(2 * X[:, 0]) + X[:, 1] * X[:, 2], np.cos(X.sum(axis=1))])
    return X, y


def _net(seed=0, dtype=np.float64):
    return tp.build_mlp([3, 10, 2], seed=seed, dtype=dtype)


@pytest.mark.parametrize("name", OPTIMIZERS)
def test_same_seed_gives_identical_weights(name):
    X, y = _regression()
    runs = []
    for seed in (7, 7, 8):
        net = _net()
        result = train(net, X, y, loss=tp.MeanSquaredError(), optimizer=OPTIMIZERS[name](), epochs=5,
                       batch_size=16, seed=seed, validation=(X[:20], y[:20]))
        runs.append((net.get_vector(), result.history))
    assert np.array_equal(runs[0][0], runs[1][0])
    assert runs[0][1] == runs[1][1]
    assert not np.array_equal(runs[0][0], runs[2][0])  # another shuffling seed, other weights


CONVEX = {
    "sgd": lambda: SGD(0.1),
    "momentum": lambda: SGD(0.05, momentum=0.9),
    "nesterov": lambda: SGD(0.05, momentum=0.9, nesterov=True),
    "rmsprop": lambda: RMSProp(0.01, schedule=CosineSchedule(2000)),
    "adam": lambda: Adam(0.05, schedule=CosineSchedule(2000)),
}


@pytest.mark.parametrize("name", CONVEX)
def test_every_optimizer_reaches_the_least_squares_optimum(name):
    # Convex problem: a linear network (one Affine layer) under squared error.
    # Reference optimum: numpy.linalg.lstsq on [X, 1]. Stated tolerance: 1e-8
    # relative (max abs parameter error / max abs parameter) after 2000 full-batch updates.
    rng = np.random.default_rng(1)
    n = 200
    X = rng.normal(size=(n, 3)) * [1.0, 2.0, 0.5]
    y = X @ np.array([[0.5, -1.0], [2.0, 0.3], [-1.0, 1.0]]) + [0.3, -0.7] + 0.1 * rng.normal(size=(n, 2))
    reference, *_ = np.linalg.lstsq(np.hstack([X, np.ones((n, 1))]), y, rcond=None)
    net = tp.Network([tp.Affine(3, 2)], seed=0)
    result = train(net, X, y, loss=tp.MeanSquaredError(), optimizer=CONVEX[name](), epochs=2000, batch_size=n, seed=0)
    W, b = net.params
    theta = np.vstack([W.T, b[None, :]])
    assert np.max(np.abs(theta - reference)) / np.max(np.abs(reference)) < 1e-8
    best = tp.MeanSquaredError().value(np.hstack([X, np.ones((n, 1))]) @ reference, y)
    assert result.history.training[-1] < result.history.training[0]
    assert result.history.training[-1] == pytest.approx(best, rel=1e-12)


def test_l2_penalty_reaches_ridge_regression_with_free_intercept():
    # Minimiser of 1/2 ||X w + b - y||^2 + l2/2 ||w||^2 (bias not penalised), solved
    # independently with numpy.linalg.lstsq on the augmented system [X 1; sqrt(l2) I 0].
    rng = np.random.default_rng(2)
    n, lam = 50, 3.0
    X = rng.normal(size=(n, 4))
    y = X @ np.array([1.0, -2.0, 0.5, 0.0]) + 1.5 + 0.3 * rng.normal(size=n)
    A = np.vstack([np.hstack([X, np.ones((n, 1))]), np.hstack([np.sqrt(lam) * np.eye(4), np.zeros((4, 1))])])
    reference, *_ = np.linalg.lstsq(A, np.concatenate([y, np.zeros(4)]), rcond=None)
    net = tp.Network([tp.Affine(4, 1)], seed=0)
    train(net, X, y, loss=tp.SquaredError(), optimizer=SGD(0.005, momentum=0.9), epochs=3000, batch_size=n, l2=lam)
    np.testing.assert_allclose(net.get_vector(), reference, rtol=1e-9, atol=1e-12)


def test_last_partial_batch_is_used():
    X, y = _regression(n=10)
    result = train(_net(), X, y, loss=tp.MeanSquaredError(), optimizer=SGD(0.01), epochs=3, batch_size=4, seed=0)
    assert result.updates == 3 * 3  # batches of 4, 4 and 2 rows
    assert result.epochs_run == 3 and result.stop_reason == "epochs"
    result = train(_net(), X, y, loss=tp.MeanSquaredError(), optimizer=SGD(0.01), epochs=2, batch_size=50)
    assert result.updates == 2  # a batch larger than n is the full batch


def test_exact_training_loss_records_whole_data_losses():
    X, y = _regression()
    net = _net()
    snapshots = []

    def remember(info: EpochInfo):
        snapshots.append((info.capture().weights, info.training_loss, info.validation_loss))

    result = train(net, X[20:], y[20:], loss=tp.MeanSquaredError(), optimizer=Adam(0.01), epochs=4, batch_size=16,
                   seed=0, validation=(X[:20], y[:20]), callback=remember, training_loss="exact")
    probe = _net()
    for (weights, training, validation), h_train, h_val in zip(snapshots, result.history.training,
                                                               result.history.validation):
        for p, w in zip(probe.params, weights):
            p[...] = w
        assert h_train == training == tp.MeanSquaredError().value(probe.predict(X[20:]), y[20:])
        assert h_val == validation == tp.MeanSquaredError().value(probe.predict(X[:20]), y[:20])


class _BatchRecorder(SGD):
    """SGD that keeps a copy of the weights each update starts from."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self.before = []

    def update(self, params, grads):
        self.before.append([p.copy() for p in params])
        super().update(params, grads)


@pytest.mark.parametrize("loss", [tp.MeanSquaredError(), tp.SquaredError()], ids=["mean", "sum"])
def test_running_training_loss_is_the_batch_size_weighted_mean_of_the_batch_losses(loss):
    # The documented running value, recomputed independently: the epoch's permutation from the
    # seeded generator, each batch's loss with the weights before its update (taken by the optimizer),
    # combined as sum_b n_b E_b / n for a mean loss and sum_b E_b for a summed one.
    X, y = _regression(n=50)  # batches of 16, 16, 16 and 2 rows
    net, optimizer = _net(), _BatchRecorder(0.05)
    result = train(net, X, y, loss=loss, optimizer=optimizer, epochs=3, batch_size=16, seed=4)
    rng, probe, update = np.random.default_rng(4), _net(), 0
    for recorded in result.history.training:
        order = rng.permutation(50)
        parts = []
        for start in range(0, 50, 16):
            rows = order[start:start + 16]
            probe.set_vector(optimizer.before[update][0])
            update += 1
            value = loss.value(probe.predict(X[rows]), y[rows])
            parts.append(value if loss.sums_over_samples else value * rows.size)
        expected = sum(parts) if loss.sums_over_samples else sum(parts) / 50
        assert recorded == pytest.approx(expected, rel=1e-13)


def test_training_loss_option_changes_only_the_recorded_training_loss():
    X, y = _regression()
    runs = {}
    for mode in ("running", "exact"):
        net = _net()
        result = train(net, X[20:], y[20:], loss=tp.MeanSquaredError(), optimizer=Adam(0.02), epochs=30, batch_size=16,
                       seed=2, validation=(X[:20], y[:20]), patience=3, training_loss=mode)
        runs[mode] = (net.get_vector(), result)
    (w_run, running), (w_exact, exact) = runs["running"], runs["exact"]
    assert np.array_equal(w_run, w_exact)
    assert running.history.validation == exact.history.validation
    assert running.best_epoch == exact.best_epoch and running.epochs_run == exact.epochs_run
    assert running.history.training != exact.history.training
    with pytest.raises(ValueError, match="training_loss must be 'running' or 'exact', got 'full'"):
        train(_net(), X, y, loss=tp.MeanSquaredError(), optimizer=Adam(0.02), epochs=1, batch_size=16,
              training_loss="full")


def test_early_stopping_restores_the_best_weights():
    # synthetic: few noisy training rows and a large network, so validation loss rises
    rng = np.random.default_rng(4)
    X = rng.uniform(-1, 1, (30, 3))
    y = np.sin(3 * X[:, :1]) + 0.5 * rng.normal(size=(30, 1))
    X_val = rng.uniform(-1, 1, (200, 3))
    y_val = np.sin(3 * X_val[:, :1])
    net = tp.build_mlp([3, 40, 40, 1], seed=0)
    weights_by_epoch = {}
    result = train(net, X, y, loss=tp.MeanSquaredError(), optimizer=Adam(0.01), epochs=500, batch_size=10, seed=0,
                   validation=(X_val, y_val), patience=10,
                   callback=lambda info: weights_by_epoch.__setitem__(info.epoch, info.capture().weights) and None)
    assert result.stop_reason == "early stopping"
    assert result.epochs_run == result.best_epoch + 10 < 500
    assert result.best_validation_loss == min(result.history.validation)
    assert result.history.validation[result.best_epoch - 1] == result.best_validation_loss
    for p, w in zip(net.params, weights_by_epoch[result.best_epoch]):
        assert np.array_equal(p, w)
    assert tp.MeanSquaredError().value(net.predict(X_val), y_val) == result.best_validation_loss
    assert f"restored the weights of epoch {result.best_epoch}" in result.message


def test_validation_without_patience_keeps_final_weights():
    X, y = _regression()
    net = _net()
    result = train(net, X, y, loss=tp.MeanSquaredError(), optimizer=Adam(0.01), epochs=6, batch_size=16, seed=0,
                   validation=(X[:10], y[:10]))
    assert np.array_equal(net.get_vector(), np.concatenate([w.ravel() for w in result.state.weights]))
    assert result.best_epoch is not None and len(result.history.validation) == 6


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize(
    "lr,target_scale,cause",
    [(1e6, 1.0, "loss is inf"), (1e308, 1e3, "the update made a weight non-finite")],
    ids=["lr1e6", "lr1e308"],
)
def test_divergence_stops_with_last_finite_weights(dtype, lr, target_scale, cause):
    X, y = _regression(n=40)
    y = y * target_scale
    seen = []

    class Recording(SGD):
        """SGD that records every parameter state it sees (before and after each update)."""

        def update(self, params, grads):
            seen.append([p.copy() for p in params])
            super().update(params, grads)
            seen.append([p.copy() for p in params])

    net = _net(dtype=dtype)
    with pytest.raises(TrainingDiverged, match=f"training diverged .*{cause}.*Lower the learning rate") as caught:
        train(net, X, y, loss=tp.MeanSquaredError(), optimizer=Recording(lr), epochs=50, batch_size=8, seed=0)
    assert caught.value.result.stop_reason == "diverged"
    assert all(np.isfinite(p).all() for p in net.params)
    last_finite = [state for state in seen if all(np.isfinite(a).all() for a in state)][-1]
    assert np.array_equal(net.get_vector(), np.concatenate([a.ravel() for a in last_finite]))
    assert len(caught.value.result.history.training) == caught.value.result.epochs_run
    # The message names the update that failed: one already made when it overflowed a weight, else the next.
    made = caught.value.result.updates
    failing = made if cause.startswith("the update") else made + 1
    assert f", update {failing}: " in str(caught.value)


def test_resume_is_bit_identical_to_an_uninterrupted_run():
    # The checkpoint scenario of issue 4: 10 epochs straight versus 4 epochs,
    # a stop, a JSON/array round trip of the state, and a resumed call.
    X, y = _regression()
    settings = dict(loss=tp.MeanSquaredError(), epochs=10, batch_size=16, seed=3,
                    validation=(X[:20], y[:20]), patience=8, l2=1e-4)
    straight = _net()
    full = train(straight, X[20:], y[20:], optimizer=Adam(0.01, schedule=CosineSchedule(60)), **settings)

    first = _net()
    stopped = train(first, X[20:], y[20:], optimizer=Adam(0.01, schedule=CosineSchedule(60)),
                    callback=lambda info: info.epoch == 4, **settings)
    assert stopped.stop_reason == "callback" and stopped.epochs_run == 4
    scalars, arrays = stopped.state.to_parts()
    scalars = json.loads(json.dumps(scalars))  # the scalars are plain JSON
    arrays = {k: np.array(v) for k, v in arrays.items()}
    state = TrainingState.from_parts(scalars, arrays)

    fresh = _net(seed=99)  # other starting weights: the state's replace them
    resumed = train(fresh, X[20:], y[20:], optimizer=optimizer_from_state(state.optimizer), resume=state, **settings)
    assert np.array_equal(fresh.get_vector(), straight.get_vector())
    assert resumed.history == full.history
    assert resumed.best_epoch == full.best_epoch and resumed.updates == full.updates


def test_resume_refuses_other_settings():
    X, y = _regression()
    result = train(_net(), X, y, loss=tp.MeanSquaredError(), optimizer=SGD(0.01), epochs=2, batch_size=16, seed=1)
    net = _net(seed=5)
    before = net.get_vector()
    with pytest.raises(ValueError, match="batch_size: state has 16, this call 8"):
        train(net, X, y, loss=tp.MeanSquaredError(), optimizer=SGD(0.01), epochs=4, batch_size=8, seed=1,
              resume=result.state)
    with pytest.raises(ValueError, match="settings"):
        train(net, X, y, loss=tp.MeanSquaredError(), optimizer=SGD(0.02), epochs=4, batch_size=16, seed=1,
              resume=result.state)
    assert np.array_equal(net.get_vector(), before)  # a refused resume changes nothing


def test_callback_must_answer_with_a_bool_or_none():
    X, y = _regression(n=20)
    with pytest.raises(TypeError, match="callback must return None, True"):
        train(_net(), X, y, loss=tp.MeanSquaredError(), optimizer=SGD(0.01), epochs=3, batch_size=8,
              callback=lambda info: "stop")


def test_progress_lines_on_stderr(capsys):
    X, y = _regression(n=20)
    train(_net(), X, y, loss=tp.MeanSquaredError(), optimizer=SGD(0.01), epochs=3, batch_size=8,
          validation=(X, y), progress=True)
    captured = capsys.readouterr()
    assert captured.out == ""
    lines = captured.err.splitlines()
    assert len(lines) == 3 and "\r" not in captured.err
    assert lines[0].startswith("epoch 1/3  training loss ")
    assert "validation loss" in lines[0] and "elapsed" in lines[0] and "remaining ~" in lines[0]
    train(_net(), X, y, loss=tp.MeanSquaredError(), optimizer=SGD(0.01), epochs=3, batch_size=8)
    assert capsys.readouterr().err == ""  # silent unless asked


def test_progress_rewrites_one_line_on_a_terminal(monkeypatch):
    monkeypatch.setattr(sys, "stderr", terminal := FakeTerminal())
    X, y = _regression(n=20)
    train(_net(), X, y, loss=tp.MeanSquaredError(), optimizer=SGD(0.01), epochs=3, batch_size=8, progress=True)
    text = terminal.getvalue()
    assert text.startswith("\repoch 1/3") and "\repoch 3/3" in text  # the first, and the last always
    assert text.endswith("\n") and text.count("\n") == 1


def _show(progress: EpochProgress, epoch: int, epochs: int) -> None:
    elapsed = 0.01 * epoch
    progress.show(epoch, epochs, 0.5 / epoch, None, elapsed, elapsed / epoch * (epochs - epoch))


def test_progress_rewrites_one_line_on_a_terminal_at_most_ten_times_a_second():
    stream, now = FakeTerminal(), [0.0]
    progress = EpochProgress(stream=stream, clock=lambda: now[0])
    for epoch in range(1, 101):
        now[0] = epoch * 0.004  # 250 epochs a second
        _show(progress, epoch, 100)
    progress.finish()
    text = stream.getvalue()
    assert text.count("\r") == 5  # epochs 1, 26, 51, 76 (every 0.1 s) and the last one
    assert text.endswith("remaining ~0.0 s\x1b[K\n")
    assert "epoch 100/100  training loss 0.005  elapsed 1.0 s" in text


def test_progress_prints_about_ten_plain_lines_elsewhere():
    stream = io.StringIO()
    progress = EpochProgress(stream=stream)
    for epoch in range(1, 101):
        _show(progress, epoch, 100)
    progress.finish()
    lines = stream.getvalue().splitlines()
    assert [line.split()[1] for line in lines] == ["1/100"] + [f"{e}/100" for e in range(10, 101, 10)]
    assert "\r" not in stream.getvalue() and "\x1b" not in stream.getvalue()


def test_float32_training_stays_float32():
    X, y = _regression()
    net = _net(dtype=np.float32)
    result = train(net, X, y, loss=tp.MeanSquaredError(), optimizer=Adam(0.01), epochs=3, batch_size=16, seed=0)
    assert all(p.dtype == np.float32 for p in net.params)
    assert all(a.dtype == np.float32 for a in result.state.optimizer.arrays.values())
    assert result.history.training[-1] < result.history.training[0]


def test_inputs_are_not_modified():
    X, y = _regression()
    X_copy, y_copy = X.copy(), y.copy()
    train(_net(), X, y, loss=tp.MeanSquaredError(), optimizer=SGD(0.01), epochs=2, batch_size=16,
          validation=(X[:5], y[:5]))
    assert np.array_equal(X, X_copy) and np.array_equal(y, y_copy)


def _bad_call(**changes):
    X, y = _regression(n=20)
    arguments = dict(net=_net(), X=X, y=y, loss=tp.MeanSquaredError(), optimizer=SGD(0.01), epochs=2, batch_size=8)
    arguments.update(changes)
    return lambda: train(arguments.pop("net"), arguments.pop("X"), arguments.pop("y"), **arguments)


@pytest.mark.parametrize(
    "changes,error,text",
    [
        (dict(patience=3), ValueError, "patience (early stopping) needs validation data"),
        (dict(X=np.zeros((20, 4))), ValueError, "X must have shape (n_samples, 3), got shape (20, 4)"),
        (dict(y=np.zeros((19, 2))), ValueError, "y must have shape (20, 2)"),
        (dict(X=np.where(np.eye(20, 3) > 0, np.nan, 0.0)), ValueError, "X has a non-finite value (nan) at row 0"),
        (dict(epochs=0), ValueError, "epochs must be a positive integer, got 0"),
        (dict(batch_size=2.5), TypeError, "batch_size must be a positive integer"),
        (dict(loss="mse"), TypeError, "loss must be a tinyprop Loss"),
        (dict(optimizer="adam"), TypeError, "optimizer must be a tinyprop Optimizer"),
        (dict(net="net"), TypeError, "net must be a tinyprop Network"),
        (dict(validation=np.zeros((3, 3))), TypeError, "validation must be a pair"),
        (dict(validation=(np.zeros((3, 3)), np.zeros((4, 2)))), ValueError, "validation y must have shape (3, 2)"),
        (dict(l2=-1.0), ValueError, "l2 must be a finite number"),
        (dict(seed=-3), ValueError, "seed must be None or an integer >= 0"),
        (dict(seed=1.5), TypeError, "seed must be None or an integer"),
        (dict(progress="yes"), TypeError, "progress must be True or False"),
        (dict(callback=3), TypeError, "callback must be callable"),
        (dict(resume={"epoch": 3}), TypeError, "resume must be a TrainingState"),
    ],
)
def test_bad_inputs_are_refused_with_a_clear_message(changes, error, text):
    import re

    with pytest.raises(error, match=re.escape(text)):
        _bad_call(**changes)()


def test_non_finite_starting_weights_are_refused():
    X, y = _regression(n=20)
    net = _net()
    net.params[2][0, 0] = np.inf
    with pytest.raises(ValueError, match="network parameter array 2 has a non-finite value"):
        train(net, X, y, loss=tp.MeanSquaredError(), optimizer=SGD(0.01), epochs=1, batch_size=8)


def test_state_from_parts_reports_missing_pieces():
    X, y = _regression(n=20)
    result = train(_net(), X, y, loss=tp.MeanSquaredError(), optimizer=SGD(0.01, momentum=0.5), epochs=1, batch_size=8)
    scalars, arrays = result.state.to_parts()
    del arrays["weights/1"]
    with pytest.raises(ValueError, match="missing 'weights/1'"):
        TrainingState.from_parts(scalars, arrays)
    scalars, arrays = result.state.to_parts()
    arrays["surprise"] = np.zeros(2)
    with pytest.raises(ValueError, match="unexpected arrays"):
        TrainingState.from_parts(scalars, arrays)


@pytest.mark.parametrize(
    "key,value,text",
    [
        ("epoch", "4", "epoch must be an integer >= 0"),
        ("training_loss", [0.1, float("nan")], "training_loss must be a list of finite numbers"),
        ("rng", [1, 2], "rng must be a dict"),
        ("best_epoch", -1, "best_epoch must be an integer >= 0"),
        ("version", 1, "not a version-2 tinyprop training state"),
    ],
)
def test_state_from_parts_refuses_ill_typed_scalars(key, value, text):
    X, y = _regression(n=20)
    result = train(_net(), X, y, loss=tp.MeanSquaredError(), optimizer=Adam(0.01), epochs=2, batch_size=8,
                   validation=(X, y))
    scalars, arrays = result.state.to_parts()
    scalars[key] = value
    with pytest.raises(ValueError, match=text):
        TrainingState.from_parts(scalars, arrays)
