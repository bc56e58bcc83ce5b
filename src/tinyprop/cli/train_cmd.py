"""``tinyprop train``: fit a network to columns of a CSV file; write the model file and a JSON report."""

from __future__ import annotations

import argparse
import os
import sys
import textwrap
import time
from pathlib import Path
from typing import Any

import numpy as np

from .._words import count
from ..csvdata import CsvTable
from ..modelfile import save
from ..recipes import (
    ACTIVATIONS,
    APPLIES_ONLY_TO,
    METHODS,
    OPTIMIZERS,
    RECIPE_METHODS,
    SCHEDULES,
    Dataset,
    FitSettings,
    build_network,
    check_data,
    evaluate_all,
    fit,
    least_squares_uncertainty,
)
from . import _args, _classes
from ._common import (
    USAGE,
    CommandError,
    describe_os_error,
    files_together,
    numeric_columns,
    output_folder,
    read_table_and_units,
    require_columns,
    warn,
    write_json,
    write_plots,
)
from ._fit_report import architecture, model_metadata, report, split_for_command, training_envelope

HELP = "fit a network to columns of a CSV file; write the model file and a JSON report"
EPILOG = "The CSV format, exactly what train does and the report's keys: 'tinyprop docs cli'."



def add_arguments(parser: argparse.ArgumentParser) -> None:
    defaults = FitSettings()
    data = parser.add_argument_group("data")
    data.add_argument("data", metavar="DATA.csv", help="CSV file with a header row of column names; a header cell "
                                                       "'head [m]' names the column head with the unit m")
    data.add_argument("--targets", type=_args.names, action="extend", required=True, metavar="NAMES",
                      help="column(s) to predict, comma-separated (required)")
    data.add_argument("--inputs", type=_args.names, action="extend", metavar="NAMES",
                      help="input columns, comma-separated (default: every column that is not a target)")
    data.add_argument("--delimiter", default=",", help="field separator (default ',')")
    data.add_argument("--classes", type=_args.names, action="extend", metavar="NAMES",
                      help="target columns holding class labels written as numbers (a target column of text "
                           "labels is a class column without this); see docs/classification.md")
    data.add_argument("--class-weights", metavar="WEIGHTS",
                      help="for a class target: 'balanced' (every class weighs the same in total) or "
                           "LABEL=WEIGHT pairs, comma-separated (default: every row weighs 1)")
    data.add_argument(
        "--validation-fraction",
        type=_args.fraction,
        default=defaults.validation_fraction,
        metavar="F",
        help=f"share of rows held out for validation (default {defaults.validation_fraction})",
    )
    data.add_argument("--test-fraction", type=_args.fraction, default=defaults.test_fraction,
                      metavar="F", help=f"share of rows held out for the final test (default {defaults.test_fraction})")
    network = parser.add_argument_group("network")
    network.add_argument("--hidden", type=_args.widths, default=defaults.hidden, metavar="WIDTHS",
                         help="hidden-layer widths, comma-separated (default: the recipe's, 20 for evidence-lm and "
                              "50 for adam-early-stopping; 16,16 for the other methods; 32 for a class target)")
    network.add_argument("--activation", choices=sorted(ACTIVATIONS), default=defaults.activation,
                         help=f"hidden-layer activation (default {defaults.activation})")
    network.add_argument("--dtype", choices=("float64", "float32"), default=defaults.dtype,
                         help=f"number type of the network (default {defaults.dtype})")
    fitting = parser.add_argument_group("fitting", _applicability())
    fitting.add_argument("--method", choices=METHODS, default=defaults.method,
                         help="auto (default): the default recipe, evidence-regularised Levenberg-Marquardt "
                              "(evidence-lm) while affordable, else Adam with early stopping (adam-early-stopping); "
                              "or one of these two forced; or mini-batch gradient descent with the options below, "
                              "or plain least squares by Levenberg-Marquardt or L-BFGS (small networks)")
    fitting.add_argument("--restarts", type=_args.positive_int, metavar="N",
                         help="evidence-lm: initialisations tried, the largest log evidence kept (default 1)")
    fitting.add_argument("--optimizer", choices=sorted(OPTIMIZERS),
                         help=f"mini-batch optimizer (default {defaults.optimizer})")
    fitting.add_argument(
        "--learning-rate",
        dest="lr",
        type=_args.positive_float,
        metavar="LR",
        help="step size (default: " + ", ".join(f"{name} {lr:g}" for name, (_, lr) in OPTIMIZERS.items()) + ")",
    )
    fitting.add_argument("--schedule", choices=SCHEDULES,
                         help=f"learning rate over the run: cosine (falls to 0 at the last epoch) or constant "
                              f"(default {defaults.schedule})")
    fitting.add_argument("--momentum", type=_args.momentum, help=f"momentum of sgd (default {defaults.momentum:g})")
    fitting.add_argument("--clip-norm", type=_args.positive_float, metavar="C",
                         help="scale each update's gradient down to global norm C when it is larger "
                              "(default: no clipping)")
    fitting.add_argument("--epochs", type=_args.positive_int,
                         help=f"passes over the training rows (default {defaults.epochs})")
    fitting.add_argument("--batch-size", type=_args.positive_int, metavar="N",
                         help=f"rows per update (default {defaults.batch_size})")
    fitting.add_argument("--patience", type=_args.positive_int, metavar="EPOCHS",
                         help="stop after this many epochs without a lower validation loss and keep the best "
                              "weights (default: run all epochs)")
    fitting.add_argument("--max-evaluations", type=_args.positive_int, metavar="N",
                         help=f"limit for the least-squares methods (default {defaults.max_evaluations})")
    fitting.add_argument("--seed", type=_args.seed, default=defaults.seed,
                         help=f"seed of the split, the initial weights and the shuffling (default {defaults.seed})")
    output = parser.add_argument_group("output")
    output.add_argument("--out", default="model.npz", metavar="MODEL.npz",
                        help="model file to write (default model.npz)")
    output.add_argument("--report", metavar="REPORT.json",
                        help="JSON training report to write (default: next to the model, <model>.report.json)")
    output.add_argument("--plots", metavar="DIR", help="also write learning_curves.png and parity.png into DIR "
                                                       "(needs matplotlib)")
    output.add_argument("--envelope-margin", type=_args.non_negative_float, default=0.0, metavar="FRACTION",
                        help="widen the stored operating envelope (the range of every input in the training rows) "
                             "by FRACTION of each input's width on both sides (default 0)")
    output.add_argument("--quiet", action="store_true", help="no progress lines on stderr")


