"""Class labels for networks that decide a state: coding, probabilities, stratified splits.

A classifier in tinyprop is an ordinary :class:`~tinyprop.network.Network`
whose outputs are *logits* ``z`` (it ends in an affine layer), together with
the list of class labels, sorted. How the logits decide is the classifier's
*decision*, given by the number of outputs:

- ``"softmax"``: one logit per class (``K >= 2`` outputs for ``K`` labels).
  The probabilities are the softmax of the logits, computed with each row's
  maximum subtracted so that no exponential overflows:
  ``p_k = exp(z_k - max_j z_j) / sum_i exp(z_i - max_j z_j)``,
  and the decided class is the index of the largest logit (the first one on a
  tie), whose probability is the largest (logits a few ulp apart can round to
  equal probabilities, so decide from the logits, not from rounded
  probabilities). Trained with :class:`~tinyprop.losses.CrossEntropyOnSoftmax`
  on one-hot target rows (:func:`one_hot`).
- ``"sigmoid"``: two labels and ONE output, the log-odds of the *positive*
  class, which is the second label in sorted order (``labels[1]``):
  ``p_1 = sigmoid(z)``, ``p_0 = sigmoid(-z) = 1 - p_1``, each evaluated in the
  two-branch form ``1 / (1 + e)`` or ``e / (1 + e)`` with ``e = exp(-|z|)``,
  so nothing overflows for any finite ``z`` and the small one of the two keeps
  its relative precision. The decided class is 1 when ``z > 0`` and 0
  otherwise (``z = 0``, where ``p_0 = p_1 = 1/2``, decides the first class, as
  a tie does for the softmax). Trained with
  :class:`~tinyprop.losses.CrossEntropyOnSigmoid` on the target column
  ``[label == labels[1]]``. The two-logit softmax on a yes/no column is the
  same model (``softmax(z_0, z_1)_1 = sigmoid(z_1 - z_0)``) with one redundant
  output; the default recipe gives a yes/no column one sigmoid output.

:func:`class_probabilities`, :func:`decided_classes` and
:func:`logit_curvature` apply either decision to a block of logits.
:class:`Classifier` keeps the network and its labels; in a model file the
labels and the decision are stored in the metadata under ``"classes"`` (see
:meth:`Classifier.metadata`), so ``tinyprop predict`` and the exporters find
them again. Model files written before the decision was recorded hold one
logit per class, which is what a missing ``"decision"`` means.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .activations import Sigmoid
from .network import Network

__all__ = [
    "Classifier",
    "class_probabilities",
    "decided_classes",
    "decision_for",
    "encode_labels",
    "logit_curvature",
    "one_hot",
    "softmax",
    "softmax_curvature",
    "stratified_folds",
    "stratified_split",
]


def _logits(z: Any, *, exact: bool = False) -> np.ndarray:
    """``z`` as a 2-D array: floats as they are, other numbers as float64 (kept as they are when ``exact``)."""
    z = np.asarray(z)
    if z.dtype.kind != "f" and not exact:
        z = z.astype(np.float64)
    if z.ndim != 2:
        raise ValueError(f"logits must have shape (n_samples, n_outputs), got shape {z.shape}")
    return z


def softmax(z: Any) -> np.ndarray:
    """Row-wise ``softmax(z)`` with each row's maximum subtracted first (no overflow for finite ``z``).

    >>> softmax([[0.0, 0.0], [1000.0, 0.0]]).round(6).tolist()
    [[0.5, 0.5], [1.0, 0.0]]
    """
    z = _logits(z)
    e = np.exp(z - z.max(axis=1, keepdims=True))
    return e / e.sum(axis=1, keepdims=True)


def softmax_curvature(z: Any) -> np.ndarray:
    """Per row, the Hessian of the cross-entropy ``E = lse(z) - z_c`` with respect to the logits, ``(n, K, K)``.

    ``d2E / dz_k dz_l = p_k [k = l] - p_k p_l``, i.e. ``diag(p) - p p^T`` with
    ``p = softmax(z)``; it does not depend on the class ``c``. Positive
    semi-definite (its null space holds ``(1, ..., 1)``: adding a constant to
    every logit changes nothing).

    >>> softmax_curvature([[0.0, 0.0]]).tolist()
    [[[0.25, -0.25], [-0.25, 0.25]]]
    """
    p = softmax(z)
    return p[:, :, None] * np.eye(p.shape[1]) - p[:, :, None] * p[:, None, :]


DECISIONS = ("softmax", "sigmoid")
_logistic = Sigmoid().value  # the two-branch form, no overflow


def decision_for(n_outputs: int, n_labels: int) -> str:
    """``"sigmoid"`` for one output and two labels, ``"softmax"`` for one output per label; else ``ValueError``.

    >>> decision_for(1, 2), decision_for(3, 3)
    ('sigmoid', 'softmax')
    """
    if n_outputs == 1 and n_labels == 2:
        return "sigmoid"
    if n_outputs == n_labels and n_labels >= 2:
        return "softmax"
    raise ValueError(f"the network has {n_outputs} output{'s' * (n_outputs != 1)} but {n_labels} "
                     f"label{'s' * (n_labels != 1)} were given; a classifier needs one output per label "
                     "(softmax) or one output for two labels (sigmoid)")


def class_probabilities(z: Any) -> np.ndarray:
    """Class probabilities ``(n, K)`` from logits ``(n, K)`` (softmax) or ``(n, 1)`` (sigmoid, ``K = 2``).

    One column: ``[sigmoid(-z), sigmoid(z)]``, both in the two-branch form
    (see the module docstring). Several: :func:`softmax`.

    >>> class_probabilities([[0.0], [800.0], [-800.0]]).tolist()
    [[0.5, 0.5], [0.0, 1.0], [1.0, 0.0]]
    """
    z = _logits(z)
    if z.shape[1] == 1:
        return np.concatenate([_logistic(-z), _logistic(z)], axis=1)
    return softmax(z)


def decided_classes(z: Any) -> np.ndarray:
    """The decided class index of every row: ``z > 0`` for one column (sigmoid), else the largest logit's index.

    Integer logits (the integer code's, aligned in ``int64``) are compared exactly, not converted.

    >>> decided_classes([[0.0], [1e-300], [-2.0]]).tolist(), decided_classes([[1.0, 1.0, 0.0]]).tolist()
    ([0, 1, 0], [0])
    """
    z = _logits(z, exact=True)
    if z.shape[1] == 1:
        return (z[:, 0] > 0).astype(np.intp)
    return np.argmax(z, axis=1)


def logit_curvature(z: Any) -> np.ndarray:
    """Per row, the Hessian of the row's cross-entropy with respect to the logits, ``(n, m, m)``.

    ``m`` logits (``m >= 2``): :func:`softmax_curvature`. One logit (sigmoid):
    ``d2/dz2 [softplus(z) - y z] = p (1 - p)`` with ``p = sigmoid(z)``, for
    every target ``y`` (a class weight ``w`` multiplies it by ``w``).

    >>> logit_curvature([[0.0]]).tolist()
    [[[0.25]]]
    """
    z = _logits(z)
    if z.shape[1] == 1:
        p = _logistic(z)
        return (p * _logistic(-z))[:, :, None]
    return softmax_curvature(z)


def encode_labels(labels: Any) -> tuple[tuple[str, ...], np.ndarray]:
    """``(classes, indices)``: the distinct labels sorted, and each label's index into them.

    Labels are compared as strings (``str(label)``); at least two distinct
    labels are needed.

    >>> encode_labels(["run", "idle", "run", "fault"])
    (('fault', 'idle', 'run'), array([2, 1, 2, 0]))
    """
    if isinstance(labels, (str, bytes)):
        raise TypeError("labels must be a sequence of class labels (one per row), got a single string")
    texts = [str(label) for label in np.asarray(labels, dtype=object).ravel().tolist()]
    if np.ndim(labels) != 1:
        raise ValueError(f"labels must be one-dimensional (one label per row), got shape {np.shape(labels)}")
    classes = tuple(sorted(set(texts)))
    if len(classes) < 2:
        raise ValueError(f"need at least 2 distinct class labels, got {list(classes)}")
    position = {label: k for k, label in enumerate(classes)}
    return classes, np.array([position[t] for t in texts], dtype=np.intp)


def one_hot(indices: Any, n_classes: int, *, weights: Any = None) -> np.ndarray:
    """Target rows ``(n, n_classes)``: row ``i`` is ``weights[indices[i]]`` at column ``indices[i]``, else 0.

    With ``weights`` (one positive number per class) the cross-entropy of row
    ``i`` is multiplied by its class's weight: ``CrossEntropyOnSoftmax`` has
    value ``(1/n) sum_i w_i (lse(z_i) - z_{i,c_i})`` and gradient
    ``w_i (p_i - e_{c_i}) / n`` for such rows.

    >>> one_hot([1, 0], 3).tolist()
    [[0.0, 1.0, 0.0], [1.0, 0.0, 0.0]]
    """
    indices = np.asarray(indices)
    outside = indices.size and (indices.min() < 0 or indices.max() >= n_classes)
    if indices.ndim != 1 or indices.dtype.kind not in "iu" or outside:
        raise ValueError(f"indices must be a 1-D integer array of class indices in [0, {n_classes}), got {indices!r}")
    scale = np.ones(n_classes) if weights is None else np.asarray(weights, dtype=np.float64)
    if scale.shape != (n_classes,) or not np.all(np.isfinite(scale)) or np.any(scale <= 0):
        raise ValueError(f"weights must be {n_classes} finite numbers > 0 (one per class), got {weights!r}")
    rows = np.zeros((indices.size, n_classes))
    rows[np.arange(indices.size), indices] = scale[indices]
    return rows


def stratified_split(indices: Any, fraction: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """``(kept, held)`` row numbers: ``round(fraction * n_c)`` rows of every class ``c`` held out.

    Rows of each class are permuted with ``numpy.random.default_rng(seed)``
    (classes in index order); both results are sorted.
    """
    indices = np.asarray(indices)
    rng = np.random.default_rng(seed)
    held = []
    for c in np.unique(indices):
        rows = rng.permutation(np.flatnonzero(indices == c))
        held.append(rows[: int(round(fraction * rows.size))])
    held_rows = np.sort(np.concatenate(held)) if held else np.array([], dtype=np.intp)
    return np.setdiff1d(np.arange(indices.size), held_rows), held_rows


def stratified_folds(indices: Any, k: int, seed: int) -> list[np.ndarray]:
    """``k`` disjoint sorted sets of row numbers covering all rows, each class dealt round-robin.

    The rows of each class are permuted with ``numpy.random.default_rng(seed)``
    and dealt to folds ``0, 1, ..., k-1, 0, ...``, continuing where the previous
    class stopped, so fold sizes differ by at most one and every class is
    spread evenly.
    """
    indices = np.asarray(indices)
    if k < 2 or k > indices.size:
        raise ValueError(f"k must be between 2 and the number of rows ({indices.size}), got {k}")
    rng = np.random.default_rng(seed)
    folds: list[list[int]] = [[] for _ in range(k)]
    position = 0
    for c in np.unique(indices):
        for row in rng.permutation(np.flatnonzero(indices == c)):
            folds[position % k].append(int(row))
            position += 1
    return [np.array(sorted(fold), dtype=np.intp) for fold in folds]


@dataclass(frozen=True)
class Classifier:
    """A network giving logits, and the class labels in order.

    ``net`` maps inputs ``(n, n_in)`` to logits: one per class (decision
    ``"softmax"``), or one for two labels (``"sigmoid"``: the log-odds of
    ``labels[1]``); see the module docstring.
    """

    net: Network
    labels: tuple[str, ...]
    target: str = "class"

    def __post_init__(self) -> None:
        if not isinstance(self.net, Network):
            raise TypeError(f"net must be a tinyprop Network, got {type(self.net).__name__}")
        labels = tuple(self.labels)
        if len(labels) < 2 or not all(isinstance(label, str) for label in labels) or len(set(labels)) != len(labels):
            raise ValueError(f"labels must be at least 2 distinct strings, got {self.labels!r}")
        decision_for(self.net.n_out, len(labels))
        object.__setattr__(self, "labels", labels)

    @property
    def decision(self) -> str:
        """``"softmax"`` (one logit per class) or ``"sigmoid"`` (one logit for two classes)."""
        return decision_for(self.net.n_out, len(self.labels))

    def logits(self, X: Any) -> np.ndarray:
        """``net.predict(X)``: the logits, ``(n, n_outputs)``."""
        return self.net.predict(X)

    def probabilities(self, X: Any) -> np.ndarray:
        """Class probabilities ``(n, n_classes)`` (:func:`class_probabilities`); every row sums to 1."""
        return class_probabilities(self.logits(X))

    def predict_indices(self, X: Any) -> np.ndarray:
        """The decided class of every row (:func:`decided_classes`): largest logit (first on a tie), or ``z > 0``."""
        return decided_classes(self.logits(X))

    def predict_labels(self, X: Any) -> np.ndarray:
        """The decided class of every row as its label (an array of strings)."""
        return np.asarray(self.labels)[self.predict_indices(X)]

    def metadata(self) -> dict[str, Any]:
        """What a model file keeps so that the labels come back: ``{"classes": {...}}``.

        ``{"classes": {"target": ..., "labels": [...], "decision": "softmax" or "sigmoid"}}``;
        merge it into the ``metadata`` of :func:`~tinyprop.modelfile.save`;
        :meth:`from_metadata` reads it back.
        """
        return {"classes": {"target": self.target, "labels": list(self.labels), "decision": self.decision}}

    @classmethod
    def from_metadata(cls, net: Network, metadata: Mapping[str, Any]) -> "Classifier":
        """The classifier described by a model file's ``metadata`` (``ValueError`` if it holds no labels).

        A recorded ``"decision"`` must be the one the network's outputs give; files without one
        (written before it was recorded) hold one logit per class.
        """
        entry = metadata.get("classes") if isinstance(metadata, Mapping) else None
        if not isinstance(entry, Mapping) or not isinstance(entry.get("labels"), Sequence):
            raise ValueError("the model file holds no class labels (metadata 'classes'); it is not a classifier")
        check_decision(entry, net.n_out)
        return cls(net, tuple(entry["labels"]), str(entry.get("target", "class")))


def class_entry(metadata: Any) -> Mapping[str, Any] | None:
    """The ``"classes"`` entry of a model's metadata, or ``None`` for a regression model."""
    entry = metadata.get("classes") if isinstance(metadata, Mapping) else None
    return entry if isinstance(entry, Mapping) else None


def check_decision(entry: Mapping[str, Any], n_outputs: int) -> str:
    """The decision of a ``"classes"`` entry for a network with ``n_outputs`` (``ValueError`` if inconsistent)."""
    labels = entry.get("labels")
    n_labels = len(labels) if isinstance(labels, Sequence) and not isinstance(labels, str) else 0
    decision = decision_for(n_outputs, n_labels)
    recorded = entry.get("decision", "softmax")
    if recorded != decision:
        raise ValueError(f"the model file records the class decision {recorded!r}, but its network has "
                         f"{n_outputs} output{'s' * (n_outputs != 1)} for {n_labels} labels ({decision!r})")
    return decision
