"""Fitting recipes: the default recipe for small tabular regression and the command line's recipe.

**The default recipe** (:func:`fit_tabular_regression`, and :class:`TabularRegression`,
the same recipe with every setting open to a sweep) builds a scaled one-hidden-layer
tanh network and trains it with Adam and early stopping; its settings and their
measured results are in ``docs/training.md``.

**The default classification recipe** (:func:`fit_tabular_classification`, at the
end of this module) builds a scaled tanh network giving one logit per class (one sigmoid
output for two classes) and chooses its L2 penalty by the evidence framework; ``docs/classification.md``
gives its settings and measured results.

**The command line's recipe** (:class:`FitSettings`; the steps :func:`split_rows`,
:func:`build_network`, :func:`fit`, :func:`evaluate_all`) is what ``tinyprop train``
and ``tinyprop demo`` run. For data ``X`` (``n`` rows of inputs) and ``y`` (targets,
``(n, n_out)``), with seed ``s``:

1. **Split.** ``order = numpy.random.default_rng(s).permutation(n)``;
   ``n_test = round(test_fraction * n)``, ``n_val = round(validation_fraction * n)``;
   test rows ``order[:n_test]``, validation rows ``order[n_test:n_test + n_val]``,
   training rows the rest (in that permuted order).
2. **Network.** ``build_mlp([n_in, *hidden, n_out], activation=<activation>, seed=s, dtype=...)``
   with ``Standardize.from_data(X_train)`` in front and
   ``Unstandardize.from_data(y_train)`` behind, so the network takes and
   returns values in the data's own units:
   ``Network([standardize, *mlp.layers, unstandardize], dtype=..., init=None)``.
3. **Fit** on the training rows, in the data's units:

   - ``mini-batch``: ``train(net, X_train, y_train, loss=MeanSquaredError(),
     optimizer=<optimizer>(lr, schedule=..., clip_norm=...), epochs, batch_size,
     validation=(X_val, y_val) or None, patience, seed=s)``, where the schedule is
     ``None`` (``constant``) or ``CosineSchedule(epochs * ceil(n_train / batch_size))``
     (``cosine``: the learning rate falls along half a cosine to 0 at the last epoch);
   - ``levenberg-marquardt`` / ``lbfgs``: ``solve(net, X_train, y_train, method=...,
     max_evaluations=...)``.

4. **Evaluate** on every split: per target the root mean square error, mean
   absolute error, largest absolute error and ``R^2 = 1 - SS_res / SS_tot``.

This is what ``docs/cli.md`` documents and what ``tests/test_cli.py`` reproduces
with the library calls above. Around the steps: :func:`check_data` refuses data
that cannot be fitted and names weak data, :data:`APPLIES_ONLY_TO` says which
settings apply to which method (the report records only those), and
:func:`solver_stop` says in our words why a least-squares fit ended.
"""

from __future__ import annotations

import json
import math
import time
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, field, fields, replace
from typing import Any

import numpy as np

from ._validate import as_float_array, positive_int, real_in_range, seed_value
from ._words import count
from .activations import BUILT_IN_ACTIVATIONS, Activation, Identity, Tanh, built_in_name
from .classify import (
    DECISIONS,
    Classifier,
    class_probabilities,
    encode_labels,
    logit_curvature,
    one_hot,
    stratified_folds,
)
from .envelope import Envelope
from .layers import Affine, Standardize, Unstandardize
from .losses import CrossEntropyOnSigmoid, CrossEntropyOnSoftmax, MeanSquaredError
from .mlp import build_mlp
from .network import Layer, Network
from .optim import SGD, Adam, Optimizer, RMSProp
from .schedules import CosineSchedule
from .solve import SolveResult, solve
from .stacked import train_stacked
from .sweep import TrainingData
from .train import STOP_DIVERGED, History, TrainingDiverged, TrainingResult, train
from .uncertainty import uncertainty_report

__all__ = [
    "fit_tabular_regression",
    "choose_method",
    "RecipeResult",
    "TabularRegression",
    "FitSettings",
    "Dataset",
    "Split",
    "FitOutcome",
    "split_rows",
    "check_data",
    "build_network",
    "fit",
    "evaluate",
    "evaluate_all",
    "least_squares_uncertainty",
    "fit_tabular_classification",
    "ClassificationFit",
]


# ---------------------------------------------------------------- the default recipe
# The default recipe's settings (chosen and measured in docs/training.md). The mini-batch
# ones are also the defaults of TabularRegression, which trains through _fit_tabular too.
RECIPE_HIDDEN = (50,)  # adam-early-stopping branch
RECIPE_EVIDENCE_HIDDEN = (20,)  # evidence-lm branch
RECIPE_LR = 3e-3
RECIPE_BATCH_SIZE = 64
RECIPE_EPOCHS = 2000
RECIPE_PATIENCE = 60
RECIPE_METHODS = ("auto", "evidence-lm", "adam-early-stopping")
RECIPE_EVALUATIONS = 600  # evidence-lm: forward passes per restart (each taken step adds one more)
# evidence-lm while one iteration stays affordable: the normal equations n_out p^2 float64 numbers,
# the work n n_out p^2 multiply-adds per iteration
SECOND_ORDER_BYTES = 256 * 2**20
SECOND_ORDER_WORK = 2e10
RECIPE_RESTARTS = 1  # measured on the UCI splits: 3 restarts kept by log evidence did not pay (docs/training.md)


@dataclass(frozen=True, kw_only=True, eq=False)
class RecipeResult:
    """What :func:`fit_tabular_regression` returns besides the network.

    ``method``: the branch that ran, ``"evidence-lm"`` or ``"adam-early-stopping"``;
    ``reason``: why (the sizes against the limits, or "requested").
    ``seeds``: the initialisation seed of every restart; ``log_evidence``: the
    log evidence of every restart (evidence-lm; empty otherwise) and
    ``chosen`` the index of the restart kept (the largest log evidence).
    ``solved``: the kept restart's :class:`~tinyprop.solve.SolveResult`
    (evidence-lm; its ``noise_sd``, ``effective_parameters`` and ``penalty``,
    and ``parameter_uncertainty(net, result=solved)`` for intervals);
    ``training``: the :class:`~tinyprop.train.TrainingResult` (adam-early-stopping).
    ``envelope``: the :class:`~tinyprop.envelope.Envelope` of the training
    inputs (raw units); :meth:`metadata` puts it into a model file's metadata.
    """

    method: str
    reason: str
    seeds: tuple[int, ...]
    log_evidence: tuple[float, ...]
    chosen: int
    solved: SolveResult | None = field(default=None, repr=False)
    training: TrainingResult | None = field(default=None, repr=False)
    envelope: Envelope | None = field(default=None, repr=False)

    def metadata(self) -> dict[str, Any]:
        """What a model file of the fitted network should keep: ``{"envelope": ...}`` of the training inputs."""
        return {} if self.envelope is None else self.envelope.to_metadata()

    def summary(self) -> dict[str, Any]:
        """JSON-able facts for reports and model metadata."""
        facts: dict[str, Any] = {"recipe_method": self.method, "reason": self.reason, "seeds": list(self.seeds),
                                 "chosen_restart": self.chosen}
        if self.solved is not None:
            solved = self.solved
            facts.update(
                log_evidence=list(self.log_evidence), message=solved.message, success=solved.success,
                iterations=solved.iterations, function_evaluations=solved.function_evaluations,
                noise_sd=[float(v) for v in solved.noise_sd], penalty=solved.penalty,
                effective_parameters=solved.effective_parameters, n_params=int(solved.theta.size),
            )
        if self.training is not None:
            training = self.training
            facts.update(message=training.message, stop_reason=training.stop_reason, epochs_run=training.epochs_run,
                         best_epoch=training.best_epoch)
        return facts


