"""What ``tinyprop train`` and ``tinyprop demo`` add to the library's recipe: usage errors, metadata, the report.

The recipe itself (split, network, fit, evaluation) is :mod:`tinyprop.recipes`;
this module turns its refusals into usage errors and writes what the commands
keep: the model file's metadata and the JSON training report.
"""

from __future__ import annotations

import time
from collections.abc import Sequence
from typing import Any

import numpy as np

from .._json import finite_or_none
from .._version import __version__
from ..envelope import Envelope
from ..layers import Affine, ColumnScaling
from ..modelfile import fingerprint
from ..network import Network
from ..recipes import Dataset, FitOutcome, FitSettings, Split, split_rows
from ._common import SAFETY, USAGE, CommandError


def split_for_command(n: int, settings: FitSettings) -> Split:
    """:func:`tinyprop.recipes.split_rows`, its refusal as a usage error (in option words, by ``cli.main``)."""
    try:
        return split_rows(n, settings)
    except ValueError as exc:
        raise CommandError(str(exc), USAGE) from None


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


def training_envelope(X_train: np.ndarray, names: Sequence[str], margin: float) -> Envelope:
    """The envelope of the training rows, widened by ``margin`` (``--envelope-margin``) of each input's width."""
    return Envelope.of_rows(X_train, names=list(names)).widened(margin)


def model_metadata(
    data: Dataset, settings: FitSettings, description: str, outcome: FitOutcome | None = None,
    envelope: Envelope | None = None, test: dict[str, Any] | None = None,
) -> dict[str, Any]:
    """What the model file keeps: input and output names and units (used by ``export``), a description, the recipe.

    For the default recipe's methods also the branch it chose and why (``training.fit``); the operating
    ``envelope`` when given; the test rows' errors (``test``: :func:`~tinyprop.recipes.evaluate` on them)
    as ``training.test`` = ``{"rows": n, "rmse": [...], "max_abs_error": [...]}``, one entry per output,
    which ``export`` compares its proven error bounds with.
    """
    training: dict[str, Any] = {"settings": settings.to_dict(), "data": data.source}
    if outcome is not None and outcome.recipe is not None:
        training["fit"] = {"recipe_method": outcome.recipe.method, "reason": outcome.recipe.reason}
    if test is not None:
        training["test"] = {"rows": test["rows"],
                            **{key: [test["targets"][name][key] for name in data.target_names]
                               for key in ("rmse", "max_abs_error")}}
    return {
        "description": description,
        **data.ports(),
        "training": training,
        **({} if envelope is None else envelope.to_metadata()),
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
                 "targets": list(data.target_names), "units": dict(data.units), "split": split.sizes()},
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
