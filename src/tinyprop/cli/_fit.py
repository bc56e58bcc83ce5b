"""The fitting recipe shared by ``tinyprop train`` and ``tinyprop demo``.

For data ``X`` (``n`` rows of inputs) and ``Y`` (targets), with seed ``s``:

1. **Split.** ``order = numpy.random.default_rng(s).permutation(n)``;
   ``n_test = round(test_fraction * n)``, ``n_val = round(validation_fraction * n)``;
   test rows ``order[:n_test]``, validation rows ``order[n_test:n_test + n_val]``,
   training rows the rest (in that permuted order).
2. **Network.** ``build_mlp([n_in, *hidden, n_out], hidden=<activation>, seed=s, dtype=...)``
   with ``Standardize.from_data(X_train)`` in front and
   ``Unstandardize.from_data(Y_train)`` behind, so the network takes and
   returns values in the data's own units:
   ``Network([standardize, *mlp.layers, unstandardize], dtype=..., init=None)``.
3. **Fit** on the training rows, in the data's units:

   - ``mini-batch``: ``train(net, X_train, Y_train, loss=MeanSquaredError(),
     optimizer=<optimizer>(lr, schedule=...), epochs, batch_size,
     validation=(X_val, Y_val) or None, patience, seed=s)``, where the schedule is
     ``None`` (``constant``) or ``CosineSchedule(epochs * ceil(n_train / batch_size))``
     (``cosine``: the learning rate falls along half a cosine to 0 at the last epoch);
   - ``levenberg-marquardt`` / ``lbfgs``: ``solve(net, X_train, Y_train, method=...,
     max_evaluations=...)``.

4. **Evaluate** on every split: per target the root mean square error, mean
   absolute error, largest absolute error and ``R^2 = 1 - SS_res / SS_tot``.

This is what ``docs/cli.md`` documents and what ``tests/test_cli.py`` reproduces
with the library calls above.
"""

from __future__ import annotations

import math
import time
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

from .. import __version__
from ..activations import Activation, LeakyReLU, ReLU, Sigmoid, Softplus, Tanh
from ..build import build_mlp
from ..io import fingerprint
from ..layers import Affine, ColumnScaling, Standardize, Unstandardize
from ..losses import MeanSquaredError
from ..network import Network
from ..optim import SGD, Adam, Optimizer, RMSProp
from ..schedules import CosineSchedule
from ..solve import solve
from ..train import History, train
from ._common import SAFETY, USAGE, CommandError, EpochProgress, finite_or_none

ACTIVATIONS: dict[str, type[Activation]] = {
    "tanh": Tanh,
    "sigmoid": Sigmoid,
    "relu": ReLU,
    "leaky-relu": LeakyReLU,
    "softplus": Softplus,
}
OPTIMIZERS: dict[str, tuple[type[Optimizer], float]] = {  # class and default learning rate
    "adam": (Adam, 1e-3),
    "rmsprop": (RMSProp, 1e-3),
    "sgd": (SGD, 1e-2),
}
METHODS = ("mini-batch", "levenberg-marquardt", "lbfgs")
SCHEDULES = ("cosine", "constant")


@dataclass(frozen=True)
class FitSettings:
    """Everything that decides the fitted weights (module docstring); defaults of ``tinyprop train``."""

    hidden: tuple[int, ...] = (16, 16)
    activation: str = "tanh"
    method: str = "mini-batch"
    optimizer: str = "adam"
    learning_rate: float | None = None  # None: the optimizer's default in OPTIMIZERS
    schedule: str = "cosine"
    momentum: float = 0.0
    epochs: int = 200
    batch_size: int = 32
    patience: int | None = None
    seed: int = 0
    validation_fraction: float = 0.15
    test_fraction: float = 0.15
    dtype: str = "float64"
    max_evaluations: int = 1000

    @property
    def lr(self) -> float:
        return OPTIMIZERS[self.optimizer][1] if self.learning_rate is None else self.learning_rate

    def to_dict(self) -> dict[str, Any]:
        settings = asdict(self)
        settings["hidden"] = list(self.hidden)
        settings["learning_rate"] = self.lr
        settings["loss"] = "MeanSquaredError"
        return settings

    def describe_method(self) -> str:
        if self.method != "mini-batch":
            return f"{self.method}, at most {self.max_evaluations} evaluations"
        text = f"{self.optimizer}, learning rate {self.lr:g} ({self.schedule}), batch {self.batch_size}, {self.epochs} epochs"
        return text + (f", early stopping after {self.patience} epochs without progress" if self.patience else "")


