"""``tinyprop export``: dependency-free inference code (C99 and/or plain Python) from a model file.

The names and units of inputs and outputs and the description stored in the
model's metadata (as ``tinyprop train`` and ``tinyprop demo`` write them) go
into the generated code's header comment and constants. ``--language c-fixed``
writes integer-only C (:func:`tinyprop.export_c_fixed_point`) as
``<name>_q.h`` / ``<name>_q.c``; its number formats come from the envelope
(``--envelope-low``/``--envelope-high``, else the one stored in the model),
with a proof that nothing saturates in it and a proven error bound, or else
from the input columns of a ``--calibration`` CSV file.
"""

from __future__ import annotations

import argparse
import sys
import warnings
from typing import Any

import numpy as np

from ..classify import class_entry
from ..envelope import Envelope, EnvelopeError
from ..export import ErrorBoundWarning, envelope_error_bound, export_c, export_c_fixed_point, export_python
from ..export._identifiers import check_c_name, check_module_name
from ..export.classes import fixed_point_class_agreement
from ..modelfile import ModelFile
from . import _args
from ._common import (
    USAGE,
    CommandError,
    describe_os_error,
    numeric_columns,
    output_folder,
    read_model,
    read_table,
    require_columns,
    require_one_per_input,
    stored_names,
    warn,
    warn_rows_outside,
)
from ._imports import add_import_option, import_modules

HELP = "write C99 and/or plain-Python inference code for a model file"

LANGUAGES = ("c", "python", "c-fixed")
_NAME_CHECKS = {  # what each language's export requires of --name
    "c": check_c_name,
    "python": check_module_name,
    "c-fixed": lambda name: check_c_name(f"{name}_q"),
}
DEFAULT_LANGUAGES = ("c", "python")
_EXPORTED_KEYS = ("inputs", "outputs", "description")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("model", metavar="MODEL.npz", help="model file written by tinyprop")
    parser.add_argument("--language", choices=LANGUAGES, action="append",
                        help="c, python, or c-fixed (integers only, <stdint.h>; needs --calibration); repeat for "
                             "several (default: c and python)")
    parser.add_argument("--out", default=".", metavar="DIR", help="folder for the files (default: the current "
                                                                  "folder; created if missing)")
    parser.add_argument("--name", default="model",
                        help="file and identifier prefix: model.h/model.c, model_predict(), model.py (default model)")
    parser.add_argument("--c-type", choices=("float", "double"), default="float",
                        help="number type of the C code (default float)")
    parser.add_argument("--no-metadata", action="store_true",
                        help="leave the model's names, units and description out of the code")
    parser.add_argument("--check-envelope", action="store_true",
                        help="the generated predict also reports the inputs outside the operating envelope "
                             "(--envelope-low/--envelope-high, else the one stored in the model; an error if there "
                             "is none): C: int <name>_predict returns their count; Python: predict returns "
                             "(y, outside); c-fixed: int <name>_q_predict_q returns their count")
    fixed = parser.add_argument_group("c-fixed", "number formats of the integer-only C code")
    fixed.add_argument("--calibration", metavar="DATA.csv",
                       help="rows whose input columns set the formats (cover the whole operating range)")
    fixed.add_argument("--inputs", type=_args.names, action="extend", metavar="NAMES",
                       help="input columns of DATA.csv (default: the input names stored in the model)")
    fixed.add_argument("--delimiter", default=",", help="field separator of DATA.csv (default ',')")
    fixed.add_argument("--headroom", type=_args.positive_float, default=None,
                       help="margin above the largest calibrated (or guaranteed) magnitude, at least 1 (default 2 "
                            "with --calibration, 1 with an envelope)")
    fixed.add_argument("--envelope-low", type=_args.numbers, metavar="NUMBERS",
                       help="lowest value of each input, comma-separated (with --envelope-high; default: the "
                            "envelope stored in the model)")
    fixed.add_argument("--envelope-high", type=_args.numbers, metavar="NUMBERS",
                       help="highest value of each input, comma-separated (with --envelope-low)")
    fixed.add_argument("--tolerance", type=_args.positive_float, metavar="NUMBER",
                       help="warn when a proven error bound over the envelope exceeds this (output units; default: the "
                            "model's test RMSE when tinyprop train stored it)")
    add_import_option(parser)


