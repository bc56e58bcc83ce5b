"""Training state and checkpoints: :class:`TrainingState` and its pickle-free file, written atomically.

A checkpoint holds everything :func:`tinyprop.train` needs to continue a run
bit for bit: the weights, the optimizer's state arrays and step count, the
shuffling generator's state, the epoch count, the loss history and the
early-stopping bookkeeping. It uses the same container as model files
(:mod:`tinyprop.archive`: a ZIP of ``.npy`` arrays with a JSON manifest,
SHA-256 per array, written to a temporary file, flushed, fsynced and renamed),
so a crash while writing leaves the previous checkpoint intact.

The manifest is the state's scalar part (:meth:`TrainingState.to_parts`) plus
``"kind": "tinyprop checkpoint"``. Loading recomputes every hash and rebuilds
the state; :func:`tinyprop.train` then checks it against the run it resumes.

>>> import numpy as np, tinyprop as tp, tempfile, os
>>> net = tp.build_mlp([2, 4, 1], seed=0)
>>> X = np.random.default_rng(0).normal(size=(20, 2)); y = X[:, :1] * X[:, 1:]  # synthetic
>>> result = tp.train(net, X, y, loss=tp.MeanSquaredError(), optimizer=tp.Adam(1e-2),
...                   epochs=3, batch_size=8, seed=0)
>>> path = os.path.join(tempfile.mkdtemp(), "run.ckpt")
>>> tp.save_checkpoint(result.state, path)
>>> tp.load_checkpoint(path).epoch
3
"""

from __future__ import annotations

import functools
import hashlib
import math
import os
import re
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._json import canonical_json, sha256_hex
from .archive import ArchiveError, array_bytes, read_archive, write_archive
from .optim import OptimizerState

__all__ = ["TrainingState", "CheckpointError", "save_checkpoint", "load_checkpoint", "network_digest"]

_KIND = "tinyprop checkpoint"
_SHA256 = re.compile(r"[0-9a-f]{64}")