@dataclass(frozen=True)
class Dataset:
    """Inputs ``X`` ``(n, n_in)`` and targets ``Y`` ``(n, n_out)`` with their column names and origin."""

    X: np.ndarray
    Y: np.ndarray
    input_names: tuple[str, ...]
    target_names: tuple[str, ...]
    source: dict[str, Any]  # for the report: where the data came from


@dataclass(frozen=True)
class Split:
    """Row indices of the three parts (module docstring, step 1)."""

    training: np.ndarray
    validation: np.ndarray
    test: np.ndarray

    def sizes(self) -> dict[str, int]:
        return {"training": int(self.training.size), "validation": int(self.validation.size), "test": int(self.test.size)}


@dataclass(frozen=True)
class FitOutcome:
    """The fit's facts for the report; ``history`` is ``None`` for the least-squares methods."""

    summary: dict[str, Any]
    history: History | None
    seconds: float


def split_rows(n: int, settings: FitSettings) -> Split:
    """Step 1 of the module docstring; refuses a split that leaves no training row."""
    order = np.random.default_rng(settings.seed).permutation(n)
    n_test = round(settings.test_fraction * n)
    n_val = round(settings.validation_fraction * n)
    if n - n_test - n_val < 1:
        raise CommandError(
            f"the data have {n} rows; after {n_test} test and {n_val} validation rows none is left for training "
            "(lower --test-fraction / --validation-fraction)", USAGE
        )
    return Split(order[n_test + n_val:], order[n_test:n_test + n_val], order[:n_test])


def build_network(data: Dataset, split: Split, settings: FitSettings) -> Network:
    """Step 2 of the module docstring."""
    X_train, Y_train = data.X[split.training], data.Y[split.training]
    sizes = [data.X.shape[1], *settings.hidden, data.Y.shape[1]]
    mlp = build_mlp(sizes, hidden=ACTIVATIONS[settings.activation](), seed=settings.seed, dtype=settings.dtype)
    layers = [Standardize.from_data(X_train), *mlp.layers, Unstandardize.from_data(Y_train)]
    return Network(layers, dtype=settings.dtype, init=None)


def architecture(net: Network) -> str:
    """``Standardize(3) -> Affine 3->16 -> Tanh -> Affine 16->1 -> Unstandardize(1)``."""
    parts = []
    for layer in net.layers:
        if isinstance(layer, Affine):
            parts.append(f"Affine {layer.n_in}->{layer.n_out}")
        elif isinstance(layer, ColumnScaling):
            parts.append(f"{type(layer).__name__}({layer.width})")
        else:
            parts.append(repr(layer).removesuffix("()"))
    return " -> ".join(parts)


def fit(net: Network, data: Dataset, split: Split, settings: FitSettings, progress: EpochProgress | None) -> FitOutcome:
    """Step 3 of the module docstring: changes ``net``'s weights in place."""
    X_train, Y_train = data.X[split.training], data.Y[split.training]
    started = time.perf_counter()
    if settings.method == "mini-batch":
        optimizer = _optimizer(settings, X_train.shape[0])
        validation = (data.X[split.validation], data.Y[split.validation]) if split.validation.size else None
        try:
            result = train(
                net, X_train, Y_train, loss=MeanSquaredError(), optimizer=optimizer, epochs=settings.epochs,
                batch_size=settings.batch_size, validation=validation, patience=settings.patience,
                seed=settings.seed, callback=progress,
            )
        finally:
            if progress is not None:
                progress.finish()
        summary = {
            "stop_reason": result.stop_reason,
            "message": result.message,
            "epochs_run": result.epochs_run,
            "updates": result.updates,
            "best_epoch": result.best_epoch,
            "best_validation_loss": finite_or_none(result.best_validation_loss),
        }
        return FitOutcome(summary, result.history, time.perf_counter() - started)
    solved = solve(net, X_train, Y_train, method=settings.method, max_evaluations=settings.max_evaluations,
                   progress=progress is not None)  # the solver's own progress line, on stderr like the epochs
    summary = {
        "success": solved.success,
        "message": solved.message,
        "rss": solved.rss,
        "gradient_norm": solved.gradient_norm,
        "iterations": solved.iterations,
        "function_evaluations": solved.function_evaluations,
        "jacobian_evaluations": solved.jacobian_evaluations,
    }
    return FitOutcome(summary, None, time.perf_counter() - started)