def run(args: argparse.Namespace) -> int:
    try:
        settings, refusal = _settings(args), None
    except CommandError as exc:  # a regression option misapplied: decided once we know the targets' kind
        settings, refusal = None, exc
    model_path, report_path = _output_paths(args)
    plots = output_folder(args.plots) if args.plots else None
    started = time.perf_counter()
    try:
        table, units = read_table_and_units(args.data, args.delimiter)
    except CommandError:
        if refusal is not None:
            raise refusal from None  # the command line's mistake first, as without class targets
        raise
    targets, inputs = _columns(table, args.targets, args.inputs)
    classes = _classes.class_targets(table, targets, args.classes)
    if classes:
        _classes.check_options(args, targets, classes)
        return _classes.run(args, table, targets[0], inputs, model_path, report_path, plots,
                            time.perf_counter() - started)
    if refusal is not None:
        raise refusal
    assert settings is not None
    if args.class_weights is not None:
        raise CommandError("--class-weights applies to a class target; the targets are numeric "
                           "(mark a column of numeric class codes with --classes)", USAGE)
    data = _dataset(args, table, units, targets, inputs)
    read_seconds = time.perf_counter() - started
    split = split_for_command(data.X.shape[0], settings)
    _refuse_a_network_too_large(data.X.shape[1], settings.hidden, data.y.shape[1], settings.dtype)
    recipe = settings.method in RECIPE_METHODS
    net = None if recipe else build_network(data, split, settings)
    try:  # the recipe's methods build their network during the fit: no parameter count yet
        weaknesses = check_data(data, split, settings, None if net is None else net.n_params)
    except ValueError as exc:  # too few rows, a constant target
        raise CommandError(f"{args.data}: {exc}") from None
    print(f"data: {args.data}: {count(data.X.shape[0], 'row')}; inputs {', '.join(map(data.label, data.input_names))}; "
          f"targets {', '.join(map(data.label, data.target_names))}")
    sizes = split.sizes()
    print(f"split (seed {settings.seed}): {sizes['training']} training, {sizes['validation']} validation, "
          f"{sizes['test']} test rows")
    if net is not None:
        print(f"network: {architecture(net)}; {net.n_params} parameters, {net.dtype.name}")
    for weakness in weaknesses:
        warn("train", f"{args.data}: {weakness}")
    print(f"fitting: {settings.describe_method()}", flush=True)
    try:
        outcome = fit(net, data, split, settings, progress=not args.quiet)
    except (ValueError, ArithmeticError) as exc:  # divergence, too few rows for Levenberg-Marquardt, ...
        raise CommandError(f"fitting failed: {exc}") from None
    net = outcome.network
    assert net is not None
    if outcome.recipe is not None:
        print(f"method chosen: {outcome.recipe.method} ({outcome.recipe.reason})")
        print(f"network: {architecture(net)}; {net.n_params} parameters, {net.dtype.name}")
    print(f"fit: {outcome.summary['message']} ({outcome.seconds:.1f} s)")
    if outcome.summary.get("stop_reason") == "evaluation limit" and outcome.recipe is None:
        print("     raise --max-evaluations, or check the data and the network size")
    started = time.perf_counter()
    metrics = evaluate_all(net, data, split)
    extra: dict[str, Any] = {}
    if outcome.recipe is not None and outcome.recipe.solved is not None:
        extra["uncertainty"] = least_squares_uncertainty(net, data, split, outcome.recipe.solved)
    elif settings.method in ("levenberg-marquardt", "lbfgs"):
        extra["uncertainty"] = least_squares_uncertainty(net, data, split)
    evaluate_seconds = time.perf_counter() - started
    _print_metrics(metrics, data)
    _refuse_a_fit_worse_than_the_mean(metrics, data, split)
    if "uncertainty" in extra:
        print(_uncertainty_line(extra["uncertainty"]))

    started = time.perf_counter()
    envelope = training_envelope(data.X[split.training], data.input_names, args.envelope_margin)
    metadata = model_metadata(data, settings, f"fitted by tinyprop train to {Path(args.data).name}", outcome,
                              envelope, metrics["test"])
    extra["envelope"] = metadata["envelope"]
    extra["model_file"] = os.fspath(model_path)
    with files_together(model_path.parent):  # the report on disk always describes the model on disk
        try:
            digest = save(net, model_path, metadata=metadata)
        except OSError as exc:
            raise CommandError(f"cannot write the model file: {describe_os_error(exc)}") from None
        save_seconds = time.perf_counter() - started
        timings = {"read": read_seconds, "evaluate": evaluate_seconds, "save": save_seconds}
        write_json(report_path, report("train", net, data, split, settings, outcome, metrics, timings, extra))
    print(f"wrote {model_path} (fingerprint {digest})")
    print(f"wrote {report_path}")
    if plots is not None:
        rows, label = (split.test, "test rows") if split.test.size else (split.training, "training rows")
        written, note = write_plots(plots, outcome.history, data.y[rows], net.predict(data.X[rows]),
                                    [data.label(name) for name in data.target_names], Path(args.data).name, label)
        for path in written:
            print(f"wrote {path}")
        if note:
            print(note, file=sys.stderr)
    return 0


