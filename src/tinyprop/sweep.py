"""Many trainings at once: one network per setting, sequentially or on any executor.

:func:`sweep` calls ``recipe(setting, data)`` once per setting and returns a
table of :class:`SweepRecord` rows plus the trained networks. A *recipe* is a
picklable callable (a module-level function, or an instance of a small
dataclass such as :class:`tinyprop.recipes.TabularRegression`) that builds and trains one
network from one *setting*, a dict of JSON values like
``{"hidden": [32], "lr": 0.001, "seed": 3}``, and returns the network, or
``(network, training_result)``.

Every row is computed from the recipe, the setting and the data alone, so the
same sweep gives bit-identical networks and the same table (apart from
``wall_time``) sequentially, on a ``ProcessPoolExecutor`` or on a cluster, as
long as every process uses the same numpy build on the same kind of CPU.

Where the work runs (``executor``):

- ``None``: one after the other, in this process;
- a *factory* (``ProcessPoolExecutor``, ``ThreadPoolExecutor``,
  ``functools.partial(ProcessPoolExecutor, max_workers=4)``, any callable
  accepting ``initializer=`` and ``initargs=``): the sweep creates the pool,
  hands the data to every worker once through the initializer, and shuts the
  pool down at the end;
- an ``Executor`` instance: a Dask ``client.get_executor()`` receives the
  data once per worker (``client.scatter(..., broadcast=True)``); any other
  executor receives it with every task (a thread pool shares it in memory).

Failures: an exception raised by the recipe (:class:`~tinyprop.train.TrainingDiverged`
included) or a non-finite validation or test loss makes the row
``status="failed"`` with ``error="<ExceptionType>: <message>"``; the sweep
goes on. Exceptions of the executor itself (a worker process killed, a lost
connection) stop the sweep: they say nothing about the setting.

Resume: with ``results_path`` (a folder), each finished row is written as it
completes: the network with :func:`tinyprop.modelfile.save` under
``models/<first 16 hex digits of sha256(key)>.npz``, then the whole table,
rewritten atomically as ``table.jsonl``. A later call with the same folder
skips every setting whose key (its canonical JSON, :func:`setting_key`) is
already in the table and loads its network. The file layout is in
``docs/sweeps.md``.
"""

from __future__ import annotations

import json
import math
import os
import secrets
import sys
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from concurrent.futures import Executor, as_completed
from dataclasses import dataclass, field, fields, replace
from pathlib import Path
from typing import Any

import numpy as np

from ._json import canonical_json, sha256_hex
from ._validate import as_float_array, as_samples, as_targets
from .archive import ArchiveError, array_record, check_json, write_bytes_atomically
from .losses import Loss, MeanSquaredError
from .modelfile import fingerprint, load_model_file, save
from .network import Network
from .train import TrainingDiverged, TrainingResult

__all__ = ["sweep", "setting_key", "SweepResult", "SweepRecord", "TrainingData"]

STATUS_OK = "ok"
STATUS_FAILED = "failed"
TABLE_FORMAT = "tinyprop-sweep-table"
TABLE_VERSION = 1
TABLE_FILE = "table.jsonl"
MODELS_FOLDER = "models"
_FLOAT_DTYPES = (np.dtype(np.float32), np.dtype(np.float64))


# ---------------------------------------------------------------- data
def _read_only_copy(value: Any, name: str) -> np.ndarray:
    """A read-only float copy; float32 stays float32, anything else numeric becomes float64."""
    array = np.asarray(value)
    dtype = array.dtype if array.dtype in _FLOAT_DTYPES else np.dtype(np.float64)
    copied = np.array(as_float_array(array, name, dtype), copy=True)
    copied.flags.writeable = False
    return copied


