"""The mini-batch training loop: shuffling, validation, early stopping, divergence guard.

One epoch of :func:`train`:

1. permute the training rows with the loop's own ``numpy.random.default_rng(seed)``;
2. for each mini-batch of ``batch_size`` rows (the last one may be smaller):
   forward pass, loss ``E_batch``, backward pass (``need_input=False``), the
   optional L2 term ``l2 * W`` added to every weight-matrix gradient (the
   gradient of ``l2/2 * sum ||W||_F**2``; biases are not penalised), then
   one optimizer update of all parameters at once,
   ``optimizer.update([net.vector], [workspace.grad_vector])`` (the flat
   vectors of which ``net.params`` and the gradients are views);
3. record the training loss and, when given, the validation loss on the
   validation rows (exact: ``loss`` over all validation rows with the weights
   at the end of the epoch, without the L2 term);
4. bookkeeping for early stopping, the progress line and the callback.

**The recorded training loss** (``training_loss=``):

- ``"running"`` (the default) costs nothing: it is assembled from the
  mini-batch losses the epoch has already computed, each taken with the
  weights *before* that batch's update, without the L2 term. For a loss that
  is a mean over samples (every built-in loss except ``SquaredError``) it is
  the mean weighted by batch size, ``sum_b n_b E_b / n``; for a loss that sums
  over samples (``Loss.sums_over_samples``, ``SquaredError``) it is the sum
  ``sum_b E_b``. It therefore mixes the weights of the start and the end of
  the epoch (early batches were seen by older weights) and usually lies a
  little above the loss at the end of the epoch while the loss falls.
- ``"exact"``: ``loss`` over all training rows with the weights at the end of
  the epoch, one extra forward pass over the training data per epoch (what
  :func:`train` recorded before the running mean became the default).

Early stopping, the best epoch and the restored weights depend only on the
validation loss, which is always exact, so the choice changes none of them,
nor the weights: only ``history.training`` (and what the callback and the
progress line show).

The same seed, data and starting weights give bit-identical weights: the
only randomness is the permutation, and it comes from the seeded generator.

**Divergence guard.** Training stops at the first update where the
mini-batch loss, the squared gradient norm or an updated weight is not
finite, or after an epoch whose training or validation loss is not finite.
The network is left holding the last finite weights (those before the update
that produced a non-finite weight, else the current ones) and
:class:`TrainingDiverged` is raised; its ``result`` holds the history up to
that point. NumPy's overflow and invalid-value warnings are silenced inside
the loop because this guard reports the event instead.

To keep a step as cheap as the bare step, the loop does not copy the weights
before every update. It checks the mini-batch loss and the gradient norm at
every update and the weights once at the end of each epoch (and, because a
non-finite weight makes the outputs non-finite, through the next mini-batch
loss). When a check fails it rewinds the weights and the optimizer to their
copies from the start of the epoch and replays the epoch's updates with every
check after every update: the arithmetic is the same, so the replay stops at
the same update, with the same weights and message, as a guard that checked
everything after every update.

**Checkpoint and resume.** :class:`TrainingState` is everything needed to
continue a run exactly: weights, optimizer state, the generator's state, the
epoch count, the history and the early-stopping bookkeeping. It is returned
in ``result.state`` and can be taken after any epoch from the callback
(``info.capture()``). ``train(..., resume=state)`` continues from it; the
final weights are bit-identical to an uninterrupted run. The state and its
file live in :mod:`tinyprop.checkpoint`.
"""

from __future__ import annotations

import hashlib
import math
import os
import time
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np

from ._json import json_copy
from ._progress import EpochProgress
from ._validate import _sum_is_finite, as_samples, as_targets, positive_int, real_in_range, require_finite, seed_value
from .checkpoint import TrainingState, network_digest, save_checkpoint
from .layers import Affine
from .losses import Loss
from .network import Network
from .optim import Optimizer
from .workspace import Workspace

__all__ = [
    "train",
    "TrainingResult",
    "TrainingDiverged",
    "History",
    "EpochInfo",
]

