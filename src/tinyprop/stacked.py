"""Many networks of one architecture trained together, in stacked arrays.

:func:`train_stacked` trains ``K`` networks with the same layers (widths,
activations, dtype) at once: each keeps its own initial weights, its own
shuffling seed and its own optimizer (the same kind and settings, except the
learning rate ``lr`` and Adam's ``decoupled_decay``, which may differ), and
sees the same training rows (or its own rows of the same shape). Every array
of the computation gets a leading axis of length ``K``: the parameters of all
networks are one ``(K, n_params)`` array, a batch is ``(K, rows, n_in)``, and
each product is one ``np.matmul`` over the stack, which multiplies the ``K``
pairs of matrices one after the other inside numpy. What is saved is the
Python work per step (one call instead of ``K``), which dominates for small
networks.

**Same result as training alone.** Network ``k`` ends exactly as
``tp.train(nets[k], X, y, optimizer=optimizers[k], seed=seeds[k], ...)``
with the other arguments alike would leave it: the same weights, history,
stop reason, best epoch, optimizer state and ``TrainingResult`` (apart from
``elapsed``). This holds bit for bit because every operation is the one
:func:`~tinyprop.train` performs, applied to the network's slice of the stack:

- ``np.matmul`` on stacked arrays runs the same BLAS call (``gemm``, or
  ``gemv`` for the bias gradient ``1^T delta``) on each slice that the
  single network runs on its matrices, with the same shapes and memory
  layout; each ``(K, 1, m) @ (K, m, 1)`` product is the dot product
  ``np.vdot`` that gives the mean-squared-error value and the squared
  gradient norm. One exception, for speed: ``x W^T`` is taken with a
  contiguous copy of ``W^T`` instead of the transposed view, but only for
  the shapes where a probe of this machine's BLAS gives the view's bits
  (see ``_transposed_copy_agrees``);
- elementwise operations (bias addition, activations and their derivatives,
  the loss gradient, the optimizer's passes) compute each element alone;
- a learning rate or decay that differs between networks enters as a column
  of per-network scalars, computed in float64 from the same Python
  expressions the optimizer evaluates and rounded to the parameters' dtype,
  exactly as numpy rounds a Python float scalar; a network whose decay is
  zero is multiplied by exactly 1.

The assumption behind "bit for bit" is a BLAS whose result for a matrix
product depends only on the operands, their shapes and layout (true of
OpenBLAS and MKL with a fixed thread count); the tests check it on the
machine that runs them.

What a stack cannot do (use :func:`~tinyprop.train` for these): per-network
``clip_norm`` (the clipping norm is per network, so it is refused),
optimizer subclasses other than the built-in ``SGD``, ``RMSProp`` and
``Adam``, optimizers that already hold state, ``callback``, ``progress``,
``checkpoint`` and ``resume``.

**Early stopping and divergence** work per network as in :func:`~tinyprop.train`:
a network that stops (patience exhausted, or a non-finite loss, gradient or
weight) leaves the stack with its result, and the others continue without
it. A diverged network's result has ``stop_reason == "diverged"`` and the
message :class:`~tinyprop.train.TrainingDiverged` would carry;
:func:`train_stacked` does not raise for it.

>>> import numpy as np, tinyprop as tp
>>> rng = np.random.default_rng(0)
>>> X = rng.uniform(-1, 1, (64, 2)); y = np.sin(X[:, :1]) * X[:, 1:]  # synthetic
>>> nets = [tp.build_mlp([2, 8, 1], seed=s) for s in range(3)]
>>> results = tp.train_stacked(nets, X, y, loss=tp.MeanSquaredError(),
...                            optimizers=[tp.Adam(lr) for lr in (1e-3, 3e-3, 1e-2)],
...                            epochs=5, batch_size=16, seeds=[0, 1, 2])
>>> alone = tp.build_mlp([2, 8, 1], seed=1)
>>> _ = tp.train(alone, X, y, loss=tp.MeanSquaredError(), optimizer=tp.Adam(3e-3),
...              epochs=5, batch_size=16, seed=1)
>>> bool(np.array_equal(alone.get_vector(), nets[1].get_vector()))
True
"""

from __future__ import annotations

import copy
import functools
from typing import Any, Sequence

import numpy as np

