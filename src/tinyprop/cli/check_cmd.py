"""``tinyprop check``: verify a saved model's backpropagated gradient against numerical differentiation.

The loss is :class:`~tinyprop.losses.MeanSquaredError` (the loss ``tinyprop train``
fits). Rows come from a CSV file (``--data``; ``--rows`` of them, drawn with
``numpy.random.default_rng(seed)``) or, without ``--data``, are generated with
``numpy.random.default_rng(seed)``:

- inputs ``X = mean + scale * Z`` with ``Z`` standard normal, where ``mean`` and
  ``scale`` are those of the model's leading :class:`~tinyprop.layers.Standardize`
  layer (``0`` and ``1`` without one), so the rows look like the training data;
- targets ``y = predict(X) + s * W``, ``W`` standard normal, with ``s`` the scale
  of a trailing :class:`~tinyprop.layers.Unstandardize` layer (else ``1``), so
  the residuals, and hence the gradient, are not near zero.

Exit status 0 when every parameter array passes, 1 when one fails.
"""

from __future__ import annotations

import argparse
import sys

import numpy as np

from .._words import count
from ..check import check_gradient
from ..layers import Standardize, Unstandardize
from ..losses import MeanSquaredError
from ..network import Network
from . import _args
from ._common import (
    USAGE,
    CommandError,
    numeric_columns,
    read_model,
    read_table,
    require_columns,
    stored_names,
    warn_outside_envelope,
)
from ._imports import add_import_option, import_modules

HELP = "check a saved model's gradient against numerical differentiation (exit 1 if it fails)"
EPILOG = """rows without --data, drawn with numpy.random.default_rng(SEED):
  inputs  X = mean + scale * Z, Z standard normal, with the mean and scale of the
          model's leading Standardize layer (0 and 1 without one)
  targets y = predict(X) + s * W, W standard normal, s the scale of a trailing
          Unstandardize layer (1 without one)
the loss is the mean squared error; exit status 0 when every array passes, 1 otherwise"""


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("model", metavar="MODEL.npz", help="model file written by tinyprop")
    parser.add_argument("--data", metavar="DATA.csv",
                        help="take the rows from this CSV file (default: generate rows, see below)")
    parser.add_argument("--inputs", type=_args.names, action="extend", metavar="NAMES",
                        help="input columns of DATA.csv (default: the input names stored in the model)")
    parser.add_argument("--targets", type=_args.names, action="extend", metavar="NAMES",
                        help="target columns of DATA.csv (default: the output names stored in the model)")
    parser.add_argument("--delimiter", default=",", help="field separator of DATA.csv (default ',')")
    parser.add_argument("--rows", type=_args.positive_int, default=16, help="rows to check on (default 16)")
    parser.add_argument("--seed", type=_args.seed, default=0,
                        help="seed for choosing or generating rows and the --parameters sample (default 0)")
    parser.add_argument("--parameters", type=_args.positive_int, metavar="N",
                        help="check a random sample of N parameters (drawn with --seed; one from every weight and "
                             "bias array) instead of all: the check costs a few dozen forward passes per parameter")
    parser.add_argument("--tolerance", type=_args.positive_float,
                        help="largest accepted relative error (default 1e-6 for float64 models, 1e-3 for float32)")
    add_import_option(parser)


def run(args: argparse.Namespace) -> int:
    import_modules(args.imports)
    model = read_model(args.model)
    net = model.network
    if args.parameters is not None and args.parameters < len(net.params):
        raise CommandError(f"--parameters must be at least {len(net.params)} for this model (one from every weight "
                           f"and bias array), got {args.parameters}", USAGE)
    rng = np.random.default_rng(args.seed)
    if args.data:
        X, y = _rows_from_csv(args, model.metadata, net, rng)
        source = f"{count(X.shape[0], 'row')} of {args.data}"
        warn_outside_envelope("check", model.metadata, X, f"the {source}")
    else:
        X, y = _generated_rows(net, args.rows, rng)
        source = f"{X.shape[0]} generated rows (seed {args.seed})"
    _refuse_overflowing_rows(net, X, y, source)
    try:
        report = check_gradient(net, X, y, MeanSquaredError(), tolerance=args.tolerance,
                                parameters=args.parameters, seed=args.seed)
    except ValueError as exc:  # a pre-activation exactly on a kink, rows that do not fit the model, ...
        raise CommandError(f"cannot check on these rows: {exc}") from None
    print(f"model: {args.model} (fingerprint {model.fingerprint}, {net.n_params} parameters, {net.dtype.name})")
    print(f"rows: {source}; loss: mean squared error")
    print(report)
    if not report.passed:
        failed = ", ".join(a.name for a in report.failures)
        print(f"tinyprop check: gradient check FAILED for {failed} (max relative error "
              f"{report.max_rel_error:.2e} > tolerance {report.tolerance:.0e})", file=sys.stderr)
        return 1
    return 0


def _refuse_overflowing_rows(net: Network, X: np.ndarray, y: np.ndarray, source: str) -> None:
    """Refuse rows on which the loss itself overflows: no gradient, analytic or numerical, is meaningful there."""
    with np.errstate(all="ignore"):
        residual = np.asarray(net.predict(X), dtype=np.float64) - y
        per_row = np.sum(residual * residual, axis=1)
    bad = np.flatnonzero(~np.isfinite(per_row))
    if bad.size:
        raise CommandError(
            f"cannot check on these rows: the squared error overflows on {bad.size} of the {source} (the first is "
            f"row {int(bad[0])} of those checked, largest |value| {float(np.max(np.abs(X[bad[0]]))):.3g}); "
            "check on rows within the range the model is used on"
        )


def _generated_rows(net: Network, rows: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    first, last = net.layers[0], net.layers[-1]
    Z = rng.standard_normal((rows, net.n_in))
    X = first.mean + first.scale * Z if isinstance(first, Standardize) else Z
    spread = last.scale if isinstance(last, Unstandardize) else 1.0
    y = net.predict(X).astype(np.float64) + spread * rng.standard_normal((rows, net.n_out))
    return X, y


def _rows_from_csv(
    args: argparse.Namespace, metadata: dict, net: Network, rng: np.random.Generator
) -> tuple[np.ndarray, np.ndarray]:
    inputs = args.inputs or stored_names(metadata, "inputs")
    targets = args.targets or stored_names(metadata, "outputs")
    if inputs is None or targets is None:
        raise CommandError("the model stores no column names; give --inputs and --targets", USAGE)
    labels = {
        "--inputs": "--inputs" if args.inputs else "the model's input names (or give --inputs)",
        "--targets": "--targets" if args.targets else "the model's output names (or give --targets)",
    }
    for option, names, width in (("--inputs", inputs, net.n_in), ("--targets", targets, net.n_out)):
        if len(names) != width:
            raise CommandError(f"the model has {width} {option[2:]}, but {labels[option]} name {len(names)} "
                               f"columns: {', '.join(names)}", USAGE)
    table = read_table(args.data, args.delimiter)
    for option, names in (("--inputs", inputs), ("--targets", targets)):
        require_columns(table, names, labels[option])
    X, y = numeric_columns(table, inputs, targets)  # the whole file is checked, not only the rows drawn
    chosen = np.sort(rng.choice(len(table), size=min(args.rows, len(table)), replace=False))
    return X[chosen], y[chosen]