def _checked_pair(pair: Any, name: str, n_columns: int, n_targets: int) -> tuple[np.ndarray, np.ndarray]:
    """``(X, y)``: ``X`` ``(n, n_columns)``, ``y`` ``(n, n_targets)`` (or ``(n,)`` for one target); read-only copies."""
    if not isinstance(pair, (tuple, list)) or len(pair) != 2:
        raise TypeError(f"{name} must be a pair (X, y) or None, got {type(pair).__name__}")
    X = _read_only_copy(pair[0], f"{name} X")
    y = _read_only_copy(pair[1], f"{name} y")
    if X.ndim != 2 or X.shape[1] != n_columns:
        raise ValueError(f"{name} X must have shape (n, {n_columns}) like the training X, got shape {X.shape}")
    if y.ndim not in (1, 2) or y.shape[0] != X.shape[0] or _targets(y) != n_targets:
        expected = f"({X.shape[0]},) or ({X.shape[0]}, 1)" if n_targets == 1 else f"({X.shape[0]}, {n_targets})"
        raise ValueError(
            f"{name} y must have shape {expected} (one row per row of {name} X, as many targets as the "
            f"training y), got shape {y.shape}"
        )
    return X, y


def _targets(y: np.ndarray) -> int:
    """Number of target columns of a 1-D or 2-D target array."""
    return 1 if y.ndim == 1 else int(y.shape[1])


@dataclass(frozen=True, eq=False)
class TrainingData:
    """What a recipe receives besides its setting: training rows and, if given, validation rows.

    ``X`` ``(n, d)``; ``y`` ``(n,)`` or ``(n, m)``; ``validation`` ``None`` or
    ``(X_val, y_val)`` shaped alike. The constructor checks the shapes and
    stores read-only copies (float32 stays float32, other numbers become
    float64), so no recipe can change the data another setting sees. Test
    rows never reach a recipe.
    """

    X: np.ndarray
    y: np.ndarray
    validation: tuple[np.ndarray, np.ndarray] | None = None

    def __post_init__(self) -> None:
        X = _read_only_copy(self.X, "X")
        y = _read_only_copy(self.y, "y")
        if X.ndim != 2:
            raise ValueError(f"X must have shape (n_samples, n_features), got shape {X.shape}")
        if y.ndim not in (1, 2) or y.shape[0] != X.shape[0]:
            raise ValueError(f"y must have shape ({X.shape[0]},) or ({X.shape[0]}, n_outputs), got shape {y.shape}")
        object.__setattr__(self, "X", X)
        object.__setattr__(self, "y", y)
        if self.validation is not None:
            pair = _checked_pair(self.validation, "validation", X.shape[1], _targets(y))
            object.__setattr__(self, "validation", pair)

    def __reduce__(self) -> tuple[Any, ...]:
        # rebuilt through __init__, so the copy a worker unpickles is read-only too
        return (TrainingData, (self.X, self.y, self.validation))


@dataclass(frozen=True, eq=False)
class _SweepData:
    """Everything a worker needs: the recipe's data and the test rows (kept from the recipe)."""

    training: TrainingData
    test: tuple[np.ndarray, np.ndarray] | None

    def digest(self) -> str:
        """SHA-256 over the dtype, shape and SHA-256 of every array (:func:`tinyprop.archive.array_record`)."""
        named = [("X", self.training.X), ("y", self.training.y)]
        for label, pair in (("validation", self.training.validation), ("test", self.test)):
            if pair is not None:
                named += [(f"{label}/X", pair[0]), (f"{label}/y", pair[1])]
        return sha256_hex(canonical_json([array_record(name, array) for name, array in named]))


# ---------------------------------------------------------------- settings
def setting_key(setting: Mapping[str, Any]) -> str:
    """The canonical JSON of a setting: keys sorted, no spaces, ASCII; the setting's identity.

    Two settings are the same when their keys are equal (``1`` and ``1.0``
    differ; ``0.001`` and ``1e-3`` do not). ``ValueError`` for anything that
    JSON cannot hold exactly (tuples, numpy scalars, NaN, non-string keys).

    >>> import tinyprop as tp
    >>> tp.setting_key({"seed": 3, "hidden": [32], "lr": 1e-3})
    '{"hidden":[32],"lr":0.001,"seed":3}'
    """
    if not isinstance(setting, Mapping):
        raise TypeError(f"a setting must be a dict of JSON values, got {type(setting).__name__}")
    try:
        check_json(dict(setting), "the setting")
    except ArchiveError as exc:
        raise ValueError(str(exc)) from None
    return canonical_json(dict(setting))


