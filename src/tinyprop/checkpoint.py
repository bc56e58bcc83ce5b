"""Training checkpoints: a :class:`~tinyprop.TrainingState` in a pickle-free file, written atomically.

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
>>> tp.save_checkpoint(path, result.state)
>>> tp.load_checkpoint(path).epoch
3
"""

from __future__ import annotations

import os
from typing import Any

from .archive import ArchiveError, read_archive, write_archive
from .train import TrainingState

__all__ = ["CheckpointError", "save_checkpoint", "load_checkpoint"]

_KIND = "tinyprop checkpoint"


class CheckpointError(ArchiveError):
    """A checkpoint file is unreadable, damaged, tampered with, or not a checkpoint."""


def save_checkpoint(path: str | os.PathLike[str], state: TrainingState) -> None:
    """Write ``state`` to ``path`` atomically (a previous file there survives any failure)."""
    if not isinstance(state, TrainingState):
        raise TypeError(f"state must be a TrainingState (result.state or info.capture()), got {type(state).__name__}")
    scalars, arrays = state.to_parts()
    if any(v is not None and not _finite(v) for v in _losses(scalars)):
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


def _losses(scalars: dict[str, Any]) -> list[Any]:
    return [*scalars["training_loss"], *(scalars["validation_loss"] or []), scalars["best_loss"]]


def _finite(value: Any) -> bool:
    return isinstance(value, (int, float)) and value == value and abs(value) != float("inf")