def _settings(args: argparse.Namespace) -> FitSettings:
    """The fit settings: options not given (``None``) take the defaults of :class:`FitSettings`.

    An option given with a ``--method`` (or ``--optimizer``) it does not apply
    to is refused (:data:`tinyprop.recipes.APPLIES_ONLY_TO`), never silently ignored.
    """
    if args.validation_fraction + args.test_fraction >= 1.0:
        raise CommandError(
            f"--validation-fraction {args.validation_fraction} and --test-fraction {args.test_fraction} "
            "leave no rows for training; their sum must be below 1", USAGE
        )
    defaults = FitSettings()

    def value(option: str) -> Any:
        given = getattr(args, option)
        return getattr(defaults, option) if given is None else given

    for option, depends_on, values in APPLIES_ONLY_TO:
        if getattr(args, option) is not None and value(depends_on) not in values:
            raise CommandError(f"{_flag(option)} applies to {_flag(depends_on)} {' or '.join(values)}, "
                               f"not {value(depends_on)}", USAGE)
    if args.method in RECIPE_METHODS and args.activation != "tanh":
        raise CommandError(f"--method {args.method} (the default recipe) uses tanh hidden units; --activation "
                           f"{args.activation} needs --method mini-batch, levenberg-marquardt or lbfgs", USAGE)
    if args.patience is not None and args.validation_fraction == 0:
        raise CommandError("--patience needs validation rows; set --validation-fraction above 0", USAGE)
    return FitSettings(
        hidden=args.hidden, activation=args.activation, method=args.method, seed=args.seed,
        validation_fraction=args.validation_fraction, test_fraction=args.test_fraction, dtype=args.dtype,
        **{option: value(option) for option, _, _ in APPLIES_ONLY_TO},
    )