def _file_stem(key: str) -> str:
    return sha256_hex(key)[:16]


# ---------------------------------------------------------------- records
@dataclass(frozen=True)
class SweepRecord:
    """One row of a sweep's table.

    ``setting`` and its canonical ``key``; ``status`` ``"ok"`` or ``"failed"``
    and ``error`` (``"<ExceptionType>: <message>"``, ``None`` when ok);
    ``validation_loss`` (the sweep's ``loss`` on the validation rows) and
    ``test_loss`` / ``test_rmse`` (``sqrt(mean((y_hat - y)**2))`` over all
    test rows and outputs, in target units), ``None`` when not given or
    failed; ``epochs_run`` and ``stop_reason`` from the recipe's
    :class:`~tinyprop.train.TrainingResult` (``None`` if it returned none);
    ``wall_time``: seconds spent in the recipe; ``fingerprint`` of the network
    (:func:`tinyprop.modelfile.fingerprint`); ``model_file``: its file under
    ``results_path`` (``None`` without one).
    """

    setting: dict[str, Any]
    key: str
    status: str
    error: str | None
    validation_loss: float | None
    test_loss: float | None
    test_rmse: float | None
    epochs_run: int | None
    stop_reason: str | None
    wall_time: float
    fingerprint: str | None
    model_file: str | None

    @property
    def ok(self) -> bool:
        """``status == "ok"``."""
        return self.status == STATUS_OK

    def to_json(self) -> dict[str, Any]:
        """The row as a dict of JSON values (one line of ``table.jsonl``)."""
        return {f.name: getattr(self, f.name) for f in fields(self)}

    @classmethod
    def from_json(cls, value: Any, where: str) -> "SweepRecord":
        """Rebuild a row from :meth:`to_json` output; ``ValueError`` naming ``where`` if it does not fit."""
        names = [f.name for f in fields(cls)]
        if not isinstance(value, dict) or set(value) != set(names):
            found = sorted(value) if isinstance(value, dict) else type(value).__name__
            raise ValueError(f"{where}: a sweep record needs exactly the fields {names}, found {found}")
        record = cls(**value)
        if record.key != setting_key(record.setting) or record.status not in (STATUS_OK, STATUS_FAILED):
            raise ValueError(f"{where}: the key does not match the setting, or the status is not 'ok'/'failed'")
        if record.ok and (record.fingerprint is None or record.model_file is None or record.error is not None):
            raise ValueError(f"{where}: an 'ok' record needs a fingerprint, a model file and no error")
        return record


@dataclass(frozen=True)
class SweepResult:
    """What :func:`sweep` returns.

    ``records``: one :class:`SweepRecord` per setting, in the order of the
    settings; ``networks``: the trained network of each row (``None`` for a
    failed one); ``trained``: the keys of the settings this call trained
    (the others came from ``results_path``), in the order of the settings.
    """

    records: tuple[SweepRecord, ...]
    networks: tuple[Network | None, ...] = field(repr=False)
    trained: tuple[str, ...]

    def best(self) -> tuple[SweepRecord, Network]:
        """The ok row with the lowest validation loss (the first of equals) and its network."""
        candidates = [
            (r.validation_loss, i) for i, r in enumerate(self.records) if r.ok and r.validation_loss is not None
        ]
        if not candidates:
            raise ValueError("no row has a validation loss: pass validation=(X_val, y_val), or every setting failed")
        index = min(candidates)[1]
        return self.records[index], self.networks[index]  # type: ignore[return-value]

    def summary(self) -> str:
        """The table as aligned plain text, one line per setting (the error in place of the numbers)."""
        columns = f"{'#':>3}  {'status':<6}  {'val. loss':>11}  {'test RMSE':>11}  {'epochs':>6}  {'seconds':>8}"
        lines = [f"{columns}  setting"]
        for index, r in enumerate(self.records):
            if r.ok:
                numbers = "  ".join((_cell(r.validation_loss, 11), _cell(r.test_rmse, 11), _cell(r.epochs_run, 6)))
                lines.append(f"{index:>3}  {r.status:<6}  {numbers}  {r.wall_time:>8.2f}  {r.key}")
            else:
                lines.append(f"{index:>3}  {r.status:<6}  {r.key}: {r.error}")
        return "\n".join(lines)