def run(args: argparse.Namespace) -> int:
    languages = args.language or list(DEFAULT_LANGUAGES)
    for language in dict.fromkeys(languages):  # every language's rule, before anything is written
        try:
            _NAME_CHECKS[language](args.name)
        except ValueError as exc:
            raise CommandError(f"--name: {exc} (for --language {language})", USAGE) from None
    if args.calibration is not None and "c-fixed" not in languages:
        raise CommandError("--calibration applies to --language c-fixed", USAGE)
    if (args.envelope_low is None) != (args.envelope_high is None):
        raise CommandError("--envelope-low and --envelope-high go together", USAGE)
    if args.headroom is not None and args.headroom < 1.0:
        raise CommandError(f"--headroom must be at least 1, got {args.headroom:g}", USAGE)
    import_modules(args.imports)
    model = read_model(args.model)
    envelope = _envelope(args, model)
    if "c-fixed" in languages and args.calibration is None and envelope is None:
        raise CommandError("--language c-fixed needs --calibration DATA.csv or an envelope (--envelope-low and "
                           "--envelope-high, or one stored in the model)", USAGE)
    tolerance, tolerance_source = _tolerance(args, model)
    if args.check_envelope and envelope is None:
        raise CommandError("--check-envelope: the model stores no operating envelope; give --envelope-low and "
                           "--envelope-high, or store one with 'tinyprop envelope MODEL.npz --low ... --high ... "
                           "--out NEW.npz'", USAGE)
    folder = output_folder(args.out)
    metadata = None if args.no_metadata else _export_metadata(model.metadata)
    checked = envelope if args.check_envelope else None  # the float code checks its inputs only when asked
    entry = class_entry(model.metadata)
    labels = None if entry is None else entry.get("labels")  # a classifier: add the class decision
    written, report, agreement, outside = [], None, None, False
    try:
        if "c" in languages:
            dtype = "float32" if args.c_type == "float" else "float64"
            written += export_c(model.network, folder, name=args.name, dtype=dtype, metadata=metadata, labels=labels,
                                envelope=checked)
        if "python" in languages:
            written.append(export_python(model.network, folder, name=args.name, metadata=metadata, labels=labels,
                                         envelope=checked))
        if "c-fixed" in languages:
            calibration = None if args.calibration is None else _calibration_rows(args, model)
            if calibration is not None and envelope is not None:  # the formats come from the envelope
                outside = warn_rows_outside("export", envelope, calibration, f"the calibration rows of "
                                            f"{args.calibration}")
            with warnings.catch_warnings():  # the report's warnings are printed below, one line each
                warnings.simplefilter("ignore", ErrorBoundWarning)
                report = export_c_fixed_point(model.network, folder, calibration, name=f"{args.name}_q",
                                              headroom=args.headroom, metadata=metadata, labels=labels,
                                              envelope=envelope, tolerance=tolerance,
                                              check_envelope=args.check_envelope)
            written += [report.header, report.source, *report.class_files]
            if labels is not None and calibration is not None:
                agreement = fixed_point_class_agreement(report, model.network, calibration)
        float_bound = None
        if "c" in languages and envelope is not None:
            float_bound = envelope_error_bound(model.network, envelope, dtype=dtype)
    except OSError as exc:
        raise CommandError(f"cannot write the code: {describe_os_error(exc)}") from None
    except (TypeError, ValueError) as exc:
        raise CommandError(f"cannot export: {exc}") from None
    for path in written:
        print(f"wrote {path}")
    print(f"model fingerprint {model.fingerprint} (also written into the code)")
    if envelope is not None and tolerance is not None:
        print(f"proven error bounds are compared with {tolerance_source}: "
              + ", ".join(f"{t:.3g}" for t in np.broadcast_to(tolerance, (model.network.n_out,))))
    if float_bound is not None:
        print(f"proven bound on |{args.c_type} C code - network (float64)| over the envelope, per output: "
              + ", ".join(f"{b:.3g}" for b in float_bound))
        limit = None if tolerance is None else np.broadcast_to(tolerance, float_bound.shape)
        for k in ([] if limit is None else np.flatnonzero(float_bound > limit)):
            warn("export", f"the {args.c_type} C code's proven error bound over the envelope for output {k}, "
                           f"{float_bound[k]:.3g}, exceeds {tolerance_source} ({limit[k]:.3g})")
    if report is not None:
        print(report)
        if agreement is not None:
            print(f"class decision on the {agreement.rows} calibration rows: {agreement}")
        for warning in report.warnings:
            warn("export", warning)
        return _judge_fixed_point_error(report, report.headroom, outside)
    return 0