def _applicability() -> str:
    """:data:`tinyprop.recipes.APPLIES_ONLY_TO` in words, for ``--help``."""
    groups: dict[tuple[str, tuple[str, ...]], list[str]] = {}
    for option, depends_on, values in APPLIES_ONLY_TO:
        groups.setdefault((depends_on, values), []).append(_flag(option))
    text = "; ".join(f"{', '.join(flags)} only with {_flag(depends_on)} {' or '.join(values)}"
                     for (depends_on, values), flags in groups.items())
    return textwrap.fill(text + " (refused otherwise).", width=78)


def _flag(option: str) -> str:
    """``batch_size`` -> ``--batch-size``; ``lr`` (the library's name) -> ``--learning-rate``."""
    return "--learning-rate" if option == "lr" else "--" + option.replace("_", "-")


def _dataset(args: argparse.Namespace, table: CsvTable, units: dict[str, str], targets: list[str],
             inputs: list[str]) -> Dataset:
    X, y = numeric_columns(table, inputs, targets, default_inputs=args.inputs is None)
    # the digest of the bytes parsed (read once: a pipe such as /dev/stdin gives the same digest)
    used = {name: unit for name, unit in units.items() if name in inputs or name in targets}
    return Dataset(X, y, tuple(inputs), tuple(targets), {"path": os.fspath(args.data), "sha256": table.sha256}, used)


def _columns(table: CsvTable, targets: list[str], inputs: list[str] | None) -> tuple[list[str], list[str]]:
    for option, names in (("--targets", targets), ("--inputs", inputs or [])):
        repeated = sorted({n for n in names if names.count(n) > 1})
        if repeated:
            raise CommandError(f"{option} names {', '.join(map(repr, repeated))} more than once", USAGE)
        require_columns(table, names, option)
    if inputs is None:
        inputs = [name for name in table.columns if name not in targets]
        if not inputs:
            raise CommandError(f"{table.path}: every column is a target; no input column is left", USAGE)
    both = [name for name in inputs if name in targets]
    if both:
        raise CommandError(f"{', '.join(map(repr, both))} cannot be both an input and a target", USAGE)
    return targets, inputs


def _output_paths(args: argparse.Namespace) -> tuple[Path, Path]:
    paths = [Path(args.out)] + ([Path(args.report)] if args.report else [])
    for path in paths:
        if path.is_dir() or not path.name:
            raise CommandError(f"{os.fspath(path)!r} is a folder; give a file name", USAGE)
        output_folder(path.parent)
    model_path = paths[0]
    return model_path, paths[1] if args.report else model_path.with_name(model_path.stem + ".report.json")