def _cell(value: float | int | None, width: int) -> str:
    if value is None:
        return "-".rjust(width)
    return f"{value:>{width}d}" if isinstance(value, int) else f"{value:>{width}.5g}"


# ---------------------------------------------------------------- one task (runs in a worker)
_Outcome = tuple[Network | None, SweepRecord]
"""What one task sends back: the network (``None`` if failed) and its row, still without fingerprint and model file."""


@dataclass(frozen=True)
class _DataRef:
    """Stands for the data a pool's initializer stored in the worker (:func:`_install`)."""

    token: str


_INSTALLED: dict[str, _SweepData] = {}


def _install(token: str, data: _SweepData) -> None:
    """Pool initializer: keep the sweep's data in this worker (process or thread) for all its tasks."""
    _INSTALLED[token] = data


def _train_one(recipe: Callable[..., Any], key: str, data: _SweepData | _DataRef, loss: Loss) -> _Outcome:
    """Run the recipe for one setting and evaluate the network; failures of the setting become an error text."""
    if isinstance(data, _DataRef):
        if data.token not in _INSTALLED:
            raise RuntimeError("this worker holds no sweep data: the pool's initializer did not run in it")
        data = _INSTALLED[data.token]
    net = error = epochs_run = stop_reason = validation_loss = test_loss = test_rmse = None
    started = time.perf_counter()
    try:
        net, result = _network_and_result(recipe(json.loads(key), data.training))
        wall_time = time.perf_counter() - started
        if result is not None:
            epochs_run, stop_reason = result.epochs_run, result.stop_reason
        validation_loss = _loss_on(net, data.training.validation, loss, "validation")
        test_loss = _loss_on(net, data.test, loss, "test")
        test_rmse = None if data.test is None else _rmse(net, data.test)
    except Exception as exc:  # the recipe is user code: anything it raises is this setting's failure
        wall_time = time.perf_counter() - started
        net, error = None, f"{type(exc).__name__}: {exc}"
        validation_loss = test_loss = test_rmse = None
        if isinstance(exc, TrainingDiverged):
            epochs_run, stop_reason = exc.result.epochs_run, exc.result.stop_reason
    record = SweepRecord(
        setting=json.loads(key), key=key, status=STATUS_FAILED if error else STATUS_OK, error=error,
        validation_loss=validation_loss, test_loss=test_loss, test_rmse=test_rmse, epochs_run=epochs_run,
        stop_reason=stop_reason, wall_time=wall_time, fingerprint=None, model_file=None,
    )
    return net, record


def _network_and_result(produced: Any) -> tuple[Network, TrainingResult | None]:
    if isinstance(produced, Network):
        return produced, None
    if (
        isinstance(produced, tuple)
        and len(produced) == 2
        and isinstance(produced[0], Network)
        and isinstance(produced[1], TrainingResult)
    ):
        return produced
    raise TypeError(
        f"the recipe must return a Network or (Network, TrainingResult), got {type(produced).__name__}"
    )


def _loss_on(net: Network, pair: tuple[np.ndarray, np.ndarray] | None, loss: Loss, label: str) -> float | None:
    if pair is None:
        return None
    X = as_samples(pair[0], f"{label} X", net.n_in, net.dtype)
    value = float(loss.value(net.predict(X), as_targets(pair[1], f"{label} y", X.shape[0], net.n_out, net.dtype)))
    if not math.isfinite(value):
        raise ArithmeticError(f"the {label} loss is {value}")
    return value


