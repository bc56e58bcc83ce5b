"""The bad-input table of docs/reliability.md: every row is run here.

Each row calls one public function with one bad input and asserts the error
type and that the message names the problem. After every call the harness
checks that nothing the caller passed was modified: the network's parameters,
the user's arrays and metadata, the optimizer's state and an existing model
file are compared with copies taken before the call. All data is synthetic.
"""

from __future__ import annotations

import copy
import dataclasses
import re
import zipfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pytest

import tinyprop as tp
from tinyprop.csvdata import CsvError, read_csv
from tinyprop.modelfile import ModelFileError, fingerprint, load, save
from tinyprop.optim import SGD, Adam
from tinyprop.registry import register_activation
from tinyprop.solve import solve
from tinyprop.train import train

DOC = Path(__file__).resolve().parents[1] / "docs" / "reliability.md"


class NotRegistered(tp.Activation):
    """A custom activation nobody registered."""

    def value(self, z):
        return z

    def derivative(self, z, a):
        return np.ones_like(z)


class Doubling(tp.Activation):
    """Registered for saving, then pretended absent in a file: f(z) = 2 z."""

    def value(self, z):
        return 2 * z

    def derivative(self, z, a):
        return np.full_like(z, 2.0)


register_activation(Doubling, "test_bad_inputs.Doubling")


@dataclass
class Inputs:
    """Everything a row may pass: a network, an optimizer, a saved file and named user values."""

    net: tp.Network
    optimizer: Adam
    path: Path
    user: dict[str, Any]

    def __getattr__(self, name: str) -> Any:  # rows write inputs.X, inputs.metadata_tuple, ...
        try:
            return self.__dict__["user"][name]
        except KeyError:
            raise AttributeError(name) from None


def make_inputs(folder: Path) -> Inputs:
    rng = np.random.default_rng(11)  # synthetic data
    X = rng.normal(size=(8, 3))
    y = rng.normal(size=(8, 2))
    net = tp.build_mlp([3, 4, 2], seed=0)
    path = folder / "model.npz"
    save(net, path)
    X_nan = X.copy()
    X_nan[2, 1] = np.nan
    y_nan = y.copy()
    y_nan[5, 0] = np.inf
    theta_nan = net.get_vector()
    theta_nan[4] = np.nan
    user = {
        "X": X,
        "y": y,
        "X_nan": X_nan,
        "y_nan": y_nan,
        "X_two_columns": X[:, :2].copy(),
        "y_seven_rows": y[:7].copy(),
        "theta_nan": theta_nan,
        "theta_short": np.zeros(3),
        "X_val_wrong": np.zeros((4, 2)),
        "d_out_wrong": np.ones((8, 3)),
        "points_nan": np.array([0.0, np.nan, 1.0]),
        "metadata_tuple": {"hidden": (4, 4)},
        "metadata_array": {"mean": np.zeros(3)},
        "metadata_surrogate": {"note": "\ud800"},
        "X_huge": X / np.abs(X).max() * 1e308,
        "layers_mismatch": [tp.Affine(3, 4), tp.Tanh(), tp.Affine(5, 1)],
    }
    return Inputs(net, Adam(lr=0.01), path, user)


def snapshot(inputs: Inputs) -> dict[str, Any]:
    state = inputs.optimizer.get_state()
    return {
        "params": [p.copy() for p in inputs.net.params],
        "user": copy.deepcopy(inputs.user),
        "optimizer": (state.steps, {k: [a.copy() for a in v] if isinstance(v, list) else np.copy(v)
                                    for k, v in state.arrays.items()}),
        "file": inputs.path.read_bytes(),
    }


def assert_unchanged(before: dict[str, Any], inputs: Inputs) -> None:
    after = snapshot(inputs)
    assert all(np.array_equal(a, b) for a, b in zip(before["params"], after["params"])), "network parameters changed"
    assert _equal(before["user"], after["user"]), "a user argument changed"
    assert before["optimizer"][0] == after["optimizer"][0], "optimizer steps changed"
    assert _equal(before["optimizer"][1], after["optimizer"][1]), "optimizer state changed"
    assert before["file"] == after["file"], "the existing model file changed"


