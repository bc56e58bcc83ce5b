"""sweep(): identical results on every executor, failures recorded, interrupted sweeps resumed.

References outside the project: ``concurrent.futures`` (the standard library's
executors) runs the trainings; the data is synthetic (labelled below). The
ready recipe is checked bit for bit against tinyprop's documented default
recipe, ``fit_tabular_regression``.
"""

from __future__ import annotations

import dataclasses
import functools
import inspect
import json
import multiprocessing
import pickle
from concurrent.futures import ProcessPoolExecutor, ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pytest

import tinyprop as tp
from tinyprop.recipes import RECIPE_HIDDEN, TabularRegression, fit_tabular_regression
from tinyprop.sweep import SweepRecord, TrainingData, setting_key, sweep

QUICK = TabularRegression(epochs=25, patience=10)


def synthetic(n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Synthetic regression data: y = sin(x0) + x1 * x2 + 0.05 noise, x uniform on [-2, 2]^3."""
    rng = np.random.default_rng(seed)
    X = rng.uniform(-2.0, 2.0, (n, 3))
    return X, np.sin(X[:, 0]) + X[:, 1] * X[:, 2] + 0.05 * rng.normal(size=n)


X, Y = synthetic(240, 0)
VALIDATION = synthetic(80, 1)
TEST = synthetic(80, 2)
SETTINGS = [
    {"hidden": [8], "lr": 3e-3, "seed": 0},
    {"hidden": [8], "lr": 1e300, "seed": 0},  # diverges in its first epoch
    {"hidden": [12], "lr": 1e-2, "decoupled_decay": 1e-4, "seed": 1},
    {"hidden": [6, 6], "lr": 3e-3, "l2": 1e-3, "seed": 2},
    {"hidden": [8], "lr": 3e-3, "seed": 5},
]


def without_time(records) -> list[SweepRecord]:
    return [dataclasses.replace(record, wall_time=0.0) for record in records]


def assert_same_sweep(a, b) -> None:
    """Identical tables apart from wall time, and bit-identical networks."""
    assert without_time(a.records) == without_time(b.records)
    for net_a, net_b in zip(a.networks, b.networks):
        assert (net_a is None) == (net_b is None)
        if net_a is not None:
            for p, q in zip(net_a.params, net_b.params):
                assert np.array_equal(p, q)


@pytest.fixture(scope="module")
def sequential():
    return sweep(QUICK, SETTINGS, X, Y, validation=VALIDATION, test=TEST)


# ----------------------------------------------------------------------------- the recipe
def assert_same_run(run, reference) -> None:
    """Two ``(network, TrainingResult)`` pairs with the same layers, bit-identical weights and the same history."""
    (net, result), (reference_net, reference_result) = run, reference
    assert [type(layer) for layer in net.layers] == [type(layer) for layer in reference_net.layers]
    for p, q in zip(net.params, reference_net.params):
        assert np.array_equal(p, q)
    assert result.history == reference_result.history
    assert (result.epochs_run, result.best_epoch) == (reference_result.epochs_run, reference_result.best_epoch)


def adam_branch(*args, **kwargs):
    """The adam-early-stopping branch of the default recipe, as ``(net, TrainingResult)``."""
    net, result = fit_tabular_regression(*args, method="adam-early-stopping", **kwargs)
    assert result.method == "adam-early-stopping" and result.reason == "requested"
    return net, result.training


def test_recipe_defaults_reproduce_fit_tabular_regression():
    # the ready recipe is the documented default recipe's mini-batch branch, not a second one
    assert_same_run(TabularRegression(epochs=40)({"hidden": [7], "seed": 3}, TrainingData(X, Y)),
                    adam_branch(X, Y, hidden=[7], seed=3, epochs=40))


def test_default_recipe_is_fit_tabular_regression_bit_for_bit():
    # every default of the ready recipe is the library recipe's, including the
    # patience: the run stops early, so a different patience would change it
    defaults = {name: p.default for name, p in inspect.signature(fit_tabular_regression).parameters.items()}
    recipe = TabularRegression()
    assert (recipe.hidden, recipe.epochs, recipe.seed) == (RECIPE_HIDDEN, defaults["epochs"], defaults["seed"])
    run, reference = recipe({}, TrainingData(X, Y)), adam_branch(X, Y)
    assert run[1].stop_reason == "early stopping" and run[1].epochs_run < recipe.epochs
    assert_same_run(run, reference)
    # the comparison can fail: another patience gives another run
    _, other = dataclasses.replace(recipe, patience=recipe.patience // 2)({}, TrainingData(X, Y))
    assert other.epochs_run != reference[1].epochs_run and other.history != reference[1].history


def test_recipe_refuses_unknown_keys_and_bad_values():
    with pytest.raises(ValueError, match=r"unknown setting key\(s\) \['learning_rate'\]"):
        QUICK({"learning_rate": 0.1}, TrainingData(X, Y))
    with pytest.raises(TypeError, match="hidden must be a non-empty list"):
        TabularRegression(hidden=[])
    with pytest.raises(ValueError, match="lr"):
        TabularRegression(lr=-1.0)
    with pytest.raises(TypeError, match="seed"):
        TabularRegression(seed=1.5)


@pytest.mark.parametrize("seed, error", [(1.5, TypeError), (None, TypeError), (True, TypeError), (-1, ValueError)])
def test_both_forms_of_the_default_recipe_check_the_seed_alike(seed, error):
    """One seed check (a non-integer is a TypeError, a negative one a ValueError), in both forms."""
    with pytest.raises(error, match=r"seed must be an integer >= 0, got"):
        fit_tabular_regression(X, Y, seed=seed)
    with pytest.raises(error, match=r"seed must be an integer >= 0, got"):
        TabularRegression(seed=seed)


# ----------------------------------------------------------------------------- the table
def test_table_rows(sequential):
    records = sequential.records
    assert [r.setting for r in records] == SETTINGS
    assert [r.status for r in records] == ["ok", "failed", "ok", "ok", "ok"]
    assert sequential.trained == tuple(setting_key(s) for s in SETTINGS)
    for record, net in zip(records, sequential.networks):
        if record.ok:
            assert record.error is None and record.fingerprint == tp.fingerprint(net)
            # the table's numbers recomputed here from the returned network
            prediction = net.predict(TEST[0])[:, 0]
            assert record.test_rmse == pytest.approx(np.sqrt(np.mean((prediction - TEST[1]) ** 2)), rel=1e-12)
            assert record.validation_loss == pytest.approx(
                tp.MeanSquaredError().value(net.predict(VALIDATION[0]), VALIDATION[1][:, None]), rel=1e-12)
            assert record.test_loss == pytest.approx(record.test_rmse**2, rel=1e-9)  # one output: MSE = RMSE^2
            assert record.wall_time > 0 and record.epochs_run >= 1 and record.model_file is None


def test_column_targets_are_accepted_like_flat_ones(sequential):
    result = sweep(QUICK, SETTINGS[:1], X, Y, validation=(VALIDATION[0], VALIDATION[1][:, None]),
                   test=(TEST[0], TEST[1][:, None]))
    assert without_time(result.records) == without_time(sequential.records[:1])


def test_divergent_setting_is_recorded_and_the_others_complete(sequential):
    failed = sequential.records[1]
    assert failed.status == "failed" and sequential.networks[1] is None
    assert failed.error.startswith("TrainingDiverged: training diverged in epoch 1")
    assert "lr=1e+300" in failed.error
    assert failed.stop_reason == "diverged" and failed.epochs_run == 0
    assert failed.validation_loss is None and failed.fingerprint is None
    assert sum(r.ok for r in sequential.records) == 4


def raising_recipe(setting, data):
    """A recipe that fails on purpose for odd seeds and returns a wrong type for seed 2."""
    if setting["seed"] % 2:
        raise RuntimeError(f"no network for seed {setting['seed']}")
    if setting["seed"] == 2:
        return "not a network"
    return QUICK(setting, data)


def test_raising_recipe_is_recorded():
    result = sweep(raising_recipe, [{"seed": s} for s in range(4)], X, Y)
    assert [r.status for r in result.records] == ["ok", "failed", "failed", "failed"]
    assert result.records[1].error == "RuntimeError: no network for seed 1"
    expected = "TypeError: the recipe must return a Network or (Network, TrainingResult), got str"
    assert result.records[2].error == expected
    unknown = sweep(QUICK, [{"seed": 0, "widths": [3]}], X, Y).records[0]
    assert unknown.status == "failed" and "unknown setting key(s) ['widths']" in unknown.error


def test_best_and_summary(sequential):
    record, net = sequential.best()
    ok = [r for r in sequential.records if r.ok]
    assert record.validation_loss == min(r.validation_loss for r in ok)
    assert record.fingerprint == tp.fingerprint(net)
    lines = sequential.summary().splitlines()
    assert len(lines) == 1 + len(SETTINGS)
    assert "failed" in lines[2] and "TrainingDiverged" in lines[2]
    with pytest.raises(ValueError, match="no row has a validation loss"):
        sweep(QUICK, [{"seed": 0}], X, Y).best()


# ----------------------------------------------------------------------------- executors
def two_processes(**pool_options):
    return functools.partial(ProcessPoolExecutor, max_workers=2, **pool_options)


@pytest.mark.parametrize(
    "kind", ["process pool instance", "process pool factory", "spawned process pool factory", "thread pool instance"]
)
def test_executors_give_the_sequential_result(sequential, kind):
    if kind == "process pool instance":
        with ProcessPoolExecutor(max_workers=2) as pool:
            result = sweep(QUICK, SETTINGS, X, Y, validation=VALIDATION, test=TEST, executor=pool)
    elif kind == "process pool factory":
        result = sweep(QUICK, SETTINGS, X, Y, validation=VALIDATION, test=TEST, executor=two_processes())
    elif kind == "spawned process pool factory":  # fresh interpreters: the data is pickled once per worker
        spawn = two_processes(mp_context=multiprocessing.get_context("spawn"))
        result = sweep(QUICK, SETTINGS, X, Y, validation=VALIDATION, test=TEST, executor=spawn)
    else:
        with ThreadPoolExecutor(max_workers=2) as pool:
            result = sweep(QUICK, SETTINGS, X, Y, validation=VALIDATION, test=TEST, executor=pool)
    assert_same_sweep(result, sequential)
    assert result.trained == sequential.trained


class RecordingPool(ProcessPoolExecutor):
    """A process pool that notes the pickled size of every task's arguments."""

    sizes: list[int] = []

    def submit(self, fn, /, *args, **kwargs):
        RecordingPool.sizes.append(len(pickle.dumps(args)))
        return super().submit(fn, *args, **kwargs)


@pytest.mark.parametrize("as_factory", [True, False])
def test_data_travels_once_per_worker_with_a_factory(as_factory):
    data_bytes = X.nbytes + Y.nbytes
    RecordingPool.sizes = []
    settings = [{"hidden": [4], "epochs": 2, "seed": s} for s in range(4)]
    if as_factory:
        sweep(QUICK, settings, X, Y, executor=functools.partial(RecordingPool, max_workers=2))
        assert len(RecordingPool.sizes) == 4 and max(RecordingPool.sizes) < data_bytes / 10  # a token, not the data
    else:
        with RecordingPool(max_workers=2) as pool:
            sweep(QUICK, settings, X, Y, executor=pool)
        assert len(RecordingPool.sizes) == 4 and min(RecordingPool.sizes) > data_bytes  # the data with every task


def read_only_recipe(setting, data):
    """Fails unless the data is read-only and carries no test rows."""
    assert not data.X.flags.writeable and not data.y.flags.writeable
    assert not data.validation[0].flags.writeable and not hasattr(data, "test")
    data.X[0, 0] = 1.0  # must raise: no recipe can change what the next one sees


def test_recipes_get_read_only_data_without_test_rows():
    for executor in (None, two_processes()):
        record = sweep(read_only_recipe, [{"seed": 0}], X, Y, validation=VALIDATION, test=TEST,
                       executor=executor).records[0]
        assert record.error == "ValueError: assignment destination is read-only"


def mutating_recipe(setting, data):
    setting["seed"] += 100
    return QUICK(setting, data)


def test_nothing_the_user_passes_is_modified():
    settings = [{"seed": 0, "epochs": 2}]
    X_copy, settings_copy = X.copy(), json.loads(json.dumps(settings))
    result = sweep(mutating_recipe, settings, X, Y)
    assert np.array_equal(X, X_copy) and settings == settings_copy
    assert result.records[0].setting == settings_copy[0]


# ----------------------------------------------------------------------------- resume
@dataclasses.dataclass(frozen=True)
class CountingRecipe:
    """Appends the setting's key to ``log`` for every training it starts; interrupts at call ``stop_at``.

    ``stop_at`` is left out of the repr, which is how a results folder tells recipes apart.
    """

    log: str
    stop_at: int | None = dataclasses.field(default=None, repr=False)

    def __call__(self, setting, data):
        log = Path(self.log)
        calls = len(log.read_text().splitlines()) if log.exists() else 0
        if self.stop_at is not None and calls + 1 == self.stop_at:
            raise KeyboardInterrupt  # like Ctrl-C in the middle of a sweep
        with open(log, "a") as handle:
            handle.write(setting_key(setting) + "\n")
        return QUICK(setting, data)


def test_interrupted_sweep_resumes_and_skips_finished_settings(tmp_path, sequential):
    log = tmp_path / "calls.txt"
    folder = tmp_path / "results"
    with pytest.raises(KeyboardInterrupt):
        sweep(CountingRecipe(str(log), stop_at=4), SETTINGS, X, Y, validation=VALIDATION, test=TEST,
              results_path=folder)
    assert len(log.read_text().splitlines()) == 3
    table = (folder / "table.jsonl").read_text().splitlines()
    assert len(table) == 1 + 3  # header + the three finished rows, written as they completed
    assert len(list((folder / "models").glob("*.npz"))) == 2  # the divergent setting has no model

    resumed = sweep(CountingRecipe(str(log)), SETTINGS, X, Y, validation=VALIDATION, test=TEST, results_path=folder)
    calls = log.read_text().splitlines()
    assert len(calls) == 5  # 3 before the interruption + only the 2 unfinished ones
    assert calls[3:] == [setting_key(s) for s in SETTINGS[3:]]
    assert resumed.trained == tuple(calls[3:])
    assert [r.model_file is not None for r in resumed.records] == [r.ok for r in resumed.records]
    stripped = dataclasses.replace(resumed,
                                   records=tuple(dataclasses.replace(r, model_file=None) for r in resumed.records))
    assert_same_sweep(stripped, sequential)

    again = sweep(CountingRecipe(str(log)), SETTINGS, X, Y, validation=VALIDATION, test=TEST, results_path=folder)
    assert len(log.read_text().splitlines()) == 5 and again.trained == ()
    assert_same_sweep(again, resumed)


def test_resume_with_more_settings_and_retry_failed(tmp_path):
    log, folder = tmp_path / "calls.txt", tmp_path / "results"
    recipe = CountingRecipe(str(log))
    sweep(recipe, SETTINGS[:2], X, Y, results_path=folder)
    extended = sweep(recipe, SETTINGS[:3], X, Y, results_path=folder, executor=two_processes())
    assert extended.trained == (setting_key(SETTINGS[2]),)
    retried = sweep(recipe, SETTINGS[:3], X, Y, results_path=folder, retry_failed=True)
    assert retried.trained == (setting_key(SETTINGS[1]),) and retried.records[1].status == "failed"
    assert len(log.read_text().splitlines()) == 4


def test_results_folder_refuses_another_sweep_and_tampered_models(tmp_path):
    folder = tmp_path / "results"
    first = sweep(QUICK, SETTINGS[:1], X, Y, results_path=folder)
    with pytest.raises(ValueError, match="holds a sweep with another data_sha256"):
        sweep(QUICK, SETTINGS[:1], X, Y + 1.0, results_path=folder)
    with pytest.raises(ValueError, match="holds a sweep with another recipe"):
        sweep(TabularRegression(epochs=3), SETTINGS[:1], X, Y, results_path=folder)
    # a model file replaced by another network is caught by its fingerprint
    other = sweep(QUICK, [{"seed": 9}], X, Y).networks[0]
    tp.save(other, folder / first.records[0].model_file)
    with pytest.raises(ValueError, match="has fingerprint .* but the table lists"):
        sweep(QUICK, SETTINGS[:1], X, Y, results_path=folder)
    (folder / "table.jsonl").write_text('{"format": "something else"}\n')
    with pytest.raises(ValueError, match="is not a version-1 sweep table"):
        sweep(QUICK, SETTINGS[:1], X, Y, results_path=folder)


# ----------------------------------------------------------------------------- progress and bad input
def test_progress_lines(capsys):
    sweep(QUICK, [{"seed": 0, "epochs": 2}, {"seed": 0, "lr": 1e300}], X, Y, validation=VALIDATION, progress=True)
    lines = capsys.readouterr().err.splitlines()
    assert lines[0].startswith("sweep: 1/2 trained  ok  ") and "validation loss" in lines[0]
    assert lines[1].startswith("sweep: 2/2 trained  failed  ") and "TrainingDiverged" in lines[1]


def test_setting_key_is_canonical():
    assert setting_key({"seed": 1, "lr": 0.001}) == setting_key({"lr": 1e-3, "seed": 1}) == '{"lr":0.001,"seed":1}'
    assert setting_key({"seed": 1}) != setting_key({"seed": 1.0})


class FakeClient:
    def get_executor(self):
        raise AssertionError("not called")


@pytest.mark.parametrize(
    "arguments, error, message",
    [
        ({"settings": []}, ValueError, "settings is empty"),
        ({"settings": {"seed": 0}}, TypeError, "settings must be a list of dicts, got dict"),
        ({"settings": [{"seed": 0}, {"seed": 0}]}, ValueError, r"settings 0 and 1 are the same setting"),
        ({"settings": [{"hidden": (8,)}]}, ValueError, r"setting 0: .*type tuple.*use a list"),
        ({"settings": [{"lr": float("nan")}]}, ValueError, "setting 0: .*finite"),
        ({"settings": [3]}, TypeError, "setting 0: a setting must be a dict"),
        ({"recipe": "TabularRegression"}, TypeError, "recipe must be callable"),
        ({"loss": "mse"}, TypeError, "loss must be a tinyprop Loss"),
        ({"executor": FakeClient()}, TypeError, "for Dask pass client.get_executor()"),
        ({"executor": lambda: None}, TypeError, "a factory accepting initializer= and initargs="),
        ({"test": (X, Y[:10])}, ValueError, r"test y must have shape \(240,\) or \(240, 1\)"),
        ({"test": (X, np.stack([Y, Y], axis=1))}, ValueError, r"as many targets as the training y"),
        ({"test": (X[:, :2], Y)}, ValueError, r"test X must have shape \(n, 3\)"),
        ({"validation": X}, TypeError, "validation must be a pair"),
        ({"y": Y[:-1]}, ValueError, r"y must have shape \(240,\)"),
        ({"X": np.where(X > 1.9, np.nan, X)}, ValueError, "X has a non-finite value"),
        ({"progress": 1}, TypeError, "progress must be True or False"),
    ],
)
def test_bad_arguments(arguments, error, message):
    call = {"recipe": QUICK, "settings": [{"seed": 0}], "X": X, "y": Y, **arguments}
    with pytest.raises(error, match=message):
        sweep(call.pop("recipe"), call.pop("settings"), call.pop("X"), call.pop("y"), **call)
