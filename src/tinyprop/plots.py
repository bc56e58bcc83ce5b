"""PNG plots of a training run: learning curves, a predicted-versus-actual parity plot, and for
classifiers a confusion matrix and a reliability diagram.

Needs the optional ``plot`` extra (matplotlib): ``pip install "tinyprop[plot]"``.
Without it every function raises :class:`PlotsUnavailable` (an ``ImportError``)
whose message says how to install it; nothing else in tinyprop needs
matplotlib.

The figures are drawn on matplotlib's ``Agg`` canvas directly (no ``pyplot``),
so no window opens, no display is needed and the caller's matplotlib backend
and global state are left alone.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from ._words import count

__all__ = ["PLOT_HINT", "PlotsUnavailable", "confusion_plot", "learning_curves", "parity_plot", "reliability_diagram"]

PLOT_HINT = 'pip install "tinyprop[plot]"'

_DPI = 100


class PlotsUnavailable(ImportError):
    """matplotlib is not installed; the message says how to install it."""


def learning_curves(
    training: Sequence[float],
    validation: Sequence[float] | None,
    path: str | os.PathLike[str],
    *,
    title: str = "learning curves",
    loss_name: str = "loss",
) -> Path:
    """Write the loss per epoch (training, and validation when given) on a log scale to a PNG at ``path``.

    ``training[e - 1]`` is the loss after epoch ``e``. Losses must be
    positive and finite (a log scale cannot show zero); returns ``path``.
    """
    curves = {"training": _positive(training, "training")}
    if validation is not None:
        curves["validation"] = _positive(validation, "validation")
        if curves["validation"].size != curves["training"].size:
            raise ValueError(
                f"training and validation need one loss per epoch each, got {curves['training'].size} "
                f"and {curves['validation'].size}"
            )
    figure, canvas = _figure(1, (6.4, 4.2))
    axes = figure.add_subplot(1, 1, 1)
    epochs = np.arange(1, curves["training"].size + 1)
    for label, values in curves.items():
        axes.plot(epochs, values, label=label, marker="." if values.size < 30 else None)
    axes.set_yscale("log")
    axes.set_xlabel("epoch")
    axes.set_ylabel(f"{loss_name} (log scale)")
    axes.set_title(title, fontsize=10)
    axes.grid(True, which="both", alpha=0.3)
    axes.legend()
    return _save(figure, canvas, path)


def parity_plot(
    actual: Any,
    predicted: Any,
    path: str | os.PathLike[str],
    *,
    names: Sequence[str] | None = None,
    title: str = "predicted versus actual",
) -> Path:
    """Write predicted against actual values, one panel per output, with the line ``y = x``, to a PNG.

    ``actual`` and ``predicted`` have shape ``(n, n_out)`` (1-D for one
    output); ``names`` labels the outputs. Each panel states the root mean
    square error ``sqrt(mean((predicted - actual)**2))``. Returns ``path``.
    """
    actual, predicted = _columns(actual, "actual"), _columns(predicted, "predicted")
    if actual.shape != predicted.shape:
        raise ValueError(f"actual and predicted must have the same shape, got {actual.shape} and {predicted.shape}")
    n_out = actual.shape[1]
    names = [f"output {k}" for k in range(n_out)] if names is None else list(names)
    if len(names) != n_out:
        raise ValueError(f"names must have one entry per output ({n_out}), got {len(names)}")
    figure, canvas = _figure(n_out, (4.4 * n_out, 4.4))
    for k, name in enumerate(names):
        axes = figure.add_subplot(1, n_out, k + 1)
        a, p = actual[:, k], predicted[:, k]
        low, high = float(min(a.min(), p.min())), float(max(a.max(), p.max()))
        pad = 0.03 * (high - low) or 0.5
        axes.plot([low - pad, high + pad], [low - pad, high + pad], color="0.5", linewidth=1, label="y = x")
        axes.scatter(a, p, s=8, alpha=0.6)
        rmse = float(np.sqrt(np.mean((p - a) ** 2)))
        axes.set_xlim(low - pad, high + pad)
        axes.set_ylim(low - pad, high + pad)
        axes.set_aspect("equal")
        axes.set_xlabel(f"actual {name}")
        axes.set_ylabel(f"predicted {name}")
        axes.set_title(f"RMSE {rmse:.4g} on {count(a.size, 'row')}", fontsize=9)
        axes.grid(True, alpha=0.3)
    figure.suptitle(title, fontsize=10)
    return _save(figure, canvas, path)


def confusion_plot(metrics: Any, path: str | os.PathLike[str], *, title: str = "confusion matrix") -> Path:
    """Write the confusion matrix of a :class:`~tinyprop.classmetrics.ClassificationMetrics` as a PNG.

    Rows are the true classes, columns the decided ones; every cell shows its
    count, shaded by its share of the true class's rows. Returns ``path``.
    """
    counts = np.asarray(metrics.confusion, dtype=np.float64)
    labels = list(metrics.labels)
    shares = counts / np.maximum(counts.sum(axis=1, keepdims=True), 1.0)
    side = 1.2 + 0.7 * len(labels)
    figure, canvas = _figure(1, (side + 1.5, side + 0.8))
    axes = figure.add_subplot(1, 1, 1)
    axes.imshow(shares, cmap="Blues", vmin=0.0, vmax=1.0)
    for a in range(len(labels)):
        for b in range(len(labels)):
            axes.text(b, a, str(int(counts[a, b])), ha="center", va="center",
                      color="white" if shares[a, b] > 0.5 else "black")
    axes.set_xticks(range(len(labels)), labels, rotation=45, ha="right")
    axes.set_yticks(range(len(labels)), labels)
    axes.set_xlabel("decided class")
    axes.set_ylabel("true class")
    axes.set_title(f"{title}\naccuracy {100 * metrics.accuracy:.1f} % ({metrics.errors} errors in {metrics.rows})",
                   fontsize=9)
    return _save(figure, canvas, path)


def reliability_diagram(metrics: Any, path: str | os.PathLike[str], *, title: str = "reliability") -> Path:
    """Write the calibration table of a :class:`~tinyprop.classmetrics.ClassificationMetrics` as a PNG.

    For every bin of the top predicted probability that holds rows: the share
    of its rows decided correctly against their mean top probability, with the
    diagonal a calibrated classifier follows; the bars below count the rows.
    Returns ``path``.
    """
    used = [entry for entry in metrics.calibration if entry["rows"]]
    figure, canvas = _figure(2, (5.2, 6.0))
    axes = figure.add_subplot(2, 1, 1)
    axes.plot([0, 1], [0, 1], color="0.5", linewidth=1, label="calibrated")
    axes.plot([e["mean_probability"] for e in used], [e["observed_frequency"] for e in used], marker="o",
              label="observed")
    axes.set_xlim(0, 1)
    axes.set_ylim(0, 1.02)
    axes.set_xlabel("mean top probability in the bin")
    axes.set_ylabel("share decided correctly")
    axes.set_title(f"{title}\nlog loss {metrics.log_loss:.3g}, Brier {metrics.brier:.3g}", fontsize=9)
    axes.grid(True, alpha=0.3)
    axes.legend(loc="upper left")
    counts = figure.add_subplot(2, 1, 2)
    counts.bar([(e["low"] + e["high"]) / 2 for e in metrics.calibration], [e["rows"] for e in metrics.calibration],
               width=[0.9 * (e["high"] - e["low"]) for e in metrics.calibration])
    counts.set_xlim(0, 1)
    counts.set_xlabel("top probability")
    counts.set_ylabel("rows")
    return _save(figure, canvas, path)

def _figure(panels: int, size: tuple[float, float]) -> tuple[Any, Any]:
    try:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure
    except ImportError:
        raise PlotsUnavailable(f"plots need matplotlib, which is not installed; to enable them: {PLOT_HINT}") from None
    figure = Figure(figsize=size, dpi=_DPI, layout="constrained")
    return figure, FigureCanvasAgg(figure)


def _save(figure: Any, canvas: Any, path: str | os.PathLike[str]) -> Path:
    target = Path(path)
    canvas.print_png(os.fspath(target))
    figure.clear()
    return target


def _positive(values: Sequence[float], name: str) -> np.ndarray:
    array = np.asarray(values, dtype=np.float64).ravel()
    if array.size == 0:
        raise ValueError(f"{name} losses are empty; a learning curve needs at least one epoch")
    if not np.all(np.isfinite(array)) or np.any(array <= 0):
        raise ValueError(f"{name} losses must be positive and finite for a log scale, got minimum {array.min()!r}")
    return array


def _columns(values: Any, name: str) -> np.ndarray:
    array = np.asarray(values, dtype=np.float64)
    if array.ndim == 1:
        array = array.reshape(-1, 1)
    if array.ndim != 2 or array.shape[0] == 0:
        raise ValueError(f"{name} must have shape (n, n_out) or (n,), with n >= 1, got {array.shape}")
    if not np.all(np.isfinite(array)):
        raise ValueError(f"{name} holds non-finite values")
    return array
