"""``tinyprop envelope MODEL.npz``: show, set or widen the operating envelope stored in a model file.

Without options it prints the stored envelope. ``--low``/``--high`` set every
input's limits, ``--limits NAME=LOW,HIGH`` one input's, ``--margin FRACTION``
widens the result (:meth:`tinyprop.Envelope.widened`); the model is then
written to ``--out`` with the new envelope in its metadata. The network, and
so its fingerprint, is unchanged: metadata is not part of the fingerprint
(``docs/model-file.md``).
"""

from __future__ import annotations

import argparse

from ..envelope import Envelope, EnvelopeError
from ..modelfile import ModelFile, save
from . import _args
from ._common import USAGE, CommandError, describe_os_error, read_model, require_one_per_input, stored_names
from ._imports import add_import_option, import_modules

HELP = "show, set or widen the operating envelope stored in a model file; write the model with the new one"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("model", metavar="MODEL.npz", help="model file written by tinyprop")
    parser.add_argument("--low", type=_args.numbers, metavar="NUMBERS",
                        help="low limit of every input, comma-separated, in the model's input order (a value that "
                             "starts with '-' needs '=': --low=-1,-2); with --high")
    parser.add_argument("--high", type=_args.numbers, metavar="NUMBERS",
                        help="high limit of every input, comma-separated; with --low")
    parser.add_argument("--limits", action="append", metavar="NAME=LOW,HIGH",
                        help="set one input's limits (by its name, or its index from 0); repeat for several")
    parser.add_argument("--margin", type=_args.non_negative_float, metavar="FRACTION",
                        help="widen every input's range by FRACTION of its width on both sides (after the above)")
    parser.add_argument("--out", metavar="NEW.npz", help="model file to write with the new envelope (required "
                                                        "when an option changes it; may be MODEL.npz itself)")
    add_import_option(parser)


def run(args: argparse.Namespace) -> int:
    import_modules(args.imports)
    if (args.low is None) != (args.high is None):
        raise CommandError("give both --low and --high, or neither", USAGE)
    changes = args.low is not None or args.limits or args.margin is not None
    if changes and args.out is None:
        raise CommandError("give --out NEW.npz for the model file with the new envelope", USAGE)
    if not changes and args.out is not None:
        raise CommandError("--out needs a change: --low/--high, --limits or --margin", USAGE)
    model = read_model(args.model)
    try:
        stored = Envelope.from_metadata(model.metadata, n_in=model.network.n_in)
    except EnvelopeError as exc:
        if args.low is None:
            raise CommandError(f"{args.model}: {exc}; replace it with --low and --high") from None
        stored = None
    if not changes:
        print(f"{args.model}: " + ("no operating envelope stored" if stored is None else str(stored)))
        return 0
    envelope = _changed(args, model, stored)
    metadata = {**model.metadata, **envelope.to_metadata()}
    try:
        digest = save(model.network, args.out, metadata=metadata)
    except OSError as exc:
        raise CommandError(f"cannot write the model file: {describe_os_error(exc)}") from None
    print(envelope)
    print(f"wrote {args.out} (fingerprint {digest}, unchanged: the envelope is metadata)")
    return 0


def _changed(args: argparse.Namespace, model: ModelFile, stored: Envelope | None) -> Envelope:
    n_in = model.network.n_in
    names = stored_names(model.metadata, "inputs")
    names = names if names is not None and len(names) == n_in else None
    envelope = stored
    try:
        if args.low is not None:
            require_one_per_input(n_in, ("--low", args.low), ("--high", args.high))
            envelope = Envelope(args.low, args.high, names, "set by user")
        for text in args.limits or []:
            which, low, high = _one_input(text)
            if envelope is None:
                raise CommandError("the model stores no envelope to change one input of; give --low and --high "
                                   "for every input", USAGE)
            envelope = envelope.with_limits(int(which) if which.isdigit() else which, low, high)
        if args.margin is not None:
            if envelope is None:
                raise CommandError("the model stores no envelope to widen; give --low and --high", USAGE)
            envelope = envelope.widened(args.margin)
    except (TypeError, ValueError) as exc:
        raise CommandError(str(exc), USAGE) from None
    assert envelope is not None
    return envelope


def _one_input(text: str) -> tuple[str, float, float]:
    """``NAME=LOW,HIGH`` as ``(NAME, LOW, HIGH)``."""
    which, sep, limits = text.rpartition("=")
    try:
        low, high = _args.numbers(limits)
    except (ValueError, argparse.ArgumentTypeError):
        low = high = None
    if not sep or not which or low is None or high is None:
        raise CommandError(f"--limits: expected NAME=LOW,HIGH (e.g. temperature=-20,60), got {text!r}", USAGE)
    return which, low, high
