"""``tinyprop certify``: proven bounds on a saved model's outputs and slopes over an input box.

The command is :func:`tinyprop.certificate` written out: it loads the model
(verifying every hash), takes the box from ``--low`` and ``--high`` (one number
per input, in the model's input order; without them, the operating envelope
stored in the model's metadata), prints the certificate's text and, with
``--json``, writes its record. Input and output names come from the model's
metadata when it stores them. Exit status 0 when the certificate is written,
whether or not the tolerances were met (the text says which).
"""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from .._json import finite_or_none
from ..bounds import UndeclaredActivation, certificate
from ..envelope import Envelope, EnvelopeError
from . import _args
from ._common import SAFETY, USAGE, CommandError, read_model, require_one_per_input, stored_names, write_json
from ._imports import add_import_option, import_modules

HELP = "prove bounds on a model's outputs and slopes over an input box; print them, write them as JSON"
EPILOG = f"""the method, its sources and what is guaranteed: docs/guarantees.md in the tinyprop source
{SAFETY}"""


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("model", metavar="MODEL.npz", help="model file written by tinyprop")
    parser.add_argument("--low", type=_args.numbers, metavar="NUMBERS",
                        help="lower end of the box, one number per input, comma-separated (e.g. 40,2; "
                             "a value that starts with '-' needs '=': --low=-1,-2); default: the low limits of the "
                             "operating envelope stored in the model")
    parser.add_argument("--high", type=_args.numbers, metavar="NUMBERS",
                        help="upper end of the box, one number per input, comma-separated (e.g. 90,20); default: the "
                             "high limits of the stored envelope")
    parser.add_argument("--json", metavar="PATH", help="also write the certificate as JSON to PATH")
    parser.add_argument("--tolerance", type=_args.positive_float, default=1e-6,
                        help="output bounds: gap allowed, relative to the output's range (default 1e-6)")
    parser.add_argument("--slope-tolerance", type=_args.positive_float, default=1e-3,
                        help="slope bounds: gap allowed, relative to the largest slope (default 1e-3)")
    parser.add_argument("--max-seconds", type=_args.positive_float, default=20.0,
                        help="time for the whole search, half for outputs, half for slopes (default 20)")
    parser.add_argument("--max-splits", type=_args.positive_int, metavar="N",
                        help="also stop each bound's search after N box splits (a budget that does not depend on "
                             "the machine's speed)")
    add_import_option(parser)


def run(args: argparse.Namespace) -> int:
    import_modules(args.imports)
    model = read_model(args.model)
    net = model.network
    low, high = _box(args, model.metadata, net.n_in)
    require_one_per_input(net.n_in, ("--low", low), ("--high", high))
    inputs = stored_names(model.metadata, "inputs")
    outputs = stored_names(model.metadata, "outputs")
    try:
        cert = certificate(net, low, high, tolerance=args.tolerance, slope_tolerance=args.slope_tolerance,
                           max_seconds=args.max_seconds, max_splits=args.max_splits,
                           input_names=inputs if inputs and len(inputs) == net.n_in else None,
                           output_names=outputs if outputs and len(outputs) == net.n_out else None)
    except UndeclaredActivation as exc:
        raise CommandError(f"cannot bound this model: {exc}") from None
    except ValueError as exc:  # a box with low > high
        raise CommandError(str(exc), USAGE) from None
    print(f"model: {args.model}")
    print(cert.text())
    if args.json:
        written = write_json(Path(args.json), _strict(cert.as_dict()))
        print(f"certificate written to {written}")
    return 0


def _box(args: argparse.Namespace, metadata: dict[str, Any], n_in: int) -> tuple[list[float], list[float]]:
    """``--low`` and ``--high``, or without them the operating envelope stored in the model."""
    if (args.low is None) != (args.high is None):
        raise CommandError("give both --low and --high, or neither (then the model's stored envelope is the box)",
                           USAGE)
    if args.low is not None:
        return args.low, args.high
    try:
        envelope = Envelope.from_metadata(metadata, n_in=n_in)
    except EnvelopeError as exc:
        raise CommandError(f"cannot use the model's stored envelope: {exc}; give --low and --high") from None
    if envelope is None:
        raise CommandError("the model stores no operating envelope; give the box with --low and --high "
                           "(or store an envelope with 'tinyprop envelope')", USAGE)
    print(f"box: the model's operating envelope ({envelope.source})")
    return envelope.low.tolist(), envelope.high.tolist()


def _strict(value: Any) -> Any:
    """JSON has no infinity: a bound that overflowed (nothing proven) is written as ``null``."""
    if isinstance(value, dict):
        return {key: _strict(item) for key, item in value.items()}
    if isinstance(value, list):
        return [_strict(item) for item in value]
    if isinstance(value, float):
        return finite_or_none(value)
    return value