def choose_method(n_rows: int, n_out: int, n_params: int, method: str = "auto") -> tuple[str, str]:
    """The recipe's branch and the reason, for ``n_rows`` rows, ``n_out`` targets and a network of ``n_params``.

    ``"auto"``: evidence-lm while the normal equations (``n_out p^2`` float64
    numbers) take at most 256 MB and one iteration at most ``2e10``
    multiply-adds (``n n_out p^2``); adam-early-stopping beyond.
    """
    if method not in RECIPE_METHODS:
        raise ValueError(f"method must be one of {RECIPE_METHODS}, got {method!r}")
    if method != "auto":
        return method, "requested"
    size, work = 8 * n_out * n_params**2, n_rows * n_out * n_params**2
    within = size <= SECOND_ORDER_BYTES and work <= SECOND_ORDER_WORK
    sizes = (f"{n_params} parameters, {n_rows} rows x {n_out} targets: normal equations {size / 2**20:.3g} MB, "
             f"{work:.3g} multiply-adds per iteration (limits {SECOND_ORDER_BYTES / 2**20:.0f} MB, "
             f"{SECOND_ORDER_WORK:.0e})")
    if within:
        return "evidence-lm", sizes + ": evidence-regularised Levenberg-Marquardt is affordable"
    return "adam-early-stopping", sizes + ": beyond the limits, mini-batch Adam with early stopping"


def fit_tabular_regression(
    X: Any,
    y: Any,
    *,
    hidden: int | Sequence[int] | None = None,
    seed: int = 0,
    method: str = "auto",
    restarts: int | None = None,
    epochs: int = RECIPE_EPOCHS,
    progress: bool = False,
) -> tuple[Network, RecipeResult]:
    """tinyprop's default recipe for tabular regression; returns ``(net, result)``.

    The recipe (documented with its measured results in ``docs/training.md``):

    - network ``Standardize -> [Affine -> Tanh] per width in hidden -> Affine ->
      Unstandardize``, scalings fitted on all rows given (the training rows),
      Glorot initialisation. ``hidden``: one width or a list of widths; default
      one layer of 20 units (evidence-lm) or 50 (adam-early-stopping).
    - ``method="auto"`` picks the branch by :func:`choose_method` for the
      evidence-lm network; ``"evidence-lm"`` or ``"adam-early-stopping"`` force one.
    - **evidence-lm**: ``solve(net, X, y, regularization="evidence",
      max_evaluations=600)`` on all rows (no hold-out: the evidence framework
      sets the penalty and one noise level per target from the training rows,
      see :mod:`tinyprop.evidence`), from ``restarts`` initialisations (default
      1: on the UCI splits three restarts chosen by their log evidence did not
      lower the test error); the restart with the largest log evidence is kept.
    - **adam-early-stopping**: :class:`TabularRegression` with ``hidden``,
      ``seed`` and ``epochs``: 10 % of the rows (at least one), drawn with
      ``seed``, held out for early stopping; :class:`~tinyprop.losses.MeanSquaredError`
      in the targets' units, ``Adam(lr=3e-3)``, mini-batches of 64, at most
      ``epochs`` epochs, patience 60, best weights restored.

    ``X`` is ``(n, d)``, ``y`` ``(n,)`` or ``(n, m)``; ``n >= 2``. Deterministic
    for a given ``seed`` (``numpy.random.SeedSequence`` streams for the
    hold-out rows, the initial weights of each restart and the shuffling).
    """
    seed = seed_value(seed, required=True)
    if method not in RECIPE_METHODS:
        raise ValueError(f"method must be one of {RECIPE_METHODS}, got {method!r}")
    X64, targets = _tabular_data(X, y)
    widths = None if hidden is None else _widths(hidden)
    evidence_widths = widths or RECIPE_EVIDENCE_HIDDEN
    sizes = [X64.shape[1], *evidence_widths, targets.shape[1]]
    n_params = sum((a + 1) * b for a, b in zip(sizes[:-1], sizes[1:]))
    branch, reason = choose_method(X64.shape[0], targets.shape[1], n_params, method)
    if branch == "adam-early-stopping":
        net, training = TabularRegression(hidden=widths or RECIPE_HIDDEN, seed=seed, epochs=epochs).fit(
            X64, targets, progress=progress
        )
        _, init_seed, _ = _streams(seed)
        return net, RecipeResult(method=branch, reason=reason, seeds=(init_seed,), log_evidence=(), chosen=0,
                                 training=training, envelope=Envelope.of_rows(X64))
    restarts = positive_int(RECIPE_RESTARTS if restarts is None else restarts, "restarts")
    seeds = tuple(int(s) for s in np.random.SeedSequence(seed).generate_state(restarts))
    best: tuple[Network, SolveResult] | None = None
    evidences = []
    for init_seed in seeds:
        net = _scaled_tanh_network(X64, targets, evidence_widths, init_seed)
        solved = solve(net, X64, targets, regularization="evidence", max_evaluations=RECIPE_EVALUATIONS,
                       progress=progress)
        evidences.append(float(solved.log_evidence))
        if best is None or solved.log_evidence > best[1].log_evidence:
            best = (net, solved)
    assert best is not None
    return best[0], RecipeResult(
        method=branch, reason=reason, seeds=seeds, log_evidence=tuple(evidences),
        chosen=evidences.index(float(best[1].log_evidence)), solved=best[1], envelope=Envelope.of_rows(X64),
    )


def _widths(hidden: int | Sequence[int]) -> tuple[int, ...]:
    if isinstance(hidden, (int, np.integer)) and not isinstance(hidden, bool):
        return (positive_int(hidden, "hidden"),)
    if not isinstance(hidden, (list, tuple)) or len(hidden) == 0:
        raise TypeError(f"hidden must be a width or a non-empty list of widths, e.g. 20 or [16, 16], got {hidden!r}")
    return tuple(positive_int(width, "each width in hidden") for width in hidden)