def _uncertainty_line(uncertainty: dict[str, Any]) -> str:
    if "unavailable" in uncertainty:
        return f"parameter uncertainty: not available ({uncertainty['unavailable']})"
    parameters = uncertainty["parameters"]
    if parameters.get("posterior"):
        interval = uncertainty["prediction_interval"]
        widths = ", ".join(f"{name} +-{w['mean']:.4g}" for name, w in interval["half_width_on_data"].items())
        noise = ", ".join(f"{sd:.4g}" for sd in parameters["noise_sd"])
        return (f"regularised fit: noise sd per target {noise}; {parameters['effective_parameters']:.1f} effective "
                f"of {parameters['n_params']} parameters, penalty {parameters['penalty']:.3g}; "
                f"{100 * interval['level']:g}% prediction interval on the training rows {widths} "
                "(posterior standard deviations and input sensitivities in the report)")
    if parameters["rank_deficient"]:
        return (f"parameter uncertainty: not available, the Jacobian is rank-deficient (rank {parameters['rank']} of "
                f"{parameters['n_params']}); see 'uncertainty' in the report")
    interval = uncertainty["prediction_interval"]
    widths = ", ".join(f"{name} +-{w['mean']:.4g}" for name, w in interval["half_width_on_data"].items())
    return (f"parameter uncertainty: residual sd {parameters['residual_sd']:.4g}, condition number "
            f"{parameters['condition_number']:.2g}; {100 * interval['level']:g}% prediction interval on the training "
            f"rows {widths} (per-parameter standard errors and input sensitivities in the report)")


def _refuse_a_network_too_large(n_in: int, hidden: Any, n_out: int, dtype: str) -> None:
    """Refuse ``--hidden`` widths whose weights alone would not fit in this machine's memory.

    ``hidden`` is ``None`` when the recipe chooses the widths itself.
    """
    if hidden is None:
        return
    widths = [n_in, *hidden, n_out]
    n_params = sum((a + 1) * b for a, b in zip(widths, widths[1:]))
    needed = n_params * np.dtype(dtype).itemsize
    available = _physical_memory()
    if available is not None and needed > available:
        raise CommandError(
            f"--hidden {','.join(map(str, hidden))}: the network would have {n_params} parameters, "
            f"{needed / 2**30:.3g} GiB for the weights alone, more than this machine's memory "
            f"({available / 2**30:.3g} GiB); use narrower layers", USAGE
        )


def _physical_memory() -> int | None:
    try:
        return os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (AttributeError, ValueError, OSError):  # not available on this platform
        return None


FAR_ABOVE_THE_MEAN = 10.0
"""A fit whose RMSE exceeds this multiple of the RMSE of predicting the training mean has failed (our choice)."""


def _refuse_a_fit_worse_than_the_mean(metrics: dict[str, Any], data: Dataset, split: Any) -> None:
    """Fail the command when the fit ended far worse than predicting the mean of the training targets.

    Only non-finite losses count as divergence in the training loop; a run
    whose weights blew up to large but finite values (a learning rate far too
    high) ends here instead. Compared on the validation rows, or the training
    rows without them.
    """
    part = "validation" if metrics.get("validation") else "training"
    rows = getattr(split, part)
    mean = data.y[split.training].mean(axis=0)
    baseline = np.sqrt(np.mean((data.y[rows] - mean) ** 2, axis=0))
    for j, name in enumerate(data.target_names):
        rmse = metrics[part]["targets"][name]["rmse"]
        if baseline[j] > 0 and not rmse <= FAR_ABOVE_THE_MEAN * baseline[j]:
            raise CommandError(
                f"fitting failed: the {part} RMSE of {name!r} is {rmse:.4g}, {rmse / baseline[j]:.3g} times the RMSE "
                f"of predicting the training mean ({baseline[j]:.4g}); the weights ran away without overflowing, "
                "usually from a learning rate far too high: lower --learning-rate (nothing was written)"
            )


def _print_metrics(metrics: dict[str, Any], data: Dataset) -> None:
    for part in ("training", "validation", "test"):
        result = metrics[part]
        if result is None:
            continue
        values = ", ".join(f"{name} {m['rmse']:.4g}" + (f" {data.units[name]}" if name in data.units else "")
                           for name, m in result["targets"].items())
        print(f"{part} RMSE ({count(result['rows'], 'row')}): {values}")