def _equal(a: Any, b: Any) -> bool:
    if isinstance(a, np.ndarray):
        return isinstance(b, np.ndarray) and a.dtype == b.dtype and np.array_equal(a, b, equal_nan=True)
    if isinstance(a, dict):
        return isinstance(b, dict) and a.keys() == b.keys() and all(_equal(a[k], b[k]) for k in a)
    if isinstance(a, (list, tuple)):
        return type(a) is type(b) and len(a) == len(b) and all(_equal(x, z) for x, z in zip(a, b))
    if isinstance(a, tp.Affine):
        return _equal(a.params, b.params)
    return a == b


@dataclass(frozen=True)
class Row:
    id: str
    call: Callable[[Inputs], Any]
    error: type[BaseException]
    message: str  # regex that must be found in the message


def _train(inputs: Inputs, X: Any = None, y: Any = None, **options: Any) -> Any:
    settings = {"loss": tp.MeanSquaredError(), "optimizer": inputs.optimizer, "epochs": 2, "batch_size": 4}
    settings.update(options)
    return train(inputs.net, inputs.X if X is None else X, inputs.y if y is None else y, **settings)


def _resume_with_other_batch_size(inputs: Inputs) -> Any:
    other = inputs.net.copy()
    first = train(other, inputs.X, inputs.y, loss=tp.MeanSquaredError(), optimizer=Adam(lr=0.01), epochs=1,
                  batch_size=4, seed=0)
    return _train(inputs, batch_size=2, seed=0, resume=first.state)


def _first_state(inputs: Inputs, net: tp.Network | None = None, **options: Any) -> Any:
    """The state after one epoch of a run like ``_train``'s (on a copy of the network), with validation."""
    settings = {"loss": tp.MeanSquaredError(), "epochs": 1, "batch_size": 4, "seed": 0,
                "validation": (inputs.X, inputs.y)}
    settings.update(options)
    return train(net or inputs.net.copy(), inputs.X, inputs.y, optimizer=Adam(lr=0.01), **settings).state


def _resume(inputs: Inputs, state: Any, **options: Any) -> Any:
    return _train(inputs, seed=0, validation=(inputs.X, inputs.y), resume=state, **options)


def _resume_best_epoch_without_best_weights(inputs: Inputs) -> Any:
    state = dataclasses.replace(_first_state(inputs, patience=2), best_weights=None, best_loss=-1.0)
    return _resume(inputs, state, patience=2)


def _resume_optimizer_wrong_shape(inputs: Inputs) -> Any:
    state = _first_state(inputs)
    arrays = {name: np.zeros(3) for name in state.optimizer.arrays}
    return _resume(inputs, dataclasses.replace(state, optimizer=dataclasses.replace(state.optimizer, arrays=arrays)))


def _resume_rng_out_of_range(inputs: Inputs) -> Any:
    state = _first_state(inputs)
    state.rng["state"]["state"] = 2**200
    return _resume(inputs, state)


def _resume_other_activation(inputs: Inputs) -> Any:
    other = tp.Network([tp.Affine(3, 4), tp.Sigmoid(), tp.Affine(4, 2)], seed=0)
    return _resume(inputs, _first_state(inputs, other))


def _resume_other_data(inputs: Inputs) -> Any:
    state = _first_state(inputs)
    return train(inputs.net, inputs.X[::-1], inputs.y, loss=tp.MeanSquaredError(), optimizer=inputs.optimizer,
                 epochs=2, batch_size=4, seed=0, validation=(inputs.X, inputs.y), resume=state)


def _concatenated(inputs: Inputs) -> Any:
    other = inputs.path.with_name("both.npz")
    save(tp.build_mlp([3, 4, 2], seed=1), other)
    other.write_bytes(inputs.path.read_bytes() + other.read_bytes())
    return load(other)