def _rmse(net: Network, pair: tuple[np.ndarray, np.ndarray]) -> float:
    X = as_samples(pair[0], "test X", net.n_in, net.dtype)
    y = as_targets(pair[1], "test y", X.shape[0], net.n_out, np.dtype(np.float64))
    residual = net.predict(X).astype(np.float64) - y
    return float(np.sqrt(np.mean(residual * residual)))


# ---------------------------------------------------------------- where the tasks run
def _outcomes(
    pending: list[tuple[int, str]], recipe: Callable[..., Any], data: _SweepData, loss: Loss, executor: Any
) -> Iterator[tuple[int, _Outcome]]:
    """``(index, outcome)`` for every pending setting, in the order they finish."""
    if executor is None:
        for index, key in pending:
            yield index, _train_one(recipe, key, data, loss)
        return
    if isinstance(executor, Executor):
        client = _dask_client(executor)
        shipped = data if client is None else client.scatter(data, broadcast=True, hash=False)
        yield from _run_on(executor, pending, recipe, shipped, loss)
        return
    token = secrets.token_hex(32)  # unique per call, so concurrent sweeps in one process never share an entry
    try:
        pool = executor(initializer=_install, initargs=(token, data))
    except TypeError as exc:
        raise TypeError(
            "executor must be None, a concurrent.futures.Executor, or a factory accepting initializer= and "
            f"initargs= (such as ProcessPoolExecutor); calling it failed: {exc}"
        ) from None
    if not isinstance(pool, Executor):
        raise TypeError(f"the executor factory must return a concurrent.futures.Executor, got {type(pool).__name__}")
    try:
        yield from _run_on(pool, pending, recipe, _DataRef(token), loss)
    finally:
        pool.shutdown(wait=True, cancel_futures=True)
        _INSTALLED.pop(token, None)  # a thread pool's workers installed it in this process


def _run_on(
    executor: Executor, pending: list[tuple[int, str]], recipe: Callable[..., Any], data: Any, loss: Loss
) -> Iterator[tuple[int, _Outcome]]:
    futures = {executor.submit(_train_one, recipe, key, data, loss): index for index, key in pending}
    try:
        for future in as_completed(futures):
            yield futures[future], future.result()
    finally:
        for future in futures:
            future.cancel()


def _dask_client(executor: Executor) -> Any:
    """The Dask client behind a ``client.get_executor()`` executor, else ``None`` (Dask is never imported here)."""
    module = sys.modules.get("distributed.cfexecutor")
    if module is not None and isinstance(executor, module.ClientExecutor):
        return getattr(executor, "_client", None)
    return None


