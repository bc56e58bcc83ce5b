"""How well a classifier decides: accuracy, confusion matrix, per-class precision and recall,
log loss, Brier score and a calibration table.

For ``n`` rows with true classes ``c_i`` and predicted probabilities ``p_ik``
(rows summing to 1) over ``K`` classes, and decided classes
``d_i = argmax_k p_ik``:

- ``accuracy = (1/n) #{i : d_i = c_i}``; ``errors = n - #{i : d_i = c_i}``;
- ``confusion[a, b] = #{i : c_i = a, d_i = b}`` (rows: true class, columns: decided);
- ``precision_k = confusion[k, k] / sum_a confusion[a, k]`` (``None`` when no row is decided as ``k``),
  ``recall_k = confusion[k, k] / sum_b confusion[k, b]`` (``None`` when class ``k`` has no row);
- ``log_loss = -(1/n) sum_i log max(p_{i,c_i}, 1e-300)`` (natural logarithm; the floor keeps it finite);
- ``brier = (1/n) sum_i sum_k (p_ik - [k = c_i])**2`` (Brier (1950), Monthly Weather Review 78(1), the
  multi-class form: 0 is perfect, 2 the worst);
- calibration table: the top probability ``max_k p_ik`` of each row in ``bins`` equal bins of
  ``[0, 1]`` (the last bin includes 1); per bin the number of rows, their mean top probability and
  the share of them decided correctly. A calibrated classifier has the two close in every bin.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["ClassificationMetrics", "classification_metrics"]


@dataclass(frozen=True)
class ClassificationMetrics:
    """The measures of the module docstring for one set of rows; ``to_dict()`` for a JSON report."""

    labels: tuple[str, ...]
    rows: int
    accuracy: float
    errors: int
    confusion: np.ndarray
    precision: tuple[float | None, ...]
    recall: tuple[float | None, ...]
    log_loss: float
    brier: float
    calibration: tuple[dict[str, Any], ...]

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready values; the confusion matrix as nested lists, rows = true class."""
        return {
            "rows": self.rows,
            "accuracy": self.accuracy,
            "errors": self.errors,
            "labels": list(self.labels),
            "confusion": self.confusion.tolist(),
            "per_class": {
                label: {"precision": p, "recall": r, "rows": int(self.confusion[k].sum())}
                for k, (label, p, r) in enumerate(zip(self.labels, self.precision, self.recall))
            },
            "log_loss": self.log_loss,
            "brier": self.brier,
            "calibration": [dict(entry) for entry in self.calibration],
        }

    def summary(self) -> str:
        """One line: ``accuracy 97.1 % (2 errors in 69 rows), log loss 0.081, Brier 0.041``."""
        return (f"accuracy {100 * self.accuracy:.1f} % ({self.errors} error{'s' * (self.errors != 1)} in "
                f"{self.rows} rows), log loss {self.log_loss:.3g}, Brier {self.brier:.3g}")

    def __str__(self) -> str:
        width = max(len(label) for label in self.labels)
        head = " " * (width + 2) + " ".join(f"{label[:8]:>8}" for label in self.labels) + "   recall precision"
        lines = [self.summary(), "confusion (rows: true class, columns: decided class):", head]
        for k, label in enumerate(self.labels):
            counts = " ".join(f"{int(c):>8}" for c in self.confusion[k])
            lines.append(f"  {label:<{width}}{counts}   {_percent(self.recall[k]):>6} {_percent(self.precision[k]):>9}")
        return "\n".join(lines)


def _percent(value: float | None) -> str:
    return "-" if value is None else f"{100 * value:.1f}%"


def classification_metrics(
    true_indices: Any, probabilities: Any, labels: Any, *, bins: int = 10
) -> ClassificationMetrics:
    """The measures of the module docstring for true class indices ``(n,)`` and probabilities ``(n, K)``.

    ``labels`` names the ``K`` classes in column order.

    >>> m = classification_metrics([0, 1, 1], [[0.9, 0.1], [0.4, 0.6], [0.7, 0.3]], ["off", "on"])
    >>> m.errors, m.confusion.tolist(), round(m.brier, 3)
    (1, [[1, 0], [1, 1]], 0.44)
    """
    labels = tuple(str(label) for label in labels)
    p = np.asarray(probabilities, dtype=np.float64)
    truth = np.asarray(true_indices)
    n_classes = len(labels)
    if p.ndim != 2 or p.shape[1] != n_classes or p.shape[0] == 0:
        raise ValueError(f"probabilities must have shape (n_rows >= 1, {n_classes}), got {p.shape}")
    if truth.shape != (p.shape[0],) or truth.dtype.kind not in "iu" or truth.min() < 0 or truth.max() >= n_classes:
        raise ValueError(f"true_indices must be {p.shape[0]} integers in [0, {n_classes}), got {truth!r}")
    if not np.all(np.isfinite(p)) or np.any(p < 0) or np.any(np.abs(p.sum(axis=1) - 1.0) > 1e-6):
        raise ValueError("probabilities must be finite, >= 0, and every row must sum to 1")
    if isinstance(bins, bool) or not isinstance(bins, int) or bins < 1:
        raise ValueError(f"bins must be an integer >= 1, got {bins!r}")
    n = p.shape[0]
    decided = np.argmax(p, axis=1)
    confusion = np.zeros((n_classes, n_classes), dtype=np.int64)
    np.add.at(confusion, (truth, decided), 1)
    correct = int(np.trace(confusion))
    columns, rows = confusion.sum(axis=0), confusion.sum(axis=1)
    precision = tuple(float(confusion[k, k] / columns[k]) if columns[k] else None for k in range(n_classes))
    recall = tuple(float(confusion[k, k] / rows[k]) if rows[k] else None for k in range(n_classes))
    truth_p = p[np.arange(n), truth]
    log_loss = float(-np.mean(np.log(np.maximum(truth_p, 1e-300))))
    target = np.zeros_like(p)
    target[np.arange(n), truth] = 1.0
    brier = float(np.mean(np.sum((p - target) ** 2, axis=1)))
    top = p.max(axis=1)
    which = np.minimum((top * bins).astype(np.int64), bins - 1)
    table = []
    for b in range(bins):
        members = which == b
        count = int(members.sum())
        table.append({
            "low": b / bins, "high": (b + 1) / bins, "rows": count,
            "mean_probability": float(top[members].mean()) if count else None,
            "observed_frequency": float((decided[members] == truth[members]).mean()) if count else None,
        })
    return ClassificationMetrics(labels, n, correct / n, n - correct, confusion, precision, recall, log_loss,
                                 brier, tuple(table))