def _manifest_edited(inputs: Inputs, old: bytes, new: bytes, name: str) -> Any:
    other = inputs.path.with_name(name)
    with zipfile.ZipFile(inputs.path) as archive:
        members = {info.filename: archive.read(info) for info in archive.infolist()}
    assert old in members["manifest.json"]
    members["manifest.json"] = members["manifest.json"].replace(old, new, 1)
    with zipfile.ZipFile(other, "w") as archive:  # valid ZIP checksums: only the manifest differs
        for member, data in members.items():
            archive.writestr(member, data)
    return load(other)


def _csv(inputs: Inputs, text: str) -> Any:
    path = inputs.path.with_name("data.csv")
    path.write_text(text, encoding="utf-8")
    return read_csv(path).numeric(["x", "y"])


def _write_text(inputs: Inputs) -> Any:
    other = inputs.path.with_name("notes.npz")
    other.write_text("weights: 0.1 0.2 0.3\n")
    return load(other)


def _tampered(inputs: Inputs) -> Any:
    other = inputs.path.with_name("tampered.npz")
    data = bytearray(inputs.path.read_bytes())
    at = data.index(inputs.net.params[0].tobytes())
    data[at] ^= 0x40
    other.write_bytes(bytes(data))
    return load(other)


def _names_unknown_activation(inputs: Inputs) -> Any:
    net = tp.Network([tp.Affine(2, 2), Doubling(), tp.Affine(2, 1)], seed=0)
    other = inputs.path.with_name("custom.npz")
    save(net, other)
    with zipfile.ZipFile(other) as archive:
        members = {info.filename: archive.read(info) for info in archive.infolist()}
    members["manifest.json"] = members["manifest.json"].replace(b"test_bad_inputs.Doubling", b"test_bad_inputs.Halving")
    with zipfile.ZipFile(other, "w") as archive:  # valid ZIP checksums: only the name differs
        for name, data in members.items():
            archive.writestr(name, data)
    return load(other)


def _kink(inputs: Inputs) -> Any:
    net = tp.Network([tp.Affine(1, 1), tp.ReLU(), tp.Affine(1, 1)], init=None)
    net.layers[0].weight[...] = 1.0
    net.layers[2].weight[...] = 1.0
    return tp.check_gradient(net, np.zeros((1, 1)), np.ones(1), tp.SquaredError())