# ---------------------------------------------------------------- the results folder
class _ResultsFolder:
    """``table.jsonl`` (rewritten atomically after every row) and ``models/*.npz`` under one folder."""

    def __init__(self, path: str | os.PathLike[str], header: dict[str, Any]) -> None:
        self.folder = Path(path)
        self.header = header
        self.table = self.folder / TABLE_FILE
        (self.folder / MODELS_FOLDER).mkdir(parents=True, exist_ok=True)
        self.records: dict[str, SweepRecord] = {}
        if self.table.exists():
            self._read()

    def _read(self) -> None:
        lines = self.table.read_text(encoding="utf-8").splitlines()
        try:
            stored = json.loads(lines[0]) if lines else None
        except ValueError as exc:
            raise ValueError(f"{self.table}, line 1: not JSON ({exc})") from None
        if not isinstance(stored, dict) or {k: stored.get(k) for k in ("format", "format_version")} != {
            "format": TABLE_FORMAT, "format_version": TABLE_VERSION
        }:
            raise ValueError(f"{self.table} is not a version-{TABLE_VERSION} sweep table (line 1 is {lines[:1]})")
        differing = [k for k in self.header if stored.get(k) != self.header[k]]
        if differing:
            detail = "; ".join(
                f"{k}: the folder has {stored.get(k)!r}, this call {self.header[k]!r}" for k in differing
            )
            raise ValueError(
                f"{self.folder} holds a sweep with another {', '.join(differing)} ({detail}); "
                "resume only the same recipe, loss and data, or use a new folder"
            )
        for number, line in enumerate(lines[1:], 2):
            where = f"{self.table}, line {number}"
            try:
                record = SweepRecord.from_json(json.loads(line), where)
            except (ValueError, TypeError) as exc:
                raise ValueError(f"{where}: {exc}") from None
            if record.key in self.records:
                raise ValueError(f"{where}: a second record for the setting {record.key}")
            self.records[record.key] = record

    def network(self, record: SweepRecord) -> Network:
        """Load the row's network and check that it is the one the row names."""
        model = load_model_file(self.folder / str(record.model_file))
        if model.fingerprint != record.fingerprint:
            raise ValueError(
                f"{self.folder / str(record.model_file)} has fingerprint {model.fingerprint}, but the table lists "
                f"{record.fingerprint} for the setting {record.key}"
            )
        return model.network

    def save_model(self, net: Network, key: str) -> str:
        name = f"{MODELS_FOLDER}/{_file_stem(key)}.npz"
        save(net, self.folder / name, metadata={"sweep_setting": json.loads(key)})
        return name

    def add(self, record: SweepRecord) -> None:
        self.records[record.key] = record
        lines = [json.dumps(self.header, sort_keys=True)]
        lines += [json.dumps(r.to_json(), sort_keys=True, allow_nan=False) for r in self.records.values()]
        write_bytes_atomically(self.table, ("\n".join(lines) + "\n").encode("utf-8"))


def _identity(value: Any) -> str:
    """How a results folder recognises a recipe or a loss.

    Its ``repr`` when that is stable (a dataclass's lists its fields, a
    loss's its settings), else ``module.qualname`` of the function or class
    (a ``repr`` holding a memory address, `` at 0x``, changes from run to run).
    """
    text = repr(value)
    if " at 0x" not in text:
        return text
    holder = value if hasattr(value, "__qualname__") else type(value)
    return f"{holder.__module__}.{holder.__qualname__}"


