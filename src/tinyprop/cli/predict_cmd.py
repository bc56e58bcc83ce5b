"""``tinyprop predict MODEL.npz DATA.csv [--out PRED.csv]``: apply a model file to the rows of a CSV file.

The model's input columns are read **by name** (the names stored in the model
file, or ``--inputs``), so their order in the file does not matter and other
columns are ignored. The output CSV has one row per data row, in order:

- regression model: one column per output, named like the target, holding the
  value (written with ``repr``, so it reads back as exactly the float the
  library computed);
- classifier: a column named like the class target holding the decided label,
  then one column ``probability_<label>`` per class (also for a yes/no model
  with one sigmoid output: both classes' probabilities).

Ensemble files (:class:`tinyprop.Ensemble`) are applied the same way.
Rows outside the operating envelope stored in the model are
predicted all the same, with a warning on stderr per input outside (how many
rows, how far). A file that lacks an input column is refused with one line naming the
column(s); a cell of an input column that is not a number is refused with its
line and column (exit status 1).
"""

from __future__ import annotations

import argparse
import csv
import io
import sys
from pathlib import Path
from typing import Any

import numpy as np

from .._words import count
from ..archive import read_archive
from ..classify import check_decision, class_entry, class_probabilities, decided_classes
from ..ensemble import ENSEMBLE_FORMAT, Ensemble
from . import _args
from ._common import (
    CommandError,
    describe_os_error,
    numeric_columns,
    read_model,
    read_table,
    stored_names,
    warn_outside_envelope,
)
from ._imports import add_import_option, import_modules

HELP = "apply a model file to the rows of a CSV file; write the predictions as CSV"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("model", metavar="MODEL.npz", help="model (or ensemble) file written by tinyprop")
    parser.add_argument("data", metavar="DATA.csv", help="CSV file with a header row; the model's input columns are "
                                                        "found by name, other columns are ignored")
    parser.add_argument("--out", metavar="PRED.csv", help="CSV file to write (default: standard output)")
    parser.add_argument("--inputs", type=_args.names, action="extend", metavar="NAMES",
                        help="input columns in the model's input order (default: the names stored in the model)")
    parser.add_argument("--delimiter", default=",", help="field separator of DATA.csv (default ',')")
    add_import_option(parser)


def run(args: argparse.Namespace) -> int:
    import_modules(args.imports)
    model, metadata, n_in, n_out = _load(args.model)
    inputs = args.inputs or stored_names(metadata, "inputs")
    if inputs is None:
        raise CommandError("the model stores no input names; give --inputs NAMES (in the model's input order)", 2)
    if len(inputs) != n_in:
        raise CommandError(f"the model has {n_in} inputs, but {len(inputs)} columns are named: {', '.join(inputs)}", 2)
    table = read_table(args.data, args.delimiter)
    missing = [name for name in inputs if name not in table.columns]
    if missing:
        raise CommandError(f"{args.data}: no column named {', '.join(map(repr, missing))}, which the model needs as "
                           f"input{'s' * (len(missing) > 1)}; the header has {', '.join(map(repr, table.columns))}")
    X, _ = numeric_columns(table, list(inputs), [])
    warn_outside_envelope("predict", metadata, X, f"the {count(X.shape[0], 'row')} of {args.data}")
    header, columns = prediction_columns(model.predict(X), metadata, n_out)
    text = io.StringIO()
    writer = csv.writer(text, lineterminator="\n")
    writer.writerow(header)
    writer.writerows(zip(*columns))
    if args.out is None:
        sys.stdout.write(text.getvalue())
        return 0
    try:
        Path(args.out).write_text(text.getvalue(), encoding="utf-8")
    except OSError as exc:
        raise CommandError(f"cannot write the predictions: {describe_os_error(exc)}") from None
    print(f"wrote {args.out}: {X.shape[0]} rows, columns {', '.join(header)}", file=sys.stderr)
    return 0


def prediction_columns(output: np.ndarray, metadata: dict[str, Any], n_out: int) -> tuple[list[str], list[list[str]]]:
    """The header and the text of every column for the network outputs ``output`` ``(n, n_out)``."""
    entry = class_entry(metadata)
    if entry is not None:
        labels = [str(label) for label in entry.get("labels", [])]
        try:
            check_decision(entry, n_out)
        except ValueError as exc:
            raise CommandError(f"the model file's class labels do not fit its network: {exc}") from None
        p = class_probabilities(output.astype(np.float64))
        decided = decided_classes(output)
        header = [str(entry.get("target", "class"))] + [f"probability_{label}" for label in labels]
        return header, [[labels[k] for k in decided]] + [[repr(float(v)) for v in p[:, k]] for k in range(len(labels))]
    names = stored_names(metadata, "outputs") or [f"output_{k}" for k in range(n_out)]
    return list(names), [[repr(float(v)) for v in output[:, k]] for k in range(n_out)]


def _load(path: str) -> tuple[Any, dict[str, Any], int, int]:
    """``(model with predict(X), metadata, n_in, n_out)`` for a model or ensemble file."""
    try:
        _, manifest = read_archive(path)
        is_ensemble = manifest.get("format") == ENSEMBLE_FORMAT
    except (OSError, ValueError):
        is_ensemble = False  # read_model reports the problem
    if is_ensemble:
        try:
            ensemble = Ensemble.load(path)
        except ValueError as exc:
            raise CommandError(f"cannot use the ensemble file: {exc}") from None
        first = ensemble.members[0]
        return ensemble, dict(ensemble.metadata or {}), first.n_in, first.n_out
    model = read_model(path)
    return model.network, model.metadata, model.network.n_in, model.network.n_out