USELESS_ERROR = 1.0  # integer code whose largest error exceeds the output range is refused (exit 1)
POOR_ERROR = 0.1  # above a tenth of the output range: a warning


def _judge_fixed_point_error(report: Any, headroom: float, outside: bool = False) -> int:
    """Exit status 1 when the integer code's error on the calibration rows exceeds the output range; warn above 10 %.

    ``outside``: calibration rows lie outside the envelope the formats came from (they saturate there).
    """
    relative = np.nan_to_num(report.max_rel_error, nan=0.0)
    worst = int(np.argmax(relative))
    share = float(relative[worst])
    if share <= POOR_ERROR:
        return 0
    cause = ("calibration rows lie outside the envelope its formats were proven over (listed above): give an "
             "envelope that covers them (--envelope-low/--envelope-high, or 'tinyprop envelope')" if outside else
             f"its formats keep too few fractional bits: lower --headroom (now {headroom:g})")
    text = (f"the integer code's largest error on the calibration rows is {100 * share:.3g}% of output {worst}'s "
            f"range; {cause}")
    if share > USELESS_ERROR:
        print(f"tinyprop export: error: {text}; the files were written for inspection but are not usable",
              file=sys.stderr)
        return 1
    warn("export", text)
    return 0


def _calibration_rows(args: argparse.Namespace, model: ModelFile) -> np.ndarray:
    """The input columns of ``--calibration``: ``--inputs``, or the input names stored in the model."""
    inputs = args.inputs or stored_names(model.metadata, "inputs")
    if inputs is None:
        raise CommandError("the model stores no input names; give --inputs", USAGE)
    if len(inputs) != model.network.n_in:
        raise CommandError(f"the model has {model.network.n_in} inputs, but {len(inputs)} columns are named: "
                           f"{', '.join(inputs)}", USAGE)
    table = read_table(args.calibration, args.delimiter)
    require_columns(table, inputs, "--inputs" if args.inputs else "the model's input names (or give --inputs)")
    X, _ = numeric_columns(table, inputs, [])
    if X.shape[0] == 0:
        raise CommandError(f"{args.calibration}: no data rows to calibrate on")
    return X


def _tolerance(args: argparse.Namespace, model: ModelFile) -> tuple[Any, str]:
    """What proven error bounds are compared with: ``--tolerance``, else the test RMSE stored by ``tinyprop train``.

    Returns ``(tolerance or None, its description)``; a stored entry that is not one positive finite
    number per output is not used.
    """
    if args.tolerance is not None:
        return args.tolerance, "--tolerance"
    training = model.metadata.get("training")
    test = training.get("test") if isinstance(training, dict) else None
    rmse = test.get("rmse") if isinstance(test, dict) else None
    n_out = model.network.n_out
    if (isinstance(rmse, list) and len(rmse) == n_out
            and all(isinstance(v, (int, float)) and np.isfinite(v) and v > 0 for v in rmse)):
        return np.array(rmse, dtype=np.float64), "the model's test RMSE (stored by tinyprop train)"
    return None, "no tolerance"


def _envelope(args: argparse.Namespace, model: ModelFile) -> Envelope | None:
    """The box of ``--envelope-low``/``--envelope-high``, else the model's stored envelope, else ``None``."""
    n_in = model.network.n_in
    if args.envelope_low is not None:
        require_one_per_input(n_in, ("--envelope-low", args.envelope_low), ("--envelope-high", args.envelope_high))
        try:
            return Envelope(args.envelope_low, args.envelope_high, source="set by user")
        except ValueError as exc:
            raise CommandError(f"--envelope-low/--envelope-high: {exc}", USAGE) from None
    try:
        return Envelope.from_metadata(model.metadata, n_in=n_in)
    except EnvelopeError as exc:
        raise CommandError(f"the model's stored envelope: {exc}") from None


def _export_metadata(metadata: dict[str, Any]) -> dict[str, Any] | None:
    chosen = {key: metadata[key] for key in _EXPORTED_KEYS if key in metadata}
    return chosen or None