ROWS = [
    # ------------------------------------------------------------ Network and layers
    Row("network-no-layers", lambda i: tp.Network([]), ValueError, r"at least one layer, got an empty list"),
    Row("network-widths-do-not-chain", lambda i: tp.Network(i.layers_mismatch), ValueError,
        r"layer 2 \(Affine\(5, 1, bias=True\)\) expects 5 inputs but the layer before it produces 4"),
    Row("network-layer-not-a-layer", lambda i: tp.Network([tp.Affine(3, 4), "tanh"]), TypeError, r"layer 1 is a str"),
    Row("network-integer-dtype", lambda i: tp.Network([tp.Affine(3, 1)], dtype=np.int32), TypeError,
        r"dtype must be float32 or float64, got int32"),
    Row("affine-zero-units", lambda i: tp.Affine(3, 0), ValueError, r"n_out must be a positive integer, got 0"),
    Row("standardize-zero-scale", lambda i: tp.Standardize([0.0, 1.0], [1.0, 0.0]), ValueError,
        r"scale must be positive, got 0\.0 at column 1"),
    Row("standardize-scale-too-small", lambda i: tp.Standardize([0.0], [1e-310]), ValueError,
        r"scale must be at least 5\.563e-309 \(so that 1 / scale is finite\), got 1e-310 at column 0"),
    Row("leaky-relu-negative-slope", lambda i: tp.LeakyReLU(-0.1), ValueError,
        r"slope must be a finite number >= 0, got -0\.1"),
    Row("predict-wrong-columns", lambda i: i.net.predict(i.X_two_columns), ValueError,
        r"X must have shape \(n_samples, 3\), got shape \(8, 2\)"),
    Row("predict-nan", lambda i: i.net.predict(i.X_nan), ValueError,
        r"X has a non-finite value \(nan\) at row 2, column 1"),
    Row("predict-one-sample-as-1d", lambda i: i.net.predict(i.X[0]), ValueError,
        r"for one sample use X\.reshape\(1, -1\)"),
    Row("predict-text", lambda i: i.net.predict([["a", "b", "c"]]), TypeError,
        r"X must hold real numbers .*got dtype <U1"),
    Row("set-vector-wrong-length", lambda i: i.net.set_vector(i.theta_short), ValueError,
        r"theta must have shape \(26,\), got shape \(3,\)"),
    Row("set-vector-nan", lambda i: i.net.set_vector(i.theta_nan), ValueError,
        r"theta has a non-finite value \(nan\) at entry 4"),
    Row("backward-wrong-d-out", lambda i: i.net.backward(i.net.forward(i.X)[1], i.d_out_wrong), ValueError,
        r"d_out must have the output's shape \(8, 2\), got shape \(8, 3\)"),
    # ------------------------------------------------------------ train
    Row("train-targets-wrong-rows", lambda i: _train(i, y=i.y_seven_rows), ValueError,
        r"y must have shape \(8, 2\) to match the 8 samples and 2 network outputs, got shape \(7, 2\)"),
    Row("train-targets-infinite", lambda i: _train(i, y=i.y_nan), ValueError,
        r"y has a non-finite value \(inf\) at row 5, column 0"),
    Row("train-inputs-nan", lambda i: _train(i, X=i.X_nan), ValueError,
        r"X has a non-finite value \(nan\) at row 2, column 1"),
    Row("train-batch-size-zero", lambda i: _train(i, batch_size=0), ValueError,
        r"batch_size must be a positive integer, got 0"),
    Row("train-epochs-not-integer", lambda i: _train(i, epochs=2.5), TypeError,
        r"epochs must be a positive integer, got 2\.5"),
    Row("train-targets-overflow-the-loss", lambda i: _train(i, y=i.y * 1e200), tp.TrainingDiverged,
        r"The targets are too large for the loss in float64: \|y\| reaches .*lowering the learning rate cannot help"),
    Row("train-loss-as-text", lambda i: _train(i, loss="mse"), TypeError, r"loss must be a tinyprop Loss .*got str"),
    Row("train-optimizer-missing", lambda i: _train(i, optimizer=None), TypeError,
        r"optimizer must be a tinyprop Optimizer .*got NoneType"),
    Row("train-patience-without-validation", lambda i: _train(i, patience=3), ValueError,
        r"patience \(early stopping\) needs validation data"),
    Row("train-validation-wrong-columns", lambda i: _train(i, validation=(i.X_val_wrong, i.y[:4])), ValueError,
        r"validation X must have shape \(n_samples, 3\), got shape \(4, 2\)"),
    Row("train-negative-l2", lambda i: _train(i, l2=-1e-3), ValueError,
        r"l2 must be a finite number in \[0\.0, inf\], got -0\.001"),
    Row("train-negative-seed", lambda i: _train(i, seed=-1), ValueError,
        r"seed must be None or an integer >= 0, got -1"),
    Row("train-resume-other-settings", _resume_with_other_batch_size, ValueError,
        r"resume state does not match this training run \(batch_size: state has 4, this call 2\)"),
    Row("resume-best-epoch-without-best-weights", _resume_best_epoch_without_best_weights, ValueError,
        r"resume state is inconsistent: training state best_epoch, best_loss, epochs_since_best are 1, -1\.0, 0"),
    Row("resume-optimizer-arrays-wrong-shape", _resume_optimizer_wrong_shape, ValueError,
        r"state array 0 has shape \(3,\) float64, the parameter array it updates has \(26,\) float64"),
    Row("resume-generator-state-out-of-range", _resume_rng_out_of_range, ValueError,
        r"resume state has an unusable rng state"),
    Row("resume-other-activation", _resume_other_activation, ValueError, r"resume state comes from another network"),
    Row("resume-other-data", _resume_other_data, ValueError,
        r"resume state does not match this training run \(data_sha256"),
    Row("sgd-negative-learning-rate", lambda i: SGD(lr=-0.1), ValueError, r"lr must be"),
    # ------------------------------------------------------------ solve
    Row("solve-unknown-method", lambda i: solve(i.net, i.X, i.y, method="gauss-newton"), ValueError,
        r"method must be one of \('levenberg-marquardt', 'blocked-levenberg-marquardt', 'lbfgs'\) or None, "
        r"got 'gauss-newton'"),
    Row("solve-too-few-residuals", lambda i: solve(i.net, i.X, i.y), ValueError,
        r"needs at least as many residuals as parameters: 16 residuals .* for 26 parameters; use method='lbfgs'"),
    Row("solve-zero-tolerance", lambda i: solve(i.net, i.X, i.y, method="lbfgs", tolerance=0.0), ValueError,
        r"tolerance must be a finite number in \("),
    Row("solve-targets-wrong-rows", lambda i: solve(i.net, i.X, i.y_seven_rows, method="lbfgs"), ValueError,
        r"y must have shape \(8, 2\)"),
    Row("solve-not-a-network", lambda i: solve([i.net], i.X, i.y), TypeError,
        r"net must be a tinyprop Network, got list"),
    # ------------------------------------------------------------ check_*
    Row("check-gradient-loss-class", lambda i: tp.check_gradient(i.net, i.X, i.y, tp.SquaredError), TypeError,
        r"loss must be a tinyprop Loss \(e\.g\. tp\.SquaredError\(\)\), got the class SquaredError; pass an instance"),
    Row("check-gradient-targets-wrong-shape", lambda i: tp.check_gradient(i.net, i.X, i.y_seven_rows,
                                                                          tp.SquaredError()), ValueError,
        r"y must have shape \(8, 2\)"),
    Row("check-gradient-exactly-on-a-kink", _kink, ValueError, r"kink"),
    Row("check-activation-class-not-instance", lambda i: tp.check_activation(tp.Tanh), TypeError,
        r"activation must be an instance of a tp\.Activation subclass, got the class Tanh; pass an instance, Tanh\(\)"),
    Row("check-activation-nan-points", lambda i: tp.check_activation(tp.Tanh(), points=i.points_nan), ValueError,
        r"points must be a non-empty list of finite numbers"),
    # ------------------------------------------------------------ save, load, fingerprint
    Row("save-unregistered-activation", lambda i: save(tp.Network([tp.Affine(1, 1), NotRegistered()], seed=0), i.path),
        ModelFileError,
        r"layer 1 is the activation .*NotRegistered, which is not registered; "
        r"call tinyprop\.registry\.register_activation"),
    Row("save-tuple-in-metadata", lambda i: save(i.net, i.path, metadata=i.metadata_tuple), ModelFileError,
        r"metadata\['hidden'\] has type tuple, which JSON cannot hold \(use a list\)"),
    Row("save-array-in-metadata", lambda i: save(i.net, i.path, metadata=i.metadata_array), ModelFileError,
        r"metadata\['mean'\] has type ndarray, which JSON cannot hold \(convert it with .*\.tolist\(\)\)"),
    Row("save-not-a-network", lambda i: save(i.net.params, i.path), TypeError,
        r"expected a tinyprop Network, got list"),
    Row("save-into-missing-folder", lambda i: save(i.net, i.path.parent / "missing" / "m.npz"), FileNotFoundError,
        r"cannot write .*missing/m\.npz: the folder does not exist"),
    Row("load-missing-file", lambda i: load(i.path.with_name("absent.npz")), FileNotFoundError, r"absent\.npz"),
    Row("load-text-file", _write_text, ModelFileError,
        r"notes\.npz: not a tinyprop archive: it does not start with a ZIP signature"),
    Row("load-tampered-weights", _tampered, ModelFileError,
        r"tampered\.npz: the archive is damaged or truncated "
        r"\(BadZipFile: Bad CRC-32 for file 'layer0\.weight\.npy'\)"),
    Row("load-unknown-activation", _names_unknown_activation, ModelFileError,
        r"names the activation 'test_bad_inputs\.Halving', which is not registered in this program"),
    Row("load-two-archives-concatenated", _concatenated, ModelFileError,
        r"both\.npz: the archive is ambiguous: \d+ bytes before the first member"),
    Row("load-device-file", lambda i: load("/dev/zero"), ModelFileError,
        r"/dev/zero: not a regular file \(a character device\)"),
    Row("load-overflowing-manifest-number",
        lambda i: _manifest_edited(i, b'"format_version": 1', b'"format_version": 1e999', "big.npz"),
        ModelFileError, r"big\.npz: manifest\.json is not valid UTF-8 JSON: 1e999 is not a finite number"),
    Row("save-lone-surrogate-in-metadata", lambda i: save(i.net, i.path, metadata=i.metadata_surrogate), ModelFileError,
        r"metadata\['note'\] holds the character '\\ud800' at position 0, which UTF-8 cannot encode"),
    Row("csv-python-only-number", lambda i: _csv(i, "x,y\n1_0,2\n"), CsvError,
        r"data\.csv, line 2, column 'x': '1_0' is not a number$"),
    Row("csv-several-bad-cells", lambda i: _csv(i, "x,y\n1,\n2,n/a\ninf,3\n"), CsvError,
        r"data\.csv: 3 cells are not usable numbers .*\n  line 2, column 'y': the cell is empty.*\n"
        r"  line 3, column 'y': 'n/a' is not a number\n  line 4, column 'x': 'inf' is not a finite number"),
    Row("export-fixed-point-calibration-overflows",
        lambda i: tp.export_c_fixed_point(i.net, i.path.parent, i.X_huge), ValueError,
        r"a calibrated magnitude of 1e\+308 times headroom 2 overflows float64; no fixed-point format can hold it"),
    Row("fingerprint-not-a-network", lambda i: fingerprint("model.npz"), TypeError,
        r"expected a tinyprop Network, got str"),
    Row("network-negative-seed", lambda i: tp.Network([tp.Affine(3, 1)], seed=-1), ValueError,
        r"seed must be None or an integer >= 0, got -1"),
    Row("network-fractional-seed", lambda i: tp.Network([tp.Affine(3, 1)], seed=1.5), TypeError,
        r"seed must be None or an integer >= 0, got 1\.5"),
    Row("check-gradient-negative-tolerance",
        lambda i: tp.check_gradient(i.net, i.X, i.y, tp.SquaredError(), tolerance=-1.0), ValueError,
        r"tolerance must be a finite number in \(0\.0, inf\], got -1\.0"),
    Row("check-gradient-sample-too-small",
        lambda i: tp.check_gradient(i.net, i.X, i.y, tp.SquaredError(), parameters=3), ValueError,
        r"parameters must be an integer of at least 4 \(one per parameter array\) or None for all, got 3"),
]


@pytest.mark.parametrize("row", ROWS, ids=[row.id for row in ROWS])
def test_bad_input_is_refused_clearly_and_changes_nothing(row, tmp_path):
    inputs = make_inputs(tmp_path)
    before = snapshot(inputs)
    with pytest.raises(row.error, match=row.message) as caught:
        row.call(inputs)
    assert type(caught.value) is row.error or row.error is ModelFileError
    assert_unchanged(before, inputs)


def test_the_rows_are_distinct_and_many():
    assert len({row.id for row in ROWS}) == len(ROWS) >= 25


def test_docs_table_lists_exactly_these_rows():
    text = DOC.read_text(encoding="utf-8")
    table = text[text.index("## The bad-input table"):text.index("## Command-line cases")]
    documented = re.findall(r"^\| `([a-z0-9-]+)` \|", table, flags=re.M)
    assert sorted(documented) == sorted(row.id for row in ROWS)
    assert len(documented) == len(set(documented))