STOP_EPOCHS = "epochs"
STOP_EARLY = "early stopping"
STOP_CALLBACK = "callback"
STOP_DIVERGED = "diverged"

_UPDATE_OVERFLOWED = "the update made a weight non-finite (the weights before it were restored)"

TRAINING_LOSS_RUNNING = "running"
TRAINING_LOSS_EXACT = "exact"


@dataclass(frozen=True)
class History:
    """Loss per epoch: ``training[e - 1]`` and ``validation[e - 1]`` belong to epoch ``e``.

    ``training`` is the running value assembled from the epoch's mini-batch
    losses, or the exact loss over all training rows with
    ``training_loss="exact"`` (see the module docstring); ``validation`` is
    always the exact loss over the validation rows at the end of the epoch.

    ``validation`` is ``None`` when no validation data was given.
    """

    training: tuple[float, ...]
    validation: tuple[float, ...] | None


@dataclass(frozen=True)
class TrainingResult:
    """What :func:`train` returns.

    ``history``: per-epoch losses of the whole run (a resumed run includes the
    epochs before the resume). ``epochs_run``: epochs completed in total.
    ``stop_reason``: ``"epochs"`` (the epoch limit), ``"early stopping"``,
    ``"callback"`` or ``"diverged"``; ``message`` says it in a sentence.
    ``best_epoch`` / ``best_validation_loss``: the epoch (1-based) with the
    lowest validation loss and that loss (``None`` without validation data).
    ``updates``: optimizer updates made in total. ``elapsed``: seconds spent
    in this call. ``state``: the :class:`TrainingState` after the last
    completed epoch (before best weights are restored), for resuming.
    """

    history: History
    epochs_run: int
    stop_reason: str
    message: str
    best_epoch: int | None
    best_validation_loss: float | None
    updates: int
    elapsed: float
    state: TrainingState = field(repr=False)


class TrainingDiverged(ArithmeticError):
    """Training produced a non-finite loss, gradient or weight.

    The network holds the last finite weights; ``result`` is the
    :class:`TrainingResult` up to that point (``stop_reason == "diverged"``).
    """

    def __init__(self, message: str, result: TrainingResult) -> None:
        super().__init__(message)
        self.result = result


@dataclass(frozen=True)
class EpochInfo:
    """What the per-epoch callback receives.

    ``epoch`` (1-based) of ``epochs``; the epoch's ``training_loss`` and
    ``validation_loss`` (``None`` without validation data); ``best_epoch``;
    ``elapsed`` seconds in this call. ``capture()`` returns a
    :class:`TrainingState` of this moment (a copy), for checkpoints.
    """

    epoch: int
    epochs: int
    training_loss: float
    validation_loss: float | None
    best_epoch: int | None
    elapsed: float
    capture: Callable[[], TrainingState] = field(repr=False)