def _optimizer(settings: FitSettings, n_train: int) -> Optimizer:
    schedule = None
    if settings.schedule == "cosine":
        schedule = CosineSchedule(settings.epochs * math.ceil(n_train / settings.batch_size))
    if settings.optimizer == "sgd":
        return SGD(settings.lr, momentum=settings.momentum, schedule=schedule)
    optimizer_class, _ = OPTIMIZERS[settings.optimizer]
    return optimizer_class(settings.lr, schedule=schedule)


def evaluate(net: Network, data: Dataset, rows: np.ndarray) -> dict[str, Any] | None:
    """Step 4 of the module docstring on ``rows`` (``None`` when there are none)."""
    if rows.size == 0:
        return None
    Y = data.Y[rows]
    prediction = net.predict(data.X[rows]).astype(np.float64)
    error = prediction - Y
    spread = ((Y - Y.mean(axis=0)) ** 2).sum(axis=0)
    per_target = {}
    for k, name in enumerate(data.target_names):
        ss_res = float((error[:, k] ** 2).sum())
        per_target[name] = {
            "rmse": float(np.sqrt(ss_res / rows.size)),
            "mae": float(np.abs(error[:, k]).mean()),
            "max_abs_error": float(np.abs(error[:, k]).max()),
            "r_squared": 1.0 - ss_res / float(spread[k]) if spread[k] > 0 else None,
        }
    return {"rows": int(rows.size), "loss": MeanSquaredError().value(prediction, Y), "targets": per_target}


def evaluate_all(net: Network, data: Dataset, split: Split) -> dict[str, Any]:
    """:func:`evaluate` on the training, validation and test rows."""
    return {part: evaluate(net, data, getattr(split, part)) for part in ("training", "validation", "test")}


def least_squares_uncertainty(net: Network, data: Dataset, split: Split) -> dict[str, Any]:
    """Parameter standard errors, prediction intervals and input sensitivities on the training rows."""
    from ..uncertainty import uncertainty_report

    try:
        return uncertainty_report(
            net, data.X[split.training], data.Y[split.training],
            input_names=data.input_names, output_names=data.target_names,
        )
    except ValueError as exc:  # e.g. no degrees of freedom left
        return {"unavailable": str(exc)}


def model_metadata(data: Dataset, settings: FitSettings, description: str) -> dict[str, Any]:
    """What the model file keeps: names of inputs and outputs (used by ``export``), a description, the recipe."""
    return {
        "description": description,
        "inputs": [{"name": name} for name in data.input_names],
        "outputs": [{"name": name} for name in data.target_names],
        "training": {"settings": settings.to_dict(), "data": data.source},
    }


def report(
    command: str,
    net: Network,
    data: Dataset,
    split: Split,
    settings: FitSettings,
    outcome: FitOutcome,
    metrics: dict[str, Any],
    timings: dict[str, float],
    extra: dict[str, Any],
) -> dict[str, Any]:
    """The JSON training report: settings, data, network, fit, history, metrics, timings, plus ``extra``."""
    history = outcome.history
    document: dict[str, Any] = {
        "report": "tinyprop training report",
        "tinyprop_version": __version__,
        "command": command,
        "created_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "data": {**data.source, "rows": int(data.X.shape[0]), "inputs": list(data.input_names),
                 "targets": list(data.target_names), "split": split.sizes()},
        "settings": settings.to_dict(),
        "network": {"fingerprint": fingerprint(net), "n_params": net.n_params, "dtype": net.dtype.name,
                    "architecture": architecture(net)},
        "fit": {"method": settings.method, **outcome.summary},
        "history": None if history is None else {
            "training_loss": [finite_or_none(v) for v in history.training],
            "validation_loss": None if history.validation is None else [finite_or_none(v) for v in history.validation],
        },
        "metrics": metrics,
        "timings_s": {**timings, "fit": outcome.seconds},
        **extra,
        "safety": SAFETY,
    }
    return document