from ._validate import _sum_is_finite, as_samples, as_targets
from .layers import Affine
from .losses import Loss, MeanSquaredError, SquaredError
from .network import _ACTIVATION_IN_PLACE, _AFFINE, _SCALING, Network
from .optim import SGD, Adam, Optimizer, RMSProp
from .train import STOP_DIVERGED, TRAINING_LOSS_RUNNING, TrainingResult, _Run

__all__ = ["train_stacked"]

_STACKABLE = (SGD, RMSProp, Adam)
_PER_NETWORK = ("lr", "decoupled_decay")  # optimizer settings that may differ within a stack


def train_stacked(
    nets: Sequence[Network],
    X: Any,
    y: Any,
    *,
    loss: Loss,
    optimizers: Sequence[Optimizer],
    epochs: int,
    batch_size: int,
    seeds: Sequence[int | None],
    validation: tuple[Any, Any] | None = None,
    patience: int | None = None,
    l2: float = 0.0,
    training_loss: str = TRAINING_LOSS_RUNNING,
) -> list[TrainingResult]:
    """Train every network of ``nets`` in place, together; one :class:`~tinyprop.train.TrainingResult` each.

    Parameters
    ----------
    nets:
        ``K >= 1`` distinct networks with the same layers (kinds, widths,
        activations and their settings, dtype); scaling layers may hold
        different scalings.
    X, y:
        The training rows, as for :func:`~tinyprop.train`: ``X`` ``(n, n_in)``
        and ``y`` ``(n, n_out)`` (or ``(n,)``) shared by all networks, or
        per-network rows as ``X`` ``(K, n, n_in)`` with ``y`` ``(K, n, n_out)``
        (or ``(K, n)``). The caller's arrays are not modified.
    loss:
        One :class:`~tinyprop.losses.Loss` for all networks.
    optimizers:
        ``K`` distinct, unused optimizers of one built-in kind (``SGD``,
        ``RMSProp``, ``Adam``) with equal settings apart from ``lr`` and
        ``decoupled_decay``; without ``clip_norm``. Each ends holding the
        state its network reached, as after :func:`~tinyprop.train`.
    seeds:
        ``K`` shuffling seeds (integers >= 0 or ``None``), one per network.
    epochs, batch_size, patience, l2, training_loss:
        As for :func:`~tinyprop.train`, the same for every network.
    validation:
        ``None`` or ``(X_val, y_val)``, shared (2-D ``X_val``) or per network
        (``X_val`` ``(K, m, n_in)``, ``y_val`` ``(K, m, n_out)`` or ``(K, m)``).

    Returns
    -------
    list of TrainingResult
        In the order of ``nets``; equal to what :func:`~tinyprop.train` returns
        for each network alone (``elapsed`` is the time of the whole call). A
        diverged network's result has ``stop_reason == "diverged"``.
    """
    K = _count(nets, optimizers, seeds)
    _check_same_layers(nets)
    _check_optimizers(optimizers)
    Xs, ys = _per_network_data(X, y, "", K, nets[0])
    validations: list[Any] = [None] * K
    if validation is not None:
        if not isinstance(validation, (tuple, list)) or len(validation) != 2:
            raise TypeError(f"validation must be a pair (X_val, y_val) or None, got {type(validation).__name__}")
        validations = list(zip(*_per_network_data(validation[0], validation[1], "validation ", K, nets[0])))
    digests: dict[tuple[int, ...], str] = {}  # shared data are hashed once, not once per network
    runs = []
    for net, Xk, yk, opt, val, seed in zip(nets, Xs, ys, optimizers, validations, seeds):
        key = (id(Xk), id(yk)) + (() if val is None else (id(val[0]), id(val[1])))
        run = _Run(net, Xk, yk, loss, opt, epochs, batch_size, val, patience, seed, False, l2, None, training_loss,
                   digests.get(key))
        digests[key] = run.settings["data_sha256"]
        runs.append(run)
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        return _Stacked(runs, optimizers).execute()