def train(
    net: Network,
    X: Any,
    y: Any,
    *,
    loss: Loss,
    optimizer: Optimizer,
    epochs: int,
    batch_size: int,
    validation: tuple[Any, Any] | None = None,
    patience: int | None = None,
    seed: int | None = None,
    progress: bool = False,
    l2: float = 0.0,
    callback: Callable[[EpochInfo], bool | None] | None = None,
    resume: TrainingState | None = None,
    checkpoint: str | os.PathLike[str] | None = None,
    checkpoint_every: int = 1,
    training_loss: str = TRAINING_LOSS_RUNNING,
) -> TrainingResult:
    """Train ``net`` in place by mini-batch gradient descent (see the module docstring).

    Parameters
    ----------
    net, X, y:
        The network and its training data: ``X`` ``(n, n_in)``, ``y``
        ``(n, n_out)`` (1-D allowed for one output). Converted once to the
        network's dtype; the caller's arrays are not modified. Memory: one
        shuffled copy of ``X`` and ``y``, refilled every epoch, the network's
        workspace for one mini-batch, and a copy of the weights and of the
        optimizer's state taken at the start of every epoch (for the
        divergence guard's replay).
    loss:
        A :class:`~tinyprop.losses.Loss`, evaluated per mini-batch. Mean
        losses (``MeanSquaredError``, the cross-entropies) make the step size
        independent of ``batch_size``; ``SquaredError`` sums over the batch.
    optimizer:
        A :class:`~tinyprop.optim.Optimizer`; it keeps its state between calls.
    epochs:
        Total number of epochs, counting those already in ``resume``.
    batch_size:
        Rows per update; a batch larger than ``n`` means full-batch training.
    validation:
        Optional ``(X_val, y_val)``; its loss is recorded after every epoch.
    patience:
        Early stopping (needs ``validation``): stop after ``patience`` epochs
        without a strictly lower validation loss and restore the weights of the
        best epoch. The best weights are also restored when the epoch limit or
        the callback ends the run; not after divergence.
    seed:
        Seed of the shuffling generator (``numpy.random.default_rng``).
    progress:
        Print a progress line on stderr (epoch, losses, elapsed and estimated
        remaining time): on a terminal one line rewritten in place at most ten
        times a second and at the last epoch; elsewhere plain lines for the
        first epoch, every tenth of the run and the last epoch.
    l2:
        Weight of the L2 penalty ``l2/2 * sum ||W||**2`` on the weight
        matrices (not biases), added to the gradient.
    callback:
        Called with an :class:`EpochInfo` after every epoch; returning
        ``True`` stops training (``stop_reason == "callback"``), ``None`` or
        ``False`` continues.
    resume:
        A :class:`TrainingState` to continue from; ``net``'s weights and the
        optimizer's state are replaced by the state's, and the settings
        (``batch_size``, ``seed``, ``l2``, ``patience``, ``loss``, data sizes)
        must equal those of the run that produced it. To continue from a
        file: ``resume=tp.load_checkpoint(path)``.
    checkpoint, checkpoint_every:
        Write the :class:`TrainingState` to the file ``checkpoint`` after every
        ``checkpoint_every``-th epoch and at the epoch limit, atomically
        (:func:`tinyprop.save_checkpoint`), before the callback runs. A run
        that dies can be continued from the last checkpoint with bit-identical
        results.
    training_loss:
        ``"running"`` (default): the epoch's training loss is assembled from
        its mini-batch losses, at no extra cost; ``"exact"``: the loss over all
        training rows with the end-of-epoch weights, one more forward pass over
        the data per epoch. See the module docstring; the weights, the
        validation loss and early stopping are the same either way.

    Raises
    ------
    TrainingDiverged
        When a loss, gradient or weight becomes non-finite (the network keeps
        the last finite weights).

    >>> import numpy as np, tinyprop as tp
    >>> rng = np.random.default_rng(0)
    >>> X = rng.uniform(-1, 1, (64, 2)); y = X @ np.array([1.5, -2.0]) + 0.5  # synthetic
    >>> net = tp.Network([tp.Affine(2, 1)], seed=0)
    >>> result = tp.train(net, X, y, loss=tp.MeanSquaredError(), optimizer=tp.Adam(lr=0.05),
    ...                   epochs=200, batch_size=16, seed=1)
    >>> result.stop_reason, result.history.training[-1] < 1e-8
    ('epochs', True)
    """
    run = _Run(
        net, X, y, loss, optimizer, epochs, batch_size, validation, patience, seed, progress, l2, callback,
        training_loss,
    )
    run.checkpoint_to(checkpoint, checkpoint_every)
    if resume is not None:
        run.restore(resume)
    return run.execute()