# ---------------------------------------------------------------- the sweep
def sweep(
    recipe: Callable[[dict[str, Any], TrainingData], Any],
    settings: Sequence[Mapping[str, Any]],
    X: Any,
    y: Any,
    *,
    validation: tuple[Any, Any] | None = None,
    test: tuple[Any, Any] | None = None,
    loss: Loss | None = None,
    executor: Any = None,
    results_path: str | os.PathLike[str] | None = None,
    retry_failed: bool = False,
    progress: bool = False,
) -> SweepResult:
    """Train one network per setting with ``recipe`` and tabulate the results (see the module docstring).

    Parameters
    ----------
    recipe:
        ``recipe(setting, data) -> Network | (Network, TrainingResult)``;
        ``data`` is a :class:`TrainingData`. Must be picklable for a process
        pool or a cluster (a module-level function or a dataclass instance).
    settings:
        Dicts of JSON values, one training each; no two with the same
        :func:`setting_key`. Each call gets a fresh copy.
    X, y:
        Training rows, ``(n, d)`` and ``(n,)`` or ``(n, m)``.
    validation, test:
        Optional ``(X, y)`` pairs. ``validation`` reaches the recipe (in
        ``data.validation``) and gives each row's ``validation_loss``;
        ``test`` never reaches the recipe and gives ``test_loss`` and
        ``test_rmse``.
    loss:
        The loss of ``validation_loss`` and ``test_loss``;
        :class:`~tinyprop.losses.MeanSquaredError` by default.
    executor:
        ``None`` (sequential, in this process), an executor factory such as
        ``ProcessPoolExecutor``, or an ``Executor`` instance (see the module
        docstring for how the data travels in each case).
    results_path:
        A folder (created if needed) where every finished row and its network
        are written as they complete; settings already in it are skipped and
        their networks loaded.
    retry_failed:
        With ``results_path``: train again the settings recorded as failed.
    progress:
        Print one line per finished setting on stderr.
    """
    if not callable(recipe):
        raise TypeError(f"recipe must be callable as recipe(setting, data), got {type(recipe).__name__}")
    if isinstance(settings, (str, bytes, Mapping)) or not isinstance(settings, Sequence):
        raise TypeError(f"settings must be a list of dicts, got {type(settings).__name__}")
    loss = MeanSquaredError() if loss is None else loss
    if not isinstance(loss, Loss):
        raise TypeError(f"loss must be a tinyprop Loss (e.g. MeanSquaredError()), got {type(loss).__name__}")
    if executor is not None and not isinstance(executor, Executor) and not callable(executor):
        hint = "; for Dask pass client.get_executor()" if hasattr(executor, "get_executor") else ""
        raise TypeError(
            f"executor must be None, a concurrent.futures.Executor or a factory like ProcessPoolExecutor, "
            f"got {type(executor).__name__}{hint}"
        )
    for name, flag in (("retry_failed", retry_failed), ("progress", progress)):
        if not isinstance(flag, bool):
            raise TypeError(f"{name} must be True or False, got {flag!r}")
    keys = _keys_of(settings)
    training = TrainingData(X, y, validation)
    test_pair = None if test is None else _checked_pair(test, "test", training.X.shape[1], _targets(training.y))
    data = _SweepData(training, test_pair)

    folder = None
    if results_path is not None:
        header = {"format": TABLE_FORMAT, "format_version": TABLE_VERSION, "recipe": _identity(recipe),
                  "loss": _identity(loss), "data_sha256": data.digest()}
        folder = _ResultsFolder(results_path, header)
    records: dict[int, SweepRecord] = {}
    networks: dict[int, Network | None] = {}
    pending = []
    for index, key in enumerate(keys):
        stored = None if folder is None else folder.records.get(key)
        if stored is not None and (stored.ok or not retry_failed):
            records[index] = stored
            networks[index] = folder.network(stored) if stored.ok else None  # type: ignore[union-attr]
        else:
            pending.append((index, key))

    results = _outcomes(pending, recipe, data, loss, executor)
    try:
        for done, (index, outcome) in enumerate(results, 1):
            records[index], networks[index] = _finish(outcome, folder)
            if progress:
                print(
                    f"sweep: {done}/{len(pending)} trained  "
                    f"{_progress_line(records[index])}",
                    file=sys.stderr, flush=True,
                )
    finally:
        results.close()
    order = range(len(keys))
    return SweepResult(
        records=tuple(records[i] for i in order),
        networks=tuple(networks[i] for i in order),
        trained=tuple(key for _, key in pending),
    )


def _keys_of(settings: Sequence[Mapping[str, Any]]) -> list[str]:
    if len(settings) == 0:
        raise ValueError("settings is empty; give at least one setting (a dict such as {'seed': 0})")
    keys = []
    for index, setting in enumerate(settings):
        try:
            keys.append(setting_key(setting))
        except (TypeError, ValueError) as exc:
            raise type(exc)(f"setting {index}: {exc}") from None
    seen: dict[str, int] = {}
    for index, key in enumerate(keys):
        if key in seen:
            raise ValueError(f"settings {seen[key]} and {index} are the same setting {key}")
        seen[key] = index
    return keys


def _finish(outcome: _Outcome, folder: _ResultsFolder | None) -> tuple[SweepRecord, Network | None]:
    """The task's row with its network's fingerprint; with a folder, the network is written, then the row."""
    net, record = outcome
    if net is not None:
        digest = fingerprint(net)
        model_file = None if folder is None else folder.save_model(net, record.key)
        record = replace(record, fingerprint=digest, model_file=model_file)
    if folder is not None:
        folder.add(record)
    return record, net


def _progress_line(record: SweepRecord) -> str:
    if not record.ok:
        return f"failed  {record.key}: {record.error}"
    loss = "" if record.validation_loss is None else f"  validation loss {record.validation_loss:.6g}"
    return f"ok  {record.key}{loss}  {record.wall_time:.2f} s"