@dataclass
class TrainingState:
    """Everything needed to continue a training run exactly where it stopped.

    ``epoch`` epochs are complete. ``weights`` are copies of ``net.params``;
    ``optimizer`` the optimizer's state; ``rng`` the bit generator state of
    the shuffling generator (JSON-able); ``training_loss`` and
    ``validation_loss`` the history; ``best_epoch``, ``best_loss``,
    ``best_weights`` and ``epochs_since_best`` the early-stopping bookkeeping
    (``None`` without validation data); ``settings`` the run's settings, which
    a resumed run must match (they include ``data_sha256``, a digest of the
    training and validation data); ``network`` the :func:`network_digest` of
    the network holding ``weights``, so a state is only resumed into the
    network (layers, activations, fixed scalings) it came from.

    :meth:`check` refuses a state whose fields contradict each other; saving,
    loading and resuming call it.
    """

    epoch: int
    weights: list[np.ndarray]
    optimizer: OptimizerState
    rng: dict[str, Any]
    training_loss: list[float]
    validation_loss: list[float] | None
    best_epoch: int | None
    best_loss: float | None
    best_weights: list[np.ndarray] | None
    epochs_since_best: int
    settings: dict[str, Any]
    network: str = ""

    def check(self) -> None:
        """Raise ``ValueError`` naming the first field that contradicts the others.

        The rules follow from how :func:`tinyprop.train` keeps the state: one
        training loss per epoch; validation losses exactly when the run has
        validation data, one per epoch; then the best epoch is the first
        epoch with the lowest validation loss, ``best_loss`` is that loss,
        ``epochs_since_best`` counts the epochs after it and ``best_weights``
        are present and shaped like ``weights``; without validation data none
        of these are set.
        """
        if len(self.training_loss) != self.epoch:
            raise ValueError(f"training state has {len(self.training_loss)} training losses for {self.epoch} epochs")
        if not isinstance(self.network, str) or not _SHA256.fullmatch(self.network):
            raise ValueError(
                f"training state network must be a SHA-256 (64 lowercase hex digits), got {self.network!r}"
            )
        has_validation = self.settings.get("n_validation") is not None
        if (self.validation_loss is not None) != has_validation:
            raise ValueError(
                f"training state validation_loss is {'a list' if self.validation_loss is not None else 'None'}, "
                f"but its settings have n_validation {self.settings.get('n_validation')!r}"
            )
        losses = self.validation_loss or []
        if has_validation and len(losses) != self.epoch:
            raise ValueError(f"training state has {len(losses)} validation losses for {self.epoch} epochs")
        if losses:
            best = min(losses)
            expected = (losses.index(best) + 1, best, self.epoch - losses.index(best) - 1)
        else:
            expected = (None, None, 0)
        found = (self.best_epoch, self.best_loss, self.epochs_since_best)
        if found != expected:
            raise ValueError(
                "training state best_epoch, best_loss, epochs_since_best are "
                f"{found[0]!r}, {found[1]!r}, {found[2]!r}; its validation losses give {expected[0]!r}, "
                f"{expected[1]!r}, {expected[2]!r}"
            )
        if (self.best_weights is not None) != (self.best_epoch is not None):
            raise ValueError(
                f"training state best_weights are {'present' if self.best_weights is not None else 'missing'} "
                f"with best_epoch {self.best_epoch!r}"
            )
        if self.best_weights is not None:
            if len(self.best_weights) != len(self.weights):
                raise ValueError(
                    f"training state has {len(self.best_weights)} best_weights for {len(self.weights)} weights"
                )
            for i, (b, w) in enumerate(zip(self.best_weights, self.weights)):
                if np.shape(b) != np.shape(w) or np.asarray(b).dtype != np.asarray(w).dtype:
                    raise ValueError(f"training state best_weights {i} is not shaped like weights {i}")

    def to_parts(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        """Split into ``(scalars, arrays)``: a JSON-able dict and a dict of named arrays.

        Array names: ``"weights/<i>"``, ``"best_weights/<i>"`` and
        ``"optimizer/<slot>/<i>"``. The arrays are the state's own (not copies).
        """
        scalars = {
            "format": "tinyprop training state",
            "version": 2,
            "epoch": self.epoch,
            "n_weights": len(self.weights),
            "optimizer": {
                "kind": self.optimizer.kind,
                "settings": self.optimizer.settings,
                "steps": self.optimizer.steps,
            },
            "rng": self.rng,
            "training_loss": list(self.training_loss),
            "validation_loss": None if self.validation_loss is None else list(self.validation_loss),
            "best_epoch": self.best_epoch,
            "best_loss": self.best_loss,
            "epochs_since_best": self.epochs_since_best,
            "settings": self.settings,
            "network": self.network,
        }
        arrays = {f"weights/{i}": w for i, w in enumerate(self.weights)}
        if self.best_weights is not None:
            arrays.update({f"best_weights/{i}": w for i, w in enumerate(self.best_weights)})
        arrays.update({f"optimizer/{name}": a for name, a in self.optimizer.arrays.items()})
        return scalars, arrays

    @classmethod
    def from_parts(cls, scalars: dict[str, Any], arrays: dict[str, np.ndarray]) -> "TrainingState":
        """Rebuild a state from :meth:`to_parts` output.

        Raises ``ValueError`` naming the first missing, unexpected or
        ill-typed entry. Deeper consistency (shapes against the network,
        settings against the run) is checked when :func:`train` resumes.
        """
        if not isinstance(scalars, dict) or not isinstance(arrays, dict):
            raise TypeError(
                f"scalars and arrays must be dicts, got {type(scalars).__name__} and "
                f"{type(arrays).__name__}"
            )
        try:
            if scalars["format"] != "tinyprop training state" or scalars["version"] != 2:
                raise ValueError(
                    f"not a version-2 tinyprop training state: {scalars['format']!r} {scalars['version']!r} "
                    "(version 1, written before states recorded their network and data, cannot be resumed)"
                )
            n = _whole(scalars["n_weights"], "n_weights")
            weights = [np.asarray(arrays[f"weights/{i}"]) for i in range(n)]
            has_best = "best_weights/0" in arrays
            best = [np.asarray(arrays[f"best_weights/{i}"]) for i in range(n)] if has_best else None
            prefix = "optimizer/"
            optimizer_scalars = _typed(scalars["optimizer"], "optimizer", dict)
            optimizer = OptimizerState(
                kind=_typed(optimizer_scalars["kind"], "optimizer kind", str),
                settings=_typed(optimizer_scalars["settings"], "optimizer settings", dict),
                steps=_whole(optimizer_scalars["steps"], "optimizer steps"),
                arrays={k[len(prefix):]: np.asarray(v) for k, v in arrays.items() if k.startswith(prefix)},
            )
            expected = {f"weights/{i}" for i in range(n)}
            expected |= {f"best_weights/{i}" for i in range(n)} if has_best else set()
            extra = {k for k in arrays if not k.startswith(prefix)} - expected
            if extra:
                raise ValueError(f"unexpected arrays {sorted(extra)}")
            validation = scalars["validation_loss"]
            state = cls(
                epoch=_whole(scalars["epoch"], "epoch"),
                weights=weights,
                optimizer=optimizer,
                rng=_typed(scalars["rng"], "rng", dict),
                training_loss=_losses(scalars["training_loss"], "training_loss"),
                validation_loss=None if validation is None else _losses(validation, "validation_loss"),
                best_epoch=None if scalars["best_epoch"] is None else _whole(scalars["best_epoch"], "best_epoch"),
                best_loss=None if scalars["best_loss"] is None else _losses([scalars["best_loss"]], "best_loss")[0],
                best_weights=best,
                epochs_since_best=_whole(scalars["epochs_since_best"], "epochs_since_best"),
                settings=_typed(scalars["settings"], "settings", dict),
                network=_typed(scalars["network"], "network", str),
            )
        except KeyError as exc:
            raise ValueError(f"training state is missing {exc}") from None
        state.check()
        return state


def network_digest(net: Any, weights: list[np.ndarray] | None = None) -> str:
    """SHA-256 of a network's dtype, layers (class, settings) and parameter arrays.

    ``weights`` stands in for ``net.params`` (the network is not changed).
    Layers are named by their class's module and qualified name, so, unlike
    :func:`tinyprop.modelfile.fingerprint`, this needs no registered names and
    works for every network :func:`tinyprop.train` accepts. Two networks have
    the same digest when they have the same dtype, layer classes, settings
    (activation parameters, fixed scalings) and bit-identical parameters.
    """
    arrays = [np.asarray(p) for p in (net.params if weights is None else weights)]
    layers = [
        {"class": f"{type(layer).__module__}.{type(layer).__qualname__}",
         "settings": layer.settings() if hasattr(layer, "settings") else None}
        for layer in net.layers
    ]
    description = {
        "dtype": _dtype_name(net.dtype),
        "layers": _plain(layers),  # the other entries are plain already
        "params": [[list(a.shape), _dtype_name(a.dtype), hashlib.sha256(array_bytes(a)).hexdigest()] for a in arrays],
    }
    return sha256_hex(canonical_json(description))


@functools.lru_cache(maxsize=None)
def _dtype_name(dtype: np.dtype) -> str:
    """``dtype.name``, remembered: numpy computes it anew, in Python, on every access (about 1.6 us)."""
    return dtype.name


def _plain(value: Any) -> Any:
    """``value`` with every leaf JSON cannot hold (a custom activation's own setting types) replaced by its ``repr``."""
    if value is None or isinstance(value, (str, int)) or (isinstance(value, float) and math.isfinite(value)):
        return value  # the common case first (bool is an int)
    if isinstance(value, dict):
        return {str(key): _plain(item) for key, item in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(item) for item in value]
    return repr(value)


def _whole(value: Any, name: str) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 0:
        raise ValueError(f"training state {name} must be an integer >= 0, got {value!r}")
    return int(value)


def _typed(value: Any, name: str, kind: type) -> Any:
    if not isinstance(value, kind):
        raise ValueError(f"training state {name} must be a {kind.__name__}, got {type(value).__name__}")
    return value


def _losses(values: Any, name: str) -> list[float]:
    if not isinstance(values, list) or not all(
        isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) for v in values
    ):
        raise ValueError(f"training state {name} must be a list of finite numbers, got {values!r}")
    return [float(v) for v in values]