class _Run:
    """One call of :func:`train`: checked inputs, the loop and its bookkeeping."""

    def __init__(
        self,
        net: Network,
        X: Any,
        y: Any,
        loss: Loss,
        optimizer: Optimizer,
        epochs: int,
        batch_size: int,
        validation: tuple[Any, Any] | None,
        patience: int | None,
        seed: int | None,
        progress: bool,
        l2: float,
        callback: Callable[[EpochInfo], bool | None] | None,
        training_loss: str = TRAINING_LOSS_RUNNING,
        data_sha256: str | None = None,
    ) -> None:
        """``data_sha256``: the digest of the checked data if the caller has it (the networks of a stack share it)."""
        if training_loss not in (TRAINING_LOSS_RUNNING, TRAINING_LOSS_EXACT):
            raise ValueError(f"training_loss must be 'running' or 'exact', got {training_loss!r}")
        if not isinstance(net, Network):
            raise TypeError(f"net must be a tinyprop Network, got {type(net).__name__}")
        if not isinstance(loss, Loss):
            raise TypeError(f"loss must be a tinyprop Loss (e.g. MeanSquaredError()), got {type(loss).__name__}")
        if not isinstance(optimizer, Optimizer):
            raise TypeError(f"optimizer must be a tinyprop Optimizer (e.g. Adam()), got {type(optimizer).__name__}")
        seed = seed_value(seed)
        if not isinstance(progress, bool):
            raise TypeError(f"progress must be True or False, got {progress!r}")
        if callback is not None and not callable(callback):
            raise TypeError(f"callback must be callable or None, got {type(callback).__name__}")
        for i, p in enumerate(net.params):
            require_finite(p, f"network parameter array {i}")
        self.net, self.loss, self.optimizer, self.callback = net, loss, optimizer, callback
        self.X = as_samples(X, "X", net.n_in, net.dtype)
        self.y = as_targets(y, "y", self.X.shape[0], net.n_out, net.dtype)
        self.validation = _check_validation(validation, net)
        self.epochs = positive_int(epochs, "epochs")
        self.batch_size = positive_int(batch_size, "batch_size")
        self.patience = None if patience is None else positive_int(patience, "patience")
        if self.patience is not None and self.validation is None:
            raise ValueError("patience (early stopping) needs validation data: pass validation=(X_val, y_val)")
        self.l2 = real_in_range(l2, "l2", low=0.0)
        self.progress_line = EpochProgress() if progress else None
        self.rng = np.random.default_rng(seed)
        self.exact_training_loss = training_loss == TRAINING_LOSS_EXACT
        self.settings = {
            "training_loss": training_loss,
            "batch_size": self.batch_size,
            "seed": None if seed is None else int(seed),
            "l2": self.l2,
            "patience": self.patience,
            "loss": repr(loss),
            "dtype": net.dtype.name,
            "n_samples": int(self.X.shape[0]),
            "n_validation": None if self.validation is None else int(self.validation[0].shape[0]),
            "parameter_shapes": [list(p.shape) for p in net.params],
            "data_sha256": data_sha256 or _data_digest(self.X, self.y, self.validation),
        }
        self.params = net.params
        self.is_weight = [
            is_w for layer in net.layers if isinstance(layer, Affine) for is_w in (True, False)[: len(layer.params)]
        ]
        self.backup = np.empty_like(net.vector)  # the weights at the start of the epoch (for a replay)
        self.step_backup: np.ndarray | None = None  # the weights before one update, during a replay only
        self.work: Workspace | None = None  # the loop's arrays, made when it starts (a stack never needs them)
        self.shuffled: tuple[np.ndarray, np.ndarray] | None = None  # each epoch's order of X and y, refilled
        self.checkpoint: str | os.PathLike[str] | None = None
        self.checkpoint_every = 1
        self.best_weights = None if self.validation is None else [np.empty_like(p) for p in self.params]
        self.epoch = 0
        self.training_loss: list[float] = []
        self.validation_loss: list[float] | None = None if self.validation is None else []
        self.best_epoch: int | None = None
        self.best_loss: float | None = None
        self.epochs_since_best = 0
        self.started = time.perf_counter()
        self.first_epoch_of_call = 1

    # ----------------------------------------------------------------- state
    def checkpoint_to(self, path: str | os.PathLike[str] | None, every: int) -> None:
        if path is not None and not isinstance(path, (str, os.PathLike)):
            raise TypeError(f"checkpoint must be a file path or None, got {type(path).__name__}")
        self.checkpoint = path
        self.checkpoint_every = positive_int(every, "checkpoint_every")

    def _write_checkpoint(self) -> None:
        if self.checkpoint is None:
            return
        if self.epoch % self.checkpoint_every == 0 or self.epoch >= self.epochs:
            save_checkpoint(self.capture(), self.checkpoint)

    def capture(self) -> TrainingState:
        has_best = self.best_epoch is not None and self.best_weights is not None
        return TrainingState(
            epoch=self.epoch,
            weights=[p.copy() for p in self.params],
            optimizer=self.optimizer.get_state(),
            rng=json_copy(self.rng.bit_generator.state),
            training_loss=list(self.training_loss),
            validation_loss=None if self.validation_loss is None else list(self.validation_loss),
            best_epoch=self.best_epoch,
            best_loss=self.best_loss,
            best_weights=[w.copy() for w in self.best_weights] if has_best else None,  # type: ignore[union-attr]
            epochs_since_best=self.epochs_since_best,
            settings=json_copy(self.settings),
            network=network_digest(self.net),
        )

    def restore(self, state: TrainingState) -> None:
        if not isinstance(state, TrainingState):
            raise TypeError(
                "resume must be a TrainingState (result.state or info.capture()), got "
                f"{type(state).__name__}"
            )
        # check everything first: a refused state leaves the network and the optimizer as they were
        keys = set(self.settings) | set(state.settings)
        differing = sorted(k for k in keys if self.settings.get(k) != state.settings.get(k))
        if differing:
            detail = ", ".join(
                f"{k}: state has {_brief(state.settings.get(k))}, this call {_brief(self.settings.get(k))}"
                for k in differing
            )
            raise ValueError(f"resume state does not match this training run ({detail})")
        try:
            state.check()
        except ValueError as exc:
            raise ValueError(f"resume state is inconsistent: {exc}") from None
        if not 0 <= state.epoch <= self.epochs:
            raise ValueError(f"resume state has {state.epoch} epochs done, more than epochs={self.epochs}")
        _check_like(self.params, state.weights, "resume state weights")
        if state.best_weights is not None:
            _check_like(self.best_weights or [], state.best_weights, "resume state best_weights")
        if network_digest(self.net, state.weights) != state.network:
            raise ValueError(
                "resume state comes from another network: its layers, activations, fixed scalings or weights "
                "differ from this network's with the state's weights (network digest mismatch)"
            )
        probe = type(self.rng.bit_generator)()
        try:
            probe.state = json_copy(state.rng)
        except (TypeError, ValueError, KeyError, OverflowError) as exc:
            raise ValueError(f"resume state has an unusable rng state: {exc}") from None
        self.optimizer.set_state(state.optimizer, params=[self.net.vector])  # checks before changing anything
        # from here on nothing can fail
        _copy_into(self.params, state.weights, "resume state weights")
        if state.best_weights is not None:
            _copy_into(self.best_weights or [], state.best_weights, "resume state best_weights")
        self.rng = np.random.Generator(probe)
        self.epoch = state.epoch
        self.first_epoch_of_call = state.epoch + 1
        self.training_loss = list(state.training_loss)
        self.validation_loss = None if state.validation_loss is None else list(state.validation_loss)
        self.best_epoch, self.best_loss = state.best_epoch, state.best_loss
        self.epochs_since_best = state.epochs_since_best

    # ----------------------------------------------------------------- the loop
    def execute(self) -> TrainingResult:
        self.started = time.perf_counter()
        self._loop_arrays()
        reason = self._stop_reason(stop_requested=False)
        while reason is None:
            with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
                problem = self._epoch()
            if problem is not None:
                result = self._finish(STOP_DIVERGED, problem)
                raise TrainingDiverged(result.message, result)
            reason = self._after_epoch()
        return self._finish(reason)

    def _finish(self, reason: str, problem: str | None = None) -> TrainingResult:
        """The result; after early stopping (not divergence) the network gets the best epoch's weights."""
        self._finish_progress()
        result = self._result(reason, problem)
        if reason != STOP_DIVERGED and self.patience is not None and self.best_epoch is not None:
            _copy_into(self.params, self.best_weights or [], "best weights")
        return result

    def _epoch(self) -> str | None:
        """Run one epoch; return a description of a divergence, or ``None``."""
        order = self.rng.permutation(self.X.shape[0])
        vector = self.net.vector
        np.copyto(self.backup, vector)  # the start of the epoch, to replay from if a check fails
        self.optimizer._mark()
        problem, epoch_loss = self._updates(order, vector, every_check=False)
        if problem is None and not _sum_is_finite(vector):
            problem = "a weight is not finite"
        if problem is not None:
            return self._replay(order, problem)
        return self._end_epoch(epoch_loss)

    def _loop_arrays(self) -> None:
        """Make the loop's workspace and shuffled copy of the data, once (a stack needs them only to replay)."""
        if self.work is None:
            self.work = self.net.workspace(min(self.batch_size, self.X.shape[0]))
            self.shuffled = np.empty_like(self.X), np.empty_like(self.y)

    def _replay(self, order: np.ndarray, problem: str) -> str:
        """Rewind to the start of the epoch and redo its updates with every check after every update.

        The weights return to :attr:`backup` and the optimizer to its last
        mark (module docstring); the first failure found is returned with the
        epoch and update it happened in (``problem``, the failure that started
        the replay, if the replay finds none).
        """
        self._loop_arrays()
        vector = self.net.vector
        np.copyto(vector, self.backup)
        self.optimizer._rewind()
        problem = self._updates(order, vector, every_check=True)[0] or problem
        return self._where(problem)

    def _where(self, problem: str) -> str:
        """A divergence found during the epoch's updates, with the epoch and update it happened in.

        A non-finite loss or gradient stops the next update, one that made a
        weight non-finite was the last one counted.
        """
        update = self.optimizer.steps + (0 if problem == _UPDATE_OVERFLOWED else 1)
        return f"in epoch {self.epoch + 1}, update {update}: {problem}"

    def _end_epoch(self, epoch_loss: float) -> str | None:
        """Count the epoch done and record its losses (``epoch_loss``: the running training loss).

        Returns a description of a non-finite loss, or ``None``.
        """
        self.epoch += 1
        if self.exact_training_loss:
            epoch_loss = self.loss.value(self.net.predict(self.X), self.y)
        self.training_loss.append(epoch_loss)
        if not math.isfinite(epoch_loss):
            return f"after epoch {self.epoch}: the training loss is {epoch_loss}"
        if self.validation is not None and self.validation_loss is not None:
            self.validation_loss.append(self.loss.value(self.net.predict(self.validation[0]), self.validation[1]))
            if not math.isfinite(self.validation_loss[-1]):
                return f"after epoch {self.epoch}: the validation loss is {self.validation_loss[-1]}"
        return None

    def _updates(self, order: np.ndarray, vector: np.ndarray, every_check: bool) -> tuple[str | None, float]:
        """The epoch's updates on the rows in ``order``; ``(problem or None, running training loss)``.

        The rows are first copied in that order into the preallocated
        shuffled copy of the data; the mini-batches are slices of it.
        (Gathering each mini-batch's rows separately instead was slower at
        batch 4096 with two BLAS threads; docs/benchmark.md.) Stops at the
        first non-finite mini-batch loss or gradient norm; with
        ``every_check`` also at the first update that makes a weight
        non-finite, restoring the weights from before it.
        """
        total, n, summed = 0.0, order.shape[0], self.loss.sums_over_samples
        work, shuffled = self.work, self.shuffled
        assert work is not None and shuffled is not None
        X, y = shuffled
        np.take(self.X, order, axis=0, out=X, mode="clip")  # a permutation is always in range;
        np.take(self.y, order, axis=0, out=y, mode="clip")  # mode="raise" would copy through a buffer
        grad_vector = work.grad_vector  # the gradients are views of it
        for start in range(0, n, self.batch_size):
            xb, yb = X[start:start + self.batch_size], y[start:start + self.batch_size]
            out, trace = self.net.forward(xb, workspace=work)
            batch_loss = self.loss.value(out, yb)
            if not math.isfinite(batch_loss):
                return f"the mini-batch loss is {batch_loss}", total
            total += batch_loss if summed else batch_loss * xb.shape[0]
            grads, _ = self.net.backward(trace, self.loss.gradient(out, yb), need_input=False)
            if self.l2:
                for g, p, is_weight in zip(grads, self.params, self.is_weight):
                    if is_weight:
                        g += self.l2 * p
            squared_norm = float(np.vdot(grad_vector, grad_vector))
            if not math.isfinite(squared_norm):
                return f"the squared gradient norm is {squared_norm}", total
            if every_check:
                if self.step_backup is None:
                    self.step_backup = np.empty_like(vector)
                np.copyto(self.step_backup, vector)
            self.optimizer.update([vector], [grad_vector])  # every parameter array in one go
            if every_check and not np.isfinite(vector).all():
                np.copyto(vector, self.step_backup)
                return _UPDATE_OVERFLOWED, total
        return None, total if summed else total / n

    def _after_epoch(self) -> str | None:
        if self.validation_loss is not None:
            current = self.validation_loss[-1]
            if self.best_loss is None or current < self.best_loss:
                self.best_epoch, self.best_loss, self.epochs_since_best = self.epoch, current, 0
                _copy_into(self.best_weights or [], self.params, "best weights")
            else:
                self.epochs_since_best += 1
        self._show_progress()
        self._write_checkpoint()
        stop_requested = False
        if self.callback is not None:
            info = EpochInfo(
                epoch=self.epoch,
                epochs=self.epochs,
                training_loss=self.training_loss[-1],
                validation_loss=None if self.validation_loss is None else self.validation_loss[-1],
                best_epoch=self.best_epoch,
                elapsed=time.perf_counter() - self.started,
                capture=self.capture,
            )
            answer = self.callback(info)
            if answer is not None and not isinstance(answer, bool):
                raise TypeError(f"callback must return None, True (stop) or False, got {answer!r}")
            stop_requested = bool(answer)
        return self._stop_reason(stop_requested)

    def _stop_reason(self, stop_requested: bool) -> str | None:
        if self.patience is not None and self.epochs_since_best >= self.patience:
            return STOP_EARLY
        if stop_requested:
            return STOP_CALLBACK
        if self.epoch >= self.epochs:
            return STOP_EPOCHS
        return None

    # ----------------------------------------------------------------- reporting
    def _result(self, reason: str, problem: str | None) -> TrainingResult:
        messages = {
            STOP_EPOCHS: f"completed {self.epoch} of {self.epochs} epochs",
            STOP_EARLY: (
                f"early stopping after epoch {self.epoch}: no lower validation loss for {self.patience} "
                f"epochs; restored the weights of epoch {self.best_epoch}"
            ),
            STOP_CALLBACK: f"the callback stopped training after epoch {self.epoch}",
            STOP_DIVERGED: (
                f"training diverged {problem}; the network holds the last finite weights. "
                f"Lower the learning rate (lr={self.optimizer.lr:g}) or set clip_norm on the optimizer"
            ),
        }
        message = messages[reason]
        if reason == STOP_DIVERGED and self._targets_overflow() is not None:
            message = (f"training diverged {problem}; the network holds the last finite weights. "
                       f"{self._targets_overflow()}")
        if reason == STOP_CALLBACK and self.patience is not None and self.best_epoch is not None:
            message += f"; restored the weights of epoch {self.best_epoch}"
        if reason == STOP_EPOCHS and self.patience is not None and self.best_epoch is not None:
            message += f"; restored the weights of epoch {self.best_epoch} (lowest validation loss)"
        return TrainingResult(
            history=History(
                tuple(self.training_loss), None if self.validation_loss is None else tuple(self.validation_loss)
            ),
            epochs_run=self.epoch,
            stop_reason=reason,
            message=message,
            best_epoch=self.best_epoch,
            best_validation_loss=self.best_loss,
            updates=self.optimizer.steps,
            elapsed=time.perf_counter() - self.started,
            state=self.capture(),
        )

    def _targets_overflow(self) -> str | None:
        """A sentence saying the targets are too large for the loss in this dtype, or ``None``.

        The loss sums squares over a mini-batch: when ``max |y|**2`` times the
        batch's element count exceeds the dtype's largest number, it
        overflows whatever the learning rate.
        """
        largest = float(np.max(np.abs(self.y)))
        limit = float(np.finfo(self.y.dtype).max)
        elements = min(self.batch_size, self.y.shape[0]) * self.y.shape[1]
        if largest * largest * elements <= limit:
            return None
        return (f"The targets are too large for the loss in {self.y.dtype.name}: |y| reaches {largest:.3g}, and the "
                f"sum of squares over a mini-batch overflows (largest {self.y.dtype.name} {limit:.3g}); lowering the "
                "learning rate cannot help: rescale the targets (other units, or divide by a power of ten)")

    def _show_progress(self) -> None:
        if self.progress_line is None:
            return
        elapsed = time.perf_counter() - self.started
        done = self.epoch - self.first_epoch_of_call + 1
        remaining = elapsed / done * (self.epochs - self.epoch)
        validation = None if self.validation_loss is None else self.validation_loss[-1]
        self.progress_line.show(self.epoch, self.epochs, self.training_loss[-1], validation, elapsed, remaining)

    def _finish_progress(self) -> None:
        if self.progress_line is not None:
            self.progress_line.finish()