def _tabular_data(X: Any, y: Any) -> tuple[np.ndarray, np.ndarray]:
    """``X`` ``(n, d)`` and the targets ``(n, m)`` as float64, checked; ``n >= 2``."""
    X = as_float_array(X, "X", np.dtype(np.float64))
    y = as_float_array(y, "y", np.dtype(np.float64))
    if X.ndim != 2:
        raise ValueError(f"X must have shape (n_samples, n_features), got shape {X.shape}")
    targets = y.reshape(-1, 1) if y.ndim == 1 else y
    if targets.ndim != 2 or targets.shape[0] != X.shape[0]:
        raise ValueError(f"y must have shape ({X.shape[0]},) or ({X.shape[0]}, n_outputs), got shape {y.shape}")
    if X.shape[0] < 2:
        raise ValueError(f"need at least 2 rows, got {X.shape[0]}")
    return X, targets


def _streams(seed: int) -> tuple[int, int, int]:
    """Hold-out rows, initial weights, shuffling: three independent streams from ``seed``."""
    hold_seed, init_seed, shuffle_seed = (int(s) for s in np.random.SeedSequence(seed).generate_state(3))
    return hold_seed, init_seed, shuffle_seed


def _scaled_tanh_network(X: np.ndarray, targets: np.ndarray, hidden: tuple[int, ...], init_seed: int) -> Network:
    """``Standardize -> [Affine -> Tanh] per entry of hidden -> Affine -> Unstandardize``, Glorot from ``init_seed``."""
    widths = [X.shape[1], *hidden, targets.shape[1]]
    layers: list[Layer] = [Standardize.from_data(X)]
    for n_in, n_out in zip(widths[:-2], widths[1:-1]):
        layers += [Affine(n_in, n_out), Tanh()]
    layers += [Affine(widths[-2], widths[-1]), Unstandardize.from_data(targets)]
    return Network(layers, seed=init_seed)


@dataclass(frozen=True)
class TabularRegression:
    """The adam-early-stopping branch of :func:`fit_tabular_regression`, every setting open to a sweep.

    ``recipe(setting, data)`` trains ``replace(recipe, **setting).fit(data.X, data.y)``:
    every setting key must be one of the fields below, whose values are the
    defaults. The network is ``Standardize -> [Affine -> Tanh] per entry of
    hidden -> Affine -> Unstandardize`` with the scalings fitted on the
    training rows and Glorot initialisation; 10 % of the training rows (at
    least one) are held out for early stopping with ``patience``, and
    :func:`~tinyprop.train.train` runs :class:`~tinyprop.losses.MeanSquaredError`
    with ``Adam(lr, decoupled_decay=decoupled_decay)``, ``l2`` (the L2
    penalty of ``train``), ``batch_size`` and at most ``epochs`` epochs.
    ``seed`` gives the held-out rows, the initial weights and the shuffling
    three independent streams (``numpy.random.SeedSequence``). The
    validation rows of the sweep are not used for early stopping, so they
    stay an independent yardstick for choosing a setting.

    Both train through one implementation, so with the defaults it reproduces
    ``fit_tabular_regression(X, y, hidden=..., seed=..., epochs=...,
    method="adam-early-stopping")`` bit for bit (checked in ``tests/test_sweep.py``).
    """

    hidden: tuple[int, ...] = RECIPE_HIDDEN
    lr: float = RECIPE_LR
    decoupled_decay: float = 0.0
    l2: float = 0.0
    batch_size: int = RECIPE_BATCH_SIZE
    epochs: int = RECIPE_EPOCHS
    patience: int = RECIPE_PATIENCE
    seed: int = 0

    def __post_init__(self) -> None:
        hidden = self.hidden
        if not isinstance(hidden, (list, tuple)) or len(hidden) == 0:
            raise TypeError(f"hidden must be a non-empty list of layer widths, e.g. [32] or [16, 16], got {hidden!r}")
        object.__setattr__(self, "hidden", tuple(positive_int(width, "each width in hidden") for width in hidden))
        object.__setattr__(self, "lr", real_in_range(self.lr, "lr", low=0.0, low_open=True))
        object.__setattr__(self, "decoupled_decay", real_in_range(self.decoupled_decay, "decoupled_decay", low=0.0))
        object.__setattr__(self, "l2", real_in_range(self.l2, "l2", low=0.0))
        for name in ("batch_size", "epochs", "patience"):
            object.__setattr__(self, name, positive_int(getattr(self, name), name))
        seed_value(self.seed, required=True)

    def __call__(self, setting: Mapping[str, Any], data: TrainingData) -> tuple[Network, TrainingResult]:
        """Train the network of ``setting`` on ``data.X``, ``data.y``; return ``(network, result)``."""
        return self._with(setting).fit(data.X, data.y)

    def fit(self, X: Any, y: Any, *, progress: bool = False) -> tuple[Network, TrainingResult]:
        """Build and train one network on ``X`` ``(n, d)``, ``y`` ``(n,)`` or ``(n, m)``, ``n >= 2``."""
        return _fit_tabular(
            X, y, hidden=self.hidden, lr=self.lr, decoupled_decay=self.decoupled_decay, l2=self.l2,
            batch_size=self.batch_size, epochs=self.epochs, patience=self.patience, seed=int(self.seed),
            progress=progress,
        )

    def _with(self, setting: Mapping[str, Any]) -> "TabularRegression":
        if not isinstance(setting, Mapping):
            raise TypeError(f"setting must be a dict, got {type(setting).__name__}")
        allowed = [f.name for f in fields(self)]
        unknown = sorted(str(key) for key in setting if key not in allowed)
        if unknown:
            raise ValueError(f"unknown setting key(s) {unknown}; TabularRegression takes {allowed}")
        return replace(self, **setting)

    def stack_key(self, setting: Mapping[str, Any]) -> str:
        """Equal for settings that differ at most in ``seed``, ``lr`` and ``decoupled_decay``.

        :func:`~tinyprop.sweep.sweep` trains settings with equal keys together
        through :meth:`fit_stack`.
        """
        recipe = asdict(self._with(setting))
        return json.dumps({k: v for k, v in recipe.items() if k not in _STACKED_FIELDS}, sort_keys=True)

    def fit_stack(
        self, settings: list[Mapping[str, Any]], data: TrainingData
    ) -> list[tuple[Network, TrainingResult] | Exception]:
        """What ``self(setting, data)`` gives for each setting, from one :func:`~tinyprop.train_stacked` run.

        The settings must share :meth:`stack_key`. Each network equals, bit for
        bit, the one ``self(setting, data)`` trains alone; a diverged one comes
        back as the :class:`~tinyprop.train.TrainingDiverged` that call raises.
        """
        recipes = [self._with(setting) for setting in settings]
        if len({self.stack_key(setting) for setting in settings}) != 1:
            raise ValueError(f"fit_stack needs settings that differ only in {list(_STACKED_FIELDS)}")
        first = recipes[0]
        plans = [_tabular_plan(data.X, data.y, hidden=first.hidden, seed=int(r.seed)) for r in recipes]
        results = train_stacked(
            [plan.net for plan in plans], np.stack([plan.X for plan in plans]), np.stack([plan.y for plan in plans]),
            loss=MeanSquaredError(), optimizers=[Adam(lr=r.lr, decoupled_decay=r.decoupled_decay) for r in recipes],
            epochs=first.epochs, batch_size=first.batch_size, seeds=[plan.shuffle_seed for plan in plans],
            validation=(np.stack([plan.X_held for plan in plans]), np.stack([plan.y_held for plan in plans])),
            patience=first.patience, l2=first.l2,
        )
        return [
            TrainingDiverged(result.message, result) if result.stop_reason == STOP_DIVERGED else (plan.net, result)
            for plan, result in zip(plans, results)
        ]