class CheckpointError(ArchiveError):
    """A checkpoint file is unreadable, damaged, tampered with, or not a checkpoint."""


def save_checkpoint(state: TrainingState, path: str | os.PathLike[str]) -> None:
    """Write ``state`` to ``path`` atomically (a previous file there survives any failure)."""
    if not isinstance(state, TrainingState):
        raise TypeError(f"state must be a TrainingState (result.state or info.capture()), got {type(state).__name__}")
    try:
        state.check()
    except ValueError as exc:
        raise CheckpointError(f"{os.fspath(path)}: not a usable training state: {exc}") from None
    scalars, arrays = state.to_parts()
    if any(v is not None and not math.isfinite(v) for v in _all_losses(scalars)):
        raise CheckpointError(f"{os.fspath(path)}: the state holds a non-finite loss; a diverged run cannot be resumed")
    write_archive(path, arrays, {"kind": _KIND, **scalars})


def load_checkpoint(path: str | os.PathLike[str]) -> TrainingState:
    """Read and verify a checkpoint written by :func:`save_checkpoint`."""
    try:
        arrays, manifest = read_archive(path)
    except ArchiveError as exc:
        raise CheckpointError(str(exc)) from None
    where = os.fspath(path)
    if manifest.get("kind") != _KIND:
        raise CheckpointError(f"{where}: not a tinyprop checkpoint (kind {manifest.get('kind')!r})")
    scalars = {k: v for k, v in manifest.items() if k not in ("kind", "arrays")}
    try:
        return TrainingState.from_parts(scalars, arrays)
    except (ValueError, TypeError, KeyError) as exc:
        raise CheckpointError(f"{where}: not a usable training state: {exc}") from None


def _all_losses(scalars: dict[str, Any]) -> list[Any]:
    return [*scalars["training_loss"], *(scalars["validation_loss"] or []), scalars["best_loss"]]