def _check_validation(validation: Any, net: Network) -> tuple[np.ndarray, np.ndarray] | None:
    if validation is None:
        return None
    if not isinstance(validation, (tuple, list)) or len(validation) != 2:
        raise TypeError(f"validation must be a pair (X_val, y_val) or None, got {type(validation).__name__}")
    X_val = as_samples(validation[0], "validation X", net.n_in, net.dtype)
    y_val = as_targets(validation[1], "validation y", X_val.shape[0], net.n_out, net.dtype)
    return X_val, y_val


def _check_like(targets: list[np.ndarray], sources: list[np.ndarray], what: str) -> None:
    """Raise ``ValueError`` unless ``sources`` match ``targets`` in count, shapes and dtypes and are finite."""
    if len(targets) != len(sources):
        raise ValueError(f"{what}: expected {len(targets)} arrays, got {len(sources)}")
    for i, (t, s) in enumerate(zip(targets, sources)):
        s = np.asarray(s)
        if s.shape != t.shape or s.dtype != t.dtype:
            raise ValueError(
                f"{what}: array {i} must have shape {t.shape} and dtype {t.dtype}, got {s.shape} "
                f"{s.dtype}"
            )
        require_finite(s, f"{what} array {i}")


def _copy_into(targets: list[np.ndarray], sources: list[np.ndarray], what: str) -> None:
    _check_like(targets, sources, what)
    for t, s in zip(targets, sources):
        np.copyto(t, s)


def _data_digest(X: np.ndarray, y: np.ndarray, validation: tuple[np.ndarray, np.ndarray] | None) -> str:
    """SHA-256 over the training and validation arrays (shapes, dtypes and bytes), as the loop sees them."""
    digest = hashlib.sha256()
    for array in (X, y, *(validation or ())):
        digest.update(f"{array.dtype.name}{array.shape};".encode("ascii"))
        digest.update(np.ascontiguousarray(array).data)
    return digest.hexdigest()


def _brief(value: Any) -> str:
    """``repr`` of a setting, a SHA-256 shortened to its first 12 digits."""
    text = repr(value)
    return text[:13] + "...'" if isinstance(value, str) and len(value) == 64 else text