_STACKED_FIELDS = ("seed", "lr", "decoupled_decay")  # what fit_stack lets differ within one stack


@dataclass(frozen=True)
class _TabularPlan:
    """One setting of the tabular recipe before training: the network, its rows and its shuffling seed."""

    net: Network
    X: np.ndarray
    y: np.ndarray
    X_held: np.ndarray
    y_held: np.ndarray
    shuffle_seed: int


def _tabular_plan(X: Any, y: Any, *, hidden: tuple[int, ...], seed: int) -> _TabularPlan:
    """The network, the training rows and the held-out rows of the tabular recipe for ``seed``."""
    X, targets = _tabular_data(X, y)
    hold_seed, init_seed, shuffle_seed = _streams(seed)
    order = np.random.default_rng(hold_seed).permutation(X.shape[0])
    n_hold = max(1, X.shape[0] // 10)
    held, kept = order[:n_hold], order[n_hold:]
    net = _scaled_tanh_network(X, targets, hidden, init_seed)
    return _TabularPlan(net, X[kept], targets[kept], X[held], targets[held], shuffle_seed)


def _fit_tabular(
    X: Any,
    y: Any,
    *,
    hidden: tuple[int, ...],
    lr: float,
    decoupled_decay: float,
    l2: float,
    batch_size: int,
    epochs: int,
    patience: int,
    seed: int,
    progress: bool,
) -> tuple[Network, TrainingResult]:
    """The tabular-regression recipe with every setting explicit (the callers check them).

    Network ``Standardize -> [Affine -> Tanh] per entry of hidden -> Affine ->
    Unstandardize``, scalings fitted on all rows given, Glorot initialisation;
    ``max(1, n // 10)`` rows held out for early stopping; :func:`train` with
    :class:`~tinyprop.losses.MeanSquaredError` and ``Adam(lr, decoupled_decay=...)``.
    ``seed`` feeds three independent streams (``numpy.random.SeedSequence``):
    hold-out rows, initial weights, shuffling.
    """
    plan = _tabular_plan(X, y, hidden=hidden, seed=seed)
    result = train(
        plan.net, plan.X, plan.y, loss=MeanSquaredError(), optimizer=Adam(lr=lr, decoupled_decay=decoupled_decay),
        epochs=epochs, batch_size=batch_size, validation=(plan.X_held, plan.y_held), patience=patience,
        seed=plan.shuffle_seed, progress=progress, l2=l2,
    )
    return plan.net, result


# ---------------------------------------------------------------- the command line's recipe
# the hidden-layer activations on offer: every built-in but Identity (a linear hidden layer adds nothing)
ACTIVATIONS: dict[str, type[Activation]] = {
    built_in_name(cls).replace("_", "-"): cls for cls in BUILT_IN_ACTIVATIONS if cls is not Identity
}
OPTIMIZERS: dict[str, tuple[type[Optimizer], float]] = {  # class and default learning rate
    "adam": (Adam, 1e-3),
    "rmsprop": (RMSProp, 1e-3),
    "sgd": (SGD, 1e-2),
}
METHODS = (*RECIPE_METHODS, "mini-batch", "levenberg-marquardt", "lbfgs")
COMMAND_LINE_HIDDEN = (16, 16)  # the widths of the mini-batch / least-squares methods when none are given
LEAST_SQUARES_METHODS = ("levenberg-marquardt", "lbfgs")
SCHEDULES = ("cosine", "constant")

# Which settings apply to which choices: (setting, the setting it depends on, the values of that setting it
# applies to). A FitSettings field not named here applies always. The report and the model's metadata record
# only the settings that apply (FitSettings.to_dict); the command line refuses an option that does not apply.
APPLIES_ONLY_TO: tuple[tuple[str, str, tuple[str, ...]], ...] = (
    *((name, "method", ("mini-batch",)) for name in (
        "optimizer", "lr", "schedule", "momentum", "clip_norm", "epochs", "batch_size", "patience")),
    ("max_evaluations", "method", LEAST_SQUARES_METHODS),
    ("restarts", "method", ("auto", "evidence-lm")),
    ("momentum", "optimizer", ("sgd",)),
)


@dataclass(frozen=True)
class FitSettings:
    """Everything that decides the fitted weights (the recipe above); defaults of ``tinyprop train``."""

    hidden: tuple[int, ...] | None = None  # None: the recipe's choice, or COMMAND_LINE_HIDDEN
    activation: str = "tanh"
    method: str = "auto"
    optimizer: str = "adam"
    lr: float | None = None  # the learning rate; None: the optimizer's default in OPTIMIZERS
    schedule: str = "cosine"
    momentum: float = 0.0
    clip_norm: float | None = None  # None: no gradient-norm clipping
    epochs: int = 200
    batch_size: int = 32
    patience: int | None = None
    seed: int = 0
    validation_fraction: float = 0.15
    test_fraction: float = 0.15
    dtype: str = "float64"
    max_evaluations: int = 1000
    restarts: int | None = None  # None: the recipe's default

    def optimizer_lr(self) -> float:
        """``lr``, or the optimizer's default learning rate when it is ``None``."""
        return OPTIMIZERS[self.optimizer][1] if self.lr is None else self.lr

    def applies(self, name: str) -> bool:
        """Whether setting ``name`` takes part in the fit with these settings (the table ``APPLIES_ONLY_TO``)."""
        return all(getattr(self, depends_on) in values
                   for setting, depends_on, values in APPLIES_ONLY_TO if setting == name)

    def to_dict(self) -> dict[str, Any]:
        """The settings that apply to the chosen method (with the learning rate actually used), and the loss."""
        settings = {name: value for name, value in asdict(self).items() if self.applies(name)}
        settings["hidden"] = None if self.hidden is None else list(self.hidden)
        if "lr" in settings:
            settings["lr"] = self.optimizer_lr()
        settings["loss"] = "MeanSquaredError"
        return settings

    def describe_method(self) -> str:
        if self.method in RECIPE_METHODS:
            return ("the default recipe (evidence-regularised Levenberg-Marquardt while affordable, else Adam with "
                    f"early stopping), method {self.method}")
        if self.method != "mini-batch":
            return f"{self.method}, at most {self.max_evaluations} evaluations"
        text = (f"{self.optimizer}, learning rate {self.optimizer_lr():g} ({self.schedule}), batch {self.batch_size}, "
                f"{self.epochs} epochs")
        text += f", gradient norm clipped at {self.clip_norm:g}" if self.clip_norm is not None else ""
        return text + (f", early stopping after {self.patience} epochs without progress" if self.patience else "")


@dataclass(frozen=True)
class Dataset:
    """Inputs ``X`` ``(n, n_in)`` and targets ``y`` ``(n, n_out)`` with their column names, origin and units.

    ``units`` maps a column name to its unit (free text such as ``"m"`` or
    ``"m3/h"``); a column without a unit is left out.
    """

    X: np.ndarray
    y: np.ndarray
    input_names: tuple[str, ...]
    target_names: tuple[str, ...]
    source: dict[str, Any]  # for the report: where the data came from
    units: Mapping[str, str] = field(default_factory=dict)

    def label(self, name: str) -> str:
        """``"head [m]"`` for a column with a unit, else the bare name."""
        return f"{name} [{self.units[name]}]" if self.units.get(name) else name

    def ports(self) -> dict[str, list[dict[str, str]]]:
        """Names and units of inputs and outputs, in the form the model file's metadata and the exporters take."""
        def entries(names: tuple[str, ...]) -> list[dict[str, str]]:
            return [{"name": name, **({"unit": self.units[name]} if self.units.get(name) else {})} for name in names]

        return {"inputs": entries(self.input_names), "outputs": entries(self.target_names)}


@dataclass(frozen=True)
class Split:
    """Row indices of the three parts (step 1 of the recipe)."""

    training: np.ndarray
    validation: np.ndarray
    test: np.ndarray

    def sizes(self) -> dict[str, int]:
        return {part: int(getattr(self, part).size) for part in ("training", "validation", "test")}


@dataclass(frozen=True)
class FitOutcome:
    """The fit's facts for the report; ``history`` is ``None`` for the least-squares methods.

    ``network``: the fitted network (for the recipe's methods the recipe builds
    it; otherwise the one passed to :func:`fit`); ``recipe``: the recipe's
    :class:`RecipeResult` (``None`` for the other methods).

    ``summary`` has ``message`` (a sentence of our own) and, for ``mini-batch`` and the
    least-squares methods, ``stop_reason``; for the least-squares methods also scipy's
    ``scipy_status`` and ``scipy_message``.
    """

    summary: dict[str, Any]
    history: History | None
    seconds: float
    network: Network | None = None
    recipe: RecipeResult | None = None


def split_rows(n: int, settings: FitSettings) -> Split:
    """Step 1 of the recipe; ``ValueError`` for a split that leaves no training row."""
    order = np.random.default_rng(settings.seed).permutation(n)
    n_test = round(settings.test_fraction * n)
    n_val = round(settings.validation_fraction * n)
    if n - n_test - n_val < 1:
        raise ValueError(
            f"the data have {n} rows; after {n_test} test and {n_val} validation rows none is left for training "
            "(lower test_fraction / validation_fraction)"
        )
    return Split(order[n_test + n_val:], order[n_test:n_test + n_val], order[:n_test])


def check_data(data: Dataset, split: Split, settings: FitSettings, n_params: int | None) -> list[str]:
    """Refuse data that cannot be fitted or evaluated; return warnings (sentences) for data that are merely weak.

    Raises ``ValueError`` when fewer than 2 rows are left for training, or when
    a target column takes one value on every training row (there is nothing
    to fit, and ``R^2`` is undefined). Warns when an input column is constant
    on the training rows, when the training rows give fewer
    target values than the network has parameters (``n_params``, ``None``
    when the network is not built yet: it can then fit them exactly, and the
    training error says little), and when the
    validation or the test part is empty although its fraction is above 0.
    """
    n, n_train = data.X.shape[0], split.training.size
    if n_train < 2:
        raise ValueError(
            f"{count(n_train, 'row')} left for training (of {count(n, 'data row')}); "
            "fitting needs at least 2 training rows"
        )
    y_train = data.y[split.training]
    for k, name in enumerate(data.target_names):
        if np.all(y_train[:, k] == y_train[0, k]):
            raise ValueError(
                f"target column {name!r} is {y_train[0, k]:g} on all {n_train} training rows; "
                "a constant cannot be fitted or evaluated"
            )
    warnings = []
    X_train = data.X[split.training]
    for j, name in enumerate(data.input_names):
        if np.all(X_train[:, j] == X_train[0, j]):
            warnings.append(f"input column {name!r} is {X_train[0, j]:g} on all {n_train} training rows: "
                            "it cannot inform the fit")
    values = y_train.size
    if n_params is not None and values < n_params:
        warnings.append(
            f"{count(n_train, 'training row')} give {count(values, 'target value')} for {n_params} parameters: "
            "the network can fit them exactly, so its training error says little; use fewer hidden units or more rows"
        )
    for part, fraction in (("validation", settings.validation_fraction), ("test", settings.test_fraction)):
        if getattr(split, part).size == 0 and fraction > 0:
            warnings.append(f"the {part} part is empty ({part}_fraction {fraction:g} of {count(n, 'row')} rounds "
                            "to 0 rows): " + ("no validation loss is tracked" if part == "validation"
                                              else "there is no error measured on unseen rows"))
    return warnings


def build_network(data: Dataset, split: Split, settings: FitSettings) -> Network:
    """Step 2 of the recipe."""
    X_train, y_train = data.X[split.training], data.y[split.training]
    sizes = [data.X.shape[1], *(settings.hidden or COMMAND_LINE_HIDDEN), data.y.shape[1]]
    mlp = build_mlp(sizes, activation=ACTIVATIONS[settings.activation](), seed=settings.seed, dtype=settings.dtype)
    layers = [Standardize.from_data(X_train), *mlp.layers, Unstandardize.from_data(y_train)]
    return Network(layers, dtype=settings.dtype, init=None)


def fit(
    net: Network | None,
    data: Dataset,
    split: Split,
    settings: FitSettings,
    *,
    progress: bool = False,
) -> FitOutcome:
    """Step 3 of the recipe: changes ``net``'s weights in place; ``progress`` shows the progress line on stderr.

    For the default recipe's methods (``auto``, ``evidence-lm``,
    ``adam-early-stopping``) ``net`` is ``None``:
    ``fit_tabular_regression(X_train, y_train, hidden=settings.hidden,
    seed=settings.seed, method=settings.method, restarts=settings.restarts)``
    builds and fits the network (copied to ``settings.dtype``), returned as
    ``outcome.network``.
    """
    X_train, y_train = data.X[split.training], data.y[split.training]
    started = time.perf_counter()
    if settings.method in RECIPE_METHODS:
        fitted, recipe = fit_tabular_regression(
            X_train, y_train, hidden=settings.hidden, seed=settings.seed, method=settings.method,
            restarts=settings.restarts, progress=progress,
        )
        history = None if recipe.training is None else recipe.training.history
        return FitOutcome(recipe.summary(), history, time.perf_counter() - started,
                          network=fitted.copy(settings.dtype), recipe=recipe)
    if net is None:
        raise TypeError(f"method {settings.method!r} fits a given network; build it with build_network")
    if settings.method == "mini-batch":
        optimizer = _optimizer(settings, X_train.shape[0])
        validation = (data.X[split.validation], data.y[split.validation]) if split.validation.size else None
        result = train(
            net, X_train, y_train, loss=MeanSquaredError(), optimizer=optimizer, epochs=settings.epochs,
            batch_size=settings.batch_size, validation=validation, patience=settings.patience,
            seed=settings.seed, progress=progress,
        )
        summary = {
            "stop_reason": result.stop_reason,
            "message": result.message,
            "epochs_run": result.epochs_run,
            "updates": result.updates,
            "best_epoch": result.best_epoch,
            "best_validation_loss": result.best_validation_loss,  # finite: a non-finite loss raises
        }
        return FitOutcome(summary, result.history, time.perf_counter() - started, network=net)
    solved = solve(net, X_train, y_train, method=settings.method, max_evaluations=settings.max_evaluations,
                   progress=progress)
    stop_reason, sentence = solver_stop(solved)
    summary = {
        "success": solved.success,
        "stop_reason": stop_reason,
        "message": sentence,
        "scipy_status": solved.status,
        "scipy_message": solved.message,
        "rss": solved.rss,
        "gradient_norm": solved.gradient_norm,
        "iterations": solved.iterations,
        "function_evaluations": solved.function_evaluations,
        "jacobian_evaluations": solved.jacobian_evaluations,
    }
    return FitOutcome(summary, None, time.perf_counter() - started, network=net)


def solver_stop(result: SolveResult) -> tuple[str, str]:
    """Why :func:`~tinyprop.solve.solve` stopped: ``(stop_reason, sentence)``, in words of our own.

    ``stop_reason`` is ``"converged"``, ``"evaluation limit"`` or ``"no progress"``.
    They come from scipy's status: Levenberg-Marquardt (``least_squares``,
    ``method="lm"``) 0 evaluation limit, 1 gradient test (``gtol``), 2 relative
    reduction of the residual sum of squares (``ftol``), 3 relative step
    (``xtol``), 4 both 2 and 3; L-BFGS-B (``minimize``) 0 converged (the
    projected gradient, or the relative reduction, told apart by scipy's
    message), 1 evaluation or iteration limit, 2 the line search found no
    lower loss. Any other status keeps scipy's message in the sentence.
    """
    limit = ("evaluation limit", "stopped at the evaluation limit before converging")
    evaluations = f"{count(result.function_evaluations, 'evaluation')}, {count(result.iterations, 'iteration')}"
    if result.method == "blocked-levenberg-marquardt":  # tinyprop's own engine: its message is already ours
        reason = ("converged" if result.success else "evaluation limit" if "limit" in result.message
                  else "no progress")
        return reason, f"{result.message}; {evaluations}"
    if result.method == "levenberg-marquardt":
        reasons = {
            0: limit,
            1: ("converged", "converged on the gradient: the residuals are orthogonal to the Jacobian's columns "
                             "to within the tolerance"),
            2: ("converged", "converged on the relative reduction: the residual sum of squares no longer falls "
                             "by more than the tolerance"),
            3: ("converged", "converged on the step size: the steps no longer change the weights by more than "
                             "the tolerance"),
            4: ("converged", "converged on the relative reduction and the step size"),
        }
    else:
        gradient = "REDUCTION" not in result.message.upper()
        reasons = {
            0: ("converged", "converged on the gradient: its largest component is below the tolerance" if gradient
                else "converged on the relative reduction: the loss no longer falls by more than the tolerance"),
            1: limit,
            2: ("no progress", "stopped: the line search found no lower loss (float64 precision reached near a "
                               "minimum, or a badly scaled problem)"),
        }
    reason, sentence = reasons.get(result.status, ("no progress", f"ended with solver status {result.status} "
                                                                  f"({result.message})"))
    return reason, f"{sentence}; {evaluations}"


def _optimizer(settings: FitSettings, n_train: int) -> Optimizer:
    schedule = None
    if settings.schedule == "cosine":
        schedule = CosineSchedule(settings.epochs * math.ceil(n_train / settings.batch_size))
    if settings.optimizer == "sgd":
        return SGD(settings.optimizer_lr(), momentum=settings.momentum, schedule=schedule, clip_norm=settings.clip_norm)
    optimizer_class, _ = OPTIMIZERS[settings.optimizer]
    return optimizer_class(settings.optimizer_lr(), schedule=schedule, clip_norm=settings.clip_norm)


def evaluate(net: Network, data: Dataset, rows: np.ndarray) -> dict[str, Any] | None:
    """Step 4 of the recipe on ``rows`` (``None`` when there are none)."""
    if rows.size == 0:
        return None
    y = data.y[rows]
    prediction = net.predict(data.X[rows]).astype(np.float64)
    error = prediction - y
    spread = ((y - y.mean(axis=0)) ** 2).sum(axis=0)
    per_target = {}
    for k, name in enumerate(data.target_names):
        ss_res = float((error[:, k] ** 2).sum())
        per_target[name] = {
            "rmse": float(np.sqrt(ss_res / rows.size)),
            "mae": float(np.abs(error[:, k]).mean()),
            "max_abs_error": float(np.abs(error[:, k]).max()),
            "r_squared": 1.0 - ss_res / float(spread[k]) if spread[k] > 0 else None,
        }
    return {"rows": int(rows.size), "loss": MeanSquaredError().value(prediction, y), "targets": per_target}


def evaluate_all(net: Network, data: Dataset, split: Split) -> dict[str, Any]:
    """:func:`evaluate` on the training, validation and test rows."""
    return {part: evaluate(net, data, getattr(split, part)) for part in ("training", "validation", "test")}


def least_squares_uncertainty(
    net: Network, data: Dataset, split: Split, result: SolveResult | None = None
) -> dict[str, Any]:
    """Parameter standard errors, prediction intervals and input sensitivities on the training rows.

    ``result``: the fit's :class:`~tinyprop.solve.SolveResult`, needed for a
    regularised (evidence-lm) fit, whose posterior is reported per target.
    """
    try:
        return uncertainty_report(
            net, data.X[split.training], data.y[split.training],
            input_names=data.input_names, output_names=data.target_names, result=result,
        )
    except ValueError as exc:  # e.g. no degrees of freedom left
        return {"unavailable": str(exc)}



# ---------------------------------------------------------------- the default classification recipe
# Chosen and measured in docs/classification.md (penguins and iris): the L2 penalty by MacKay's
# evidence framework (default), or by cross-validation over a grid.
CLASSIFICATION_HIDDEN_UNITS = 32
CLASSIFICATION_PENALTIES = (1e-4, 3e-4, 1e-3, 3e-3, 1e-2)  # the grid for penalty="cross-validation"
CLASSIFICATION_FOLDS = 5
CLASSIFICATION_LR = 1e-2
CLASSIFICATION_BATCH_SIZE = 32
CLASSIFICATION_EPOCHS = 300
EVIDENCE_START = 1e-3  # the L2 weight of the first evidence round
EVIDENCE_ROUNDS = 6  # at most; stops when the weight changes by less than 5 %


@dataclass(frozen=True)
class ClassificationFit:
    """What :func:`fit_tabular_classification` returns.

    ``classifier`` (the network and its labels), ``result`` (the final
    training run), ``penalty`` (the L2 weight used), ``cross_validation``
    (``(penalty, mean held-out log loss)`` of every candidate, in the order
    tried; empty unless the penalty was cross-validated), ``evidence``
    (``(l2, gamma, sum of squared weights)`` per evidence round; empty unless
    the evidence framework chose the penalty) and ``class_weights`` (one per
    label, all 1 unless asked for), ``envelope`` (the
    :class:`~tinyprop.envelope.Envelope` of the training inputs, raw units).
    """

    classifier: Classifier
    result: TrainingResult
    penalty: float
    cross_validation: tuple[tuple[float, float], ...]
    class_weights: tuple[float, ...]
    evidence: tuple[tuple[float, float, float], ...] = ()
    envelope: Envelope | None = None

    def metadata(self) -> dict[str, Any]:
        """What a model file of the classifier should keep: its labels and target, and the envelope."""
        return {**self.classifier.metadata(), **({} if self.envelope is None else self.envelope.to_metadata())}


def fit_tabular_classification(
    X: Any,
    labels: Any,
    *,
    hidden: Any = (CLASSIFICATION_HIDDEN_UNITS,),
    penalty: Any = "evidence",
    penalties: Any = CLASSIFICATION_PENALTIES,
    folds: int = CLASSIFICATION_FOLDS,
    epochs: int = CLASSIFICATION_EPOCHS,
    class_weights: Any = None,
    seed: int = 0,
    target: str = "class",
    two_class_output: str = "sigmoid",
) -> ClassificationFit:
    """tinyprop's default recipe for small tabular classification.

    ``X`` ``(n, d)``, ``labels`` ``(n,)`` (any values, compared as strings;
    at least two distinct ones). The recipe:

    - classes: the distinct labels, sorted (:func:`~tinyprop.classify.encode_labels`);
    - network ``Standardize -> [Affine -> Tanh] per entry of hidden -> Affine(., m)``
      giving one logit per class (``m = K``), scaling fitted on all rows
      given, Glorot initialisation; for two classes, with
      ``two_class_output="sigmoid"`` (the default), ``m = 1``: one logit,
      the log-odds of the second label (:mod:`tinyprop.classify`);
      ``two_class_output="softmax"`` keeps two logits (the same model with
      one redundant output);
    - loss :class:`~tinyprop.losses.CrossEntropyOnSoftmax` on one-hot rows,
      each multiplied by its class weight (:func:`~tinyprop.classify.one_hot`);
      for one sigmoid output :class:`~tinyprop.losses.CrossEntropyOnSigmoid`
      on the column ``[label == labels[1]]`` with ``target_weights`` the two
      class weights;
    - ``Adam(lr=1e-2)`` with the learning rate falling along a cosine to 0,
      mini-batches of 32, ``epochs`` epochs (no early stopping), plus the L2
      penalty ``l2/2 * sum ||W||^2`` on the weight matrices of :func:`~tinyprop.train.train`.

    ``penalty`` chooses ``l2``:

    - ``"evidence"`` (default): MacKay's evidence framework (MacKay 1992, "The
      evidence framework applied to classification networks", Neural
      Computation 4(5)). With ``alpha = n * l2`` (``train``'s loss is a mean
      over rows), train, then ``gamma = sum_j lambda_j / (lambda_j + alpha)``
      over the eigenvalues ``lambda_j`` of the weight block of the
      Gauss-Newton Hessian of the summed loss,
      ``H = sum_i s_i J_i^T (diag(p_i) - p_i p_i^T) J_i`` (``J_i`` the
      logits' Jacobian with respect to the weights, ``s_i`` the row's class
      weight; ``p_i (1 - p_i)`` in place of the matrix for one sigmoid
      output; :func:`~tinyprop.classify.logit_curvature`), and set
      ``alpha = gamma / sum ||W||^2``; from ``l2 = 1e-3``, at most 6 rounds,
      stopping when ``alpha`` changes by less than 5 %; then train once more
      with the last ``alpha``. ``gamma`` is the number of well-determined
      weights;
    - ``"cross-validation"``: ``l2`` from ``penalties`` by ``folds``-fold
      stratified cross-validation on the rows given
      (:func:`~tinyprop.classify.stratified_folds`), the lowest mean held-out
      log loss (the first on a tie); then trained on all rows with it
      (``len(penalties) * folds + 1`` trainings);
    - a number: that ``l2``, one training.

    ``class_weights``: ``None`` (all 1), ``"balanced"`` (``n / (K n_c)`` for
    class ``c`` with ``n_c`` rows, so every class weighs the same in total)
    or a dict from label to a positive weight (labels not named weigh 1).

    ``seed`` gives the folds, the initial weights and the shuffling three
    independent streams (``numpy.random.SeedSequence``); every training
    starts from the same initial weights, and the same seed and data give
    the same weights. ``target`` names the label column (kept with the labels
    in model files).
    """
    X = as_float_array(X, "X", np.dtype(np.float64))
    if X.ndim != 2:
        raise ValueError(f"X must have shape (n_samples, n_features), got shape {X.shape}")
    classes, indices = encode_labels(labels)
    if indices.size != X.shape[0]:
        raise ValueError(f"labels must have one entry per row of X ({X.shape[0]}), got {indices.size}")
    widths = tuple(positive_int(width, "each width in hidden") for width in
                   ((hidden,) if isinstance(hidden, (int, np.integer)) else tuple(hidden)))
    epochs = positive_int(epochs, "epochs")
    if seed_value(seed) is None:
        raise TypeError("seed must be an integer >= 0, got None")
    weights = _class_weights(class_weights, classes, indices)
    if two_class_output not in DECISIONS:
        raise ValueError(f"two_class_output must be one of {DECISIONS}, got {two_class_output!r}")
    if len(classes) == 2 and two_class_output == "sigmoid":
        n_logits, loss = 1, CrossEntropyOnSigmoid(target_weights=(float(weights[0]), float(weights[1])))
        targets = (indices == 1).astype(np.float64)[:, None]
    else:
        n_logits, loss = len(classes), CrossEntropyOnSoftmax()
        targets = one_hot(indices, len(classes), weights=weights)
    fold_seed, init_seed, shuffle_seed = (int(s) for s in np.random.SeedSequence(int(seed)).generate_state(3))

    def trained(rows: np.ndarray, l2: float) -> tuple[Network, TrainingResult]:
        layers: list[Layer] = [Standardize.from_data(X[rows])]
        for n_in, n_out in zip((X.shape[1], *widths[:-1]), widths):
            layers += [Affine(n_in, n_out), Tanh()]
        layers.append(Affine(widths[-1], n_logits))
        net = Network(layers, seed=init_seed)
        schedule = CosineSchedule(epochs * math.ceil(rows.size / CLASSIFICATION_BATCH_SIZE))
        result = train(net, X[rows], targets[rows], loss=loss,
                       optimizer=Adam(lr=CLASSIFICATION_LR, schedule=schedule), epochs=epochs,
                       batch_size=CLASSIFICATION_BATCH_SIZE, seed=shuffle_seed, l2=l2)
        return net, result

    every_row = np.arange(indices.size)
    scores: list[tuple[float, float]] = []
    rounds: list[tuple[float, float, float]] = []
    if isinstance(penalty, str) and penalty == "evidence":
        chosen = EVIDENCE_START
        for _ in range(EVIDENCE_ROUNDS):
            net, _ = trained(every_row, chosen)
            gamma, squares = _well_determined(net, X, weights[indices], indices.size * chosen)
            rounds.append((chosen, gamma, squares))
            update = gamma / squares / indices.size
            converged = abs(math.log(update / chosen)) < 0.05
            chosen = update
            if converged:
                break
    elif isinstance(penalty, str) and penalty == "cross-validation":
        candidates = tuple(real_in_range(p, "each penalty", low=0.0) for p in penalties)
        folds = positive_int(folds, "folds")
        if not candidates:
            raise ValueError("penalties must hold at least one value")
        smallest = int(np.bincount(indices).min())
        if folds < 2 or smallest < folds:
            raise ValueError(f"cross-validation over {folds} folds needs at least {max(folds, 2)} rows of every "
                             f"class; the smallest class has {smallest} (lower folds or give a fixed penalty)")
        for l2 in candidates:
            losses = []
            for held in stratified_folds(indices, folds, fold_seed):
                net, _ = trained(np.setdiff1d(every_row, held), l2)
                p = class_probabilities(net.predict(X[held]))
                losses.append(-np.log(np.maximum(p[np.arange(held.size), indices[held]], 1e-300)))
            scores.append((l2, float(np.mean(np.concatenate(losses)))))
        chosen = min(scores, key=lambda entry: entry[1])[0]
    elif isinstance(penalty, str):
        raise ValueError(f"penalty must be 'evidence', 'cross-validation' or a number >= 0, got {penalty!r}")
    else:
        chosen = real_in_range(penalty, "penalty", low=0.0)
    net, result = trained(every_row, chosen)
    return ClassificationFit(Classifier(net, classes, str(target)), result, chosen, tuple(scores),
                             tuple(float(w) for w in weights), tuple(rounds), Envelope.of_rows(X))


def _well_determined(net: Network, X: np.ndarray, row_weights: np.ndarray, alpha: float) -> tuple[float, float]:
    """``(gamma, sum ||W||^2)`` of the evidence framework at the prior weight ``alpha``.

    ``gamma = sum_j lambda_j / (lambda_j + alpha)`` over the eigenvalues of the
    weight block of ``H = sum_i s_i J_i^T C_i J_i``: ``J_i`` the logits'
    Jacobian of row ``i`` with respect to the weight-matrix entries,
    ``C_i`` the loss's curvature in the logits (``diag(p_i) - p_i p_i^T``, or
    ``p_i (1 - p_i)`` for one sigmoid output; :func:`~tinyprop.classify.logit_curvature`),
    ``s_i = row_weights[i]`` (the row's class weight). Rows are taken in
    blocks of 256, so the memory is that of ``H`` plus one block's Jacobian.
    """
    mask = np.concatenate([np.full(p.size, p.ndim == 2) for p in net.params])
    n_logits, size = net.n_out, int(mask.sum())
    H = np.zeros((size, size))
    for start in range(0, X.shape[0], 256):
        rows = slice(start, start + 256)
        J = net.jacobian(X[rows]).reshape(-1, n_logits, net.n_params)[:, :, mask]
        C = logit_curvature(net.predict(X[rows])) * row_weights[rows][:, None, None]
        H += J.reshape(-1, size).T @ np.einsum("ikl,ilb->ikb", C, J).reshape(-1, size)
    eigenvalues = np.clip(np.linalg.eigvalsh(H), 0.0, None)
    return float(np.sum(eigenvalues / (eigenvalues + alpha))), float(np.sum(net.get_vector()[mask] ** 2))


def _class_weights(spec: Any, classes: tuple[str, ...], indices: np.ndarray) -> np.ndarray:
    """One weight per class from ``None``, ``"balanced"`` or ``{label: weight}``."""
    if spec is None:
        return np.ones(len(classes))
    if isinstance(spec, str):
        if spec != "balanced":
            raise ValueError(f"class_weights must be None, 'balanced' or a dict of label -> weight, got {spec!r}")
        counts = np.bincount(indices, minlength=len(classes))
        return indices.size / (len(classes) * counts)
    if not isinstance(spec, Mapping):
        raise TypeError(f"class_weights must be None, 'balanced' or a dict of label -> weight, got "
                        f"{type(spec).__name__}")
    unknown = sorted(str(label) for label in spec if str(label) not in classes)
    if unknown:
        raise ValueError(f"class_weights names {unknown}, which are not among the labels {list(classes)}")
    weights = np.ones(len(classes))
    for label, value in spec.items():
        weights[classes.index(str(label))] = real_in_range(value, f"class_weights[{label!r}]", low=0.0, low_open=True)
    return weights