class _Stacked:
    """The loop of :func:`train_stacked`: the active networks' arrays with a leading network axis."""

    def __init__(self, runs: list[_Run], optimizers: Sequence[Optimizer]) -> None:
        self.runs = runs
        self.active = list(range(len(runs)))  # indices into runs of the networks still in the stack
        self.results: list[TrainingResult | None] = [None] * len(runs)
        first = runs[0]
        self.net, self.loss, self.l2 = first.net, first.loss, first.l2
        self.batch_size, self.n = first.batch_size, first.X.shape[0]
        self.summed = self.loss.sums_over_samples
        self.steps = first.net._steps
        self.affine = [i for i, (kind, _) in enumerate(self.steps) if kind is _AFFINE]
        self.theta = np.stack([run.net.vector for run in runs])  # (K, n_params), rows in net.vector order
        self.shuffled = np.stack([run.X for run in runs]), np.stack([run.y for run in runs])  # refilled every epoch
        self.scalings = {
            i: (np.stack([run.net.layers[i].gain for run in runs])[:, None, :],
                np.stack([run.net.layers[i].offset for run in runs])[:, None, :])
            for i, (kind, _) in enumerate(self.steps) if kind is _SCALING
        }
        self.optimizer = _stacked_optimizer(optimizers, first.net.dtype)
        self.backup = np.empty_like(self.theta)  # the weights at the start of the epoch, to replay a network from
        self.orders = np.empty((len(runs), self.n), dtype=np.intp)  # each network's order of the rows this epoch
        self._arrange()

    # ----------------------------------------------------------------- arrays
    def _arrange(self) -> None:
        """(Re)build every array that depends on the number of networks in the stack."""
        K, dtype = self.theta.shape[0], self.theta.dtype
        self.grad = np.empty_like(self.theta)
        self.weights, self.biases, self.grad_weights, self.grad_biases = {}, {}, {}, {}
        self.transposed: dict[int, np.ndarray] = {}  # affine layer -> contiguous (K, n_in, n_out) copy of W^T
        start = 0
        for i in self.affine:
            layer = self.steps[i][1]
            size = layer.n_out * layer.n_in
            self.weights[i] = self.theta[:, start:start + size].reshape(K, layer.n_out, layer.n_in, copy=False)
            if layer.n_in > 1 and layer.n_out > 1:  # otherwise W^T has the layout of its copy, or the product is
                self.transposed[i] = np.empty((K, layer.n_in, layer.n_out), dtype)  # elementwise (_matmul)
            self.grad_weights[i] = self.grad[:, start:start + size].reshape(K, layer.n_out, layer.n_in, copy=False)
            start += size
            if layer.bias is not None:
                self.biases[i] = self.theta[:, start:start + layer.n_out].reshape(K, 1, layer.n_out, copy=False)
                self.grad_biases[i] = self.grad[:, start:start + layer.n_out]
                start += layer.n_out
        self.buffers: dict[int, _Buffers] = {}
        self.dtype = dtype

    def _buffers(self, rows: int) -> _Buffers:
        """The arrays of a batch of ``rows`` rows, and which layers multiply by the contiguous ``W^T``."""
        if rows not in self.buffers:
            K = self.theta.shape[0]
            layers = {i: self.steps[i][1] for i in self.affine}
            self.buffers[rows] = (
                {i: np.empty((K, rows, layer.n_out), self.dtype) for i, layer in layers.items()},
                {i: np.empty((K, rows, layer.n_in), self.dtype) for i, layer in layers.items()},
                np.ones(rows, self.dtype),
                [i for i in self.transposed
                 if _transposed_copy_agrees(rows, layers[i].n_in, layers[i].n_out, self.dtype.str)],
            )
        return self.buffers[rows]

    def _keep(self, keep: np.ndarray) -> None:
        """Drop the networks whose entry of ``keep`` is False from every stacked array."""
        self.active = [k for k, kept in zip(self.active, keep) if kept]
        self.theta, self.backup, self.orders = self.theta[keep], self.backup[keep], self.orders[keep]
        self.shuffled = self.shuffled[0][keep], self.shuffled[1][keep]
        self.scalings = {i: (gain[keep], offset[keep]) for i, (gain, offset) in self.scalings.items()}
        _keep_optimizer_rows(self.optimizer, keep)
        self._arrange()

    # ----------------------------------------------------------------- passes
    def _forward(self, x: np.ndarray) -> list[np.ndarray]:
        """Every layer's input and the output, as :meth:`Network.forward` with a workspace computes them."""
        outputs, _, _, contiguous = self._buffers(x.shape[1])
        for i in contiguous:
            np.copyto(self.transposed[i], self.weights[i].transpose(0, 2, 1))
        values, v = [x], x
        for i, (kind, layer) in enumerate(self.steps):
            if kind is _AFFINE:
                w_t = self.transposed[i] if i in contiguous else self.weights[i].transpose(0, 2, 1)
                v = _matmul(v, w_t, outputs[i])  # x W^T
                if i in self.biases:
                    v += self.biases[i]
            elif kind is _ACTIVATION_IN_PLACE:
                v = layer._value_in_place(v)
            elif kind is _SCALING:
                gain, offset = self.scalings[i]
                v = v * gain + offset
            else:
                v = layer.value(v)
            values.append(v)
        return values

    def _backward(self, values: list[np.ndarray], delta: np.ndarray) -> None:
        """The delta recursion of :meth:`Network.backward` (``need_input=False``) into ``self.grad``."""
        _, scratch, ones, _ = self._buffers(delta.shape[1])
        for i, kind, layer in self.net._backward_steps:
            if kind is _AFFINE:
                _matmul(delta.transpose(0, 2, 1), values[i], self.grad_weights[i])  # delta^T x
                if i in self.grad_biases:
                    np.matmul(ones, delta, out=self.grad_biases[i])  # 1^T delta
                if i == self.affine[0]:
                    return
                delta = _matmul(delta, self.weights[i], scratch[i])  # delta W
            elif kind is _ACTIVATION_IN_PLACE:
                a = values[i + 1]
                layer._delta_in_place(a, delta)  # f'(z) * delta, into a's memory
                delta = a
            elif kind is _SCALING:
                delta = delta * self.scalings[i][0]
            else:
                delta = delta * layer.derivative(values[i], values[i + 1])

    def _loss(self, out: np.ndarray, target: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Per-network loss values (float64) and the stacked loss gradient, as the loss computes them."""
        K, rows = out.shape[0], out.shape[1]
        kind = type(self.loss)
        if kind is MeanSquaredError or kind is SquaredError:
            r = np.subtract(out, target)
            flat = r.reshape(K, 1, -1)
            sums = np.matmul(flat, flat.transpose(0, 2, 1)).reshape(K).astype(np.float64)  # np.vdot(r, r)
            if kind is SquaredError:
                return 0.5 * sums, r
            r *= 2.0 / rows
            return sums / rows, r
        values = np.array([self.loss.value(out[k], target[k]) for k in range(K)], dtype=np.float64)
        return values, np.stack([self.loss.gradient(out[k], target[k]) for k in range(K)])

    # ----------------------------------------------------------------- the loop
    def execute(self) -> list[TrainingResult]:
        while self.active:
            totals = self._epoch()
            if totals is None:
                continue  # every network of the stack diverged in this epoch
            epoch_losses = totals if self.summed else totals / self.n
            keep = np.ones(len(self.active), dtype=bool)
            for row, k in enumerate(self.active):
                run = self.runs[k]
                run.net.vector[...] = self.theta[row]
                problem = run._end_epoch(float(epoch_losses[row]))
                reason = STOP_DIVERGED if problem is not None else run._after_epoch()
                if reason is not None:
                    self._hand_over(row)
                    self.results[k] = run._finish(reason, problem)
                    keep[row] = False
            if not keep.all():
                self._keep(keep)
        return [result for result in self.results if result is not None]

    def _epoch(self) -> np.ndarray | None:
        """One epoch of every network in the stack; the running loss totals, or ``None`` if none is left."""
        X, y = self.shuffled
        self.orders = orders = np.stack([self.runs[k].rng.permutation(self.n) for k in self.active])
        sources = [(self.runs[k].X, self.runs[k].y) for k in self.active]
        if all(X_k is sources[0][0] and y_k is sources[0][1] for X_k, y_k in sources):
            np.take(sources[0][0], orders, axis=0, out=X, mode="clip")  # shared rows: one gather for the stack
            np.take(sources[0][1], orders, axis=0, out=y, mode="clip")
        else:
            for row, (X_k, y_k) in enumerate(sources):
                np.take(X_k, orders[row], axis=0, out=X[row], mode="clip")
                np.take(y_k, orders[row], axis=0, out=y[row], mode="clip")
        np.copyto(self.backup, self.theta)  # as train does: weights checked once per epoch, replayed on a failure
        self.optimizer._mark()
        totals = np.zeros(len(self.active))
        start = 0
        while start < self.n:
            kept = self._update(start, totals)
            if kept is not None:  # some networks left the stack; the others redo the step
                totals = totals[kept]
                if not self.active:
                    return None
                continue
            start += self.batch_size
        if not _sum_is_finite(self.theta):
            bad = ~np.isfinite(self.theta).all(axis=1)
            if bad.any():
                totals = totals[self._diverged(bad, ["a weight is not finite"] * len(bad))]
        return totals if self.active else None

    def _update(self, start: int, totals: np.ndarray) -> np.ndarray | None:
        """One mini-batch step of every network: ``None``, or the rows kept when some failed a check (no step made)."""
        X, y = self.shuffled
        xb, yb = X[:, start:start + self.batch_size], y[:, start:start + self.batch_size]
        values = self._forward(xb)
        losses, gradient = self._loss(values[-1], yb)
        bad = ~np.isfinite(losses)
        if bad.any():
            return self._diverged(bad, [f"the mini-batch loss is {v}" for v in losses])
        self._backward(values, gradient)
        if self.l2:
            for i in self.affine:
                self.grad_weights[i] += self.l2 * self.weights[i]
        flat = self.grad.reshape(self.grad.shape[0], 1, -1)
        squared = np.matmul(flat, flat.transpose(0, 2, 1)).reshape(-1).astype(np.float64)  # np.vdot(g, g)
        bad = ~np.isfinite(squared)
        if bad.any():
            return self._diverged(bad, [f"the squared gradient norm is {v}" for v in squared])
        totals += losses if self.summed else losses * xb.shape[1]
        self.optimizer.update([self.theta], [self.grad])
        return None

    def _diverged(self, bad: np.ndarray, problems: list[str]) -> np.ndarray:
        """Finish the networks marked in ``bad`` as diverged and drop them; return the rows kept.

        Each network's epoch is replayed alone by :func:`~tinyprop.train`'s
        loop, from the weights and optimizer state at the start of the epoch,
        with every check after every update: a failed check may be the
        symptom of a weight made non-finite by an earlier update, and the
        replay finds that first failure and the last finite weights, as
        :func:`~tinyprop.train` does.
        """
        for row in np.flatnonzero(bad):
            run = self.runs[self.active[row]]
            np.copyto(run.backup, self.backup[row])
            self._hand_over(int(row), self.optimizer._marked)
            run.optimizer._mark()
            self.results[self.active[row]] = run._finish(STOP_DIVERGED, run._replay(self.orders[row], problems[row]))
        keep = ~bad
        self._keep(keep)
        return keep

    def _hand_over(self, row: int, state: tuple[int, dict[str, list[np.ndarray]] | None] | None = None) -> None:
        """Give the optimizer of the network in ``row`` the state it reached in the stack (or ``state``, marked)."""
        optimizer = self.optimizer
        if state is None:
            state = optimizer.steps, (None if optimizer._layout is None else optimizer._slots)
        steps, slots = state
        if slots is None:  # no update made yet
            self.runs[self.active[row]].optimizer._take_state(steps, None, {})
            return
        layout = [((self.theta.shape[1],), self.theta.dtype)]
        rows = {name: [slot[0][row].copy()] for name, slot in slots.items()}
        self.runs[self.active[row]].optimizer._take_state(steps, layout, rows)


# Per affine layer: the (K, rows, n_out) outputs, the (K, rows, n_in) deltas handed down,
# a vector of rows ones (bias gradients), and the layers whose x W^T uses the contiguous copy.
_Buffers = tuple[dict[int, np.ndarray], dict[int, np.ndarray], np.ndarray, list[int]]


@functools.lru_cache(maxsize=256)
def _transposed_copy_agrees(rows: int, n_in: int, n_out: int, dtype: str) -> bool:
    """Whether the stack may multiply by a contiguous copy of ``W^T`` for this shape: same bits as ``W.T``.

    :meth:`Network.forward` multiplies ``x`` by the transposed view ``W.T``;
    the stack multiplies each slice by a contiguous copy of ``W^T`` instead
    (refreshed before every forward pass, which costs one copy of the
    weights), because OpenBLAS multiplies that layout two to three times
    faster for these small stacked matrices. The two are different BLAS calls
    (a transposed operand or not), and nothing promises that their kernels add
    the products in the same order. On OpenBLAS they do for many shapes and
    not for others (33 -> 17 at 32 rows, float32, for one), and for a single
    row, where numpy calls the matrix-vector routine, the order even depends
    on how the arrays happen to be aligned in memory. So the stack uses the
    copy only for two rows or more, and only for shapes where this probe, on
    this machine's BLAS, gives every bit of the single network's product: the
    rounding of each element depends on the order of the operations, not on
    the values multiplied, so random operands reveal a different order.
    """
    if rows < 2:
        return False
    rng = np.random.default_rng(0)
    x = rng.standard_normal((2, rows, n_in)).astype(dtype)
    w = rng.standard_normal((2, n_out, n_in)).astype(dtype)
    stacked = np.matmul(x, np.ascontiguousarray(w.transpose(0, 2, 1)))
    return all(np.matmul(x[k], w[k].T).tobytes() == stacked[k].tobytes() for k in range(2))


def _matmul(a: np.ndarray, b: np.ndarray, out: np.ndarray) -> np.ndarray:
    """``a @ b`` for every network of the stack, into ``out``.

    A product over an inner dimension of 1 (a layer of one unit, one input,
    or a batch of one row) is an outer product: every element is one
    multiplication, ``0 + a_i b_j``, which the elementwise product gives
    exactly (adding ``+0.0`` turns a ``-0.0`` into the ``+0.0`` the matrix
    product returns). ``np.matmul`` takes about a microsecond per network
    for these; the elementwise product serves the whole stack at once.
    """
    if a.shape[-1] == 1:
        np.multiply(a, b, out=out)
        out += 0.0
        return out
    return np.matmul(a, b, out=out)


# ---------------------------------------------------------------- optimizers
class _PerNetwork:
    """Optimizer scalars that differ between the networks of a stack, as a ``(K, 1)`` column.

    Arithmetic with Python floats happens in float64, element by element, as
    the single optimizer evaluates the same expression in Python floats; when
    the column meets an array it is rounded to the parameters' dtype, as numpy
    rounds a Python float scalar (so a float32 stack multiplies in float32).
    """

    def __init__(self, values: Any, dtype: np.dtype) -> None:
        self.values = np.asarray(values, dtype=np.float64).reshape(-1, 1)
        self.dtype = dtype

    def _new(self, values: np.ndarray) -> "_PerNetwork":
        return _PerNetwork(values, self.dtype)

    def __mul__(self, other: float) -> "_PerNetwork":
        return self._new(self.values * other)

    def __rmul__(self, other: float) -> "_PerNetwork":
        return self._new(other * self.values)

    def __truediv__(self, other: float) -> "_PerNetwork":
        return self._new(self.values / other)

    def __rsub__(self, other: float) -> "_PerNetwork":
        return self._new(other - self.values)

    def __bool__(self) -> bool:
        return bool(np.any(self.values))

    def __array__(self, dtype: Any = None, copy: Any = None) -> np.ndarray:
        return self.values.astype(self.dtype if dtype is None else dtype)


def _stacked_optimizer(optimizers: Sequence[Optimizer], dtype: np.dtype) -> Optimizer:
    """One optimizer of the common kind whose per-network settings are :class:`_PerNetwork` columns."""
    stacked = copy.deepcopy(optimizers[0])
    for name in _PER_NETWORK:
        if hasattr(stacked, name):
            setattr(stacked, name, _PerNetwork([getattr(o, name) for o in optimizers], dtype))
    return stacked


def _keep_optimizer_rows(optimizer: Optimizer, keep: np.ndarray) -> None:
    for name in _PER_NETWORK:
        column = getattr(optimizer, name, None)
        if isinstance(column, _PerNetwork):
            setattr(optimizer, name, column._new(column.values[keep]))
    steps, marked = getattr(optimizer, "_marked", (0, None))
    if marked is not None:  # the state at the start of the epoch, for replays
        optimizer._marked = steps, {name: [a[keep] for a in slot] for name, slot in marked.items()}
    if optimizer._layout is not None:
        optimizer._slots = {name: [a[keep] for a in slot] for name, slot in optimizer._slots.items()}
        optimizer._layout = [((int(keep.sum()), *shape[1:]), dtype) for shape, dtype in optimizer._layout]
        optimizer._allocate_buffers()


# ---------------------------------------------------------------- checks
def _count(nets: Any, optimizers: Any, seeds: Any) -> int:
    for name, value in (("nets", nets), ("optimizers", optimizers), ("seeds", seeds)):
        if not isinstance(value, (list, tuple)):
            raise TypeError(f"{name} must be a list with one entry per network, got {type(value).__name__}")
    K = len(nets)
    if K == 0:
        raise ValueError("nets is empty; train_stacked needs at least one network")
    if len(optimizers) != K or len(seeds) != K:
        raise ValueError(
            f"need one optimizer and one seed per network: {K} nets, {len(optimizers)} optimizers, {len(seeds)} seeds"
        )
    for name, value in (("nets", nets), ("optimizers", optimizers)):
        if len({id(v) for v in value}) != K:
            raise ValueError(f"{name} must be {K} distinct objects (the same object appears twice)")
    return K


def _architecture(net: Network) -> list[Any]:
    described: list[Any] = [net.dtype]
    for layer in net.layers:
        if isinstance(layer, Affine):
            described.append(("affine", layer.n_in, layer.n_out, layer.bias is not None))
        elif hasattr(layer, "gain"):
            described.append((type(layer), layer.width))
        else:
            described.append(layer)  # activations compare by class and settings
    return described


def _check_same_layers(nets: Sequence[Network]) -> None:
    for k, net in enumerate(nets):
        if not isinstance(net, Network):
            raise TypeError(f"nets[{k}] must be a tinyprop Network, got {type(net).__name__}")
    reference = _architecture(nets[0])
    for k, net in enumerate(nets[1:], start=1):
        if _architecture(net) != reference:
            raise ValueError(f"nets[{k}] ({net!r}) does not have the layers and dtype of nets[0] ({nets[0]!r})")


def _check_optimizers(optimizers: Sequence[Optimizer]) -> None:
    first = optimizers[0]
    for k, opt in enumerate(optimizers):
        if type(opt) not in _STACKABLE:
            raise TypeError(
                f"optimizers[{k}] must be a tinyprop SGD, RMSProp or Adam (not a subclass), got {type(opt).__name__}"
            )
        if type(opt) is not type(first):
            raise ValueError(
                f"every optimizer must be of one kind: optimizers[0] is {type(first).__name__}, "
                f"optimizers[{k}] {type(opt).__name__}"
            )
        if opt.steps != 0 or opt._layout is not None:
            raise ValueError(
                f"optimizers[{k}] has already made {opt.steps} updates; train_stacked needs new optimizers"
            )
        if opt.clip_norm is not None:
            raise ValueError(
                f"optimizers[{k}] has clip_norm={opt.clip_norm}; train_stacked cannot clip per network, use train"
            )
        shared = {key: v for key, v in opt.settings().items() if key not in _PER_NETWORK}
        expected = {key: v for key, v in first.settings().items() if key not in _PER_NETWORK}
        if shared != expected:
            raise ValueError(
                f"optimizers[{k}] has settings {shared}, optimizers[0] {expected}; only {list(_PER_NETWORK)} may differ"
            )


def _per_network_data(X: Any, y: Any, label: str, K: int, net: Network) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """``K`` sample and target matrices: a 3-D ``X`` gives one block per network, a 2-D one is shared."""
    n_in, n_out, dtype = net.n_in, net.n_out, net.dtype
    if not (isinstance(X, np.ndarray) and X.ndim == 3):
        shared = as_samples(X, f"{label}X", n_in, dtype)
        return [shared] * K, [as_targets(y, f"{label}y", shared.shape[0], n_out, dtype)] * K
    if X.shape[0] != K:
        raise ValueError(f"{label}X with one block of rows per network must have shape ({K}, n, {n_in}), got {X.shape}")
    y = np.asarray(y)
    if y.ndim not in (2, 3) or y.shape[:2] != X.shape[:2]:
        raise ValueError(
            f"{label}y must have shape ({K}, {X.shape[1]}, {n_out}) (or ({K}, {X.shape[1]}) for one output) "
            f"like the per-network {label}X, got {y.shape}"
        )
    Xs = [as_samples(X[k], f"{label}X[{k}]", n_in, dtype) for k in range(K)]
    return Xs, [as_targets(y[k], f"{label}y[{k}]", X.shape[1], n_out, dtype) for k in range(K)]
