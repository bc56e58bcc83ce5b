"""``tinyprop export``: dependency-free inference code (C99 and/or plain Python) from a model file.

The names and units of inputs and outputs and the description stored in the
model's metadata (as ``tinyprop train`` and ``tinyprop demo`` write them) go
into the generated code's header comment and constants.
"""

from __future__ import annotations

import argparse
from typing import Any

from ..export import export_c, export_python
from ..export._text import check_name
from ._common import USAGE, CommandError, describe_os_error, output_folder, read_model
from ._imports import add_import_option, import_modules

HELP = "write C99 and/or plain-Python inference code for a model file"

LANGUAGES = ("c", "python")
_EXPORTED_KEYS = ("inputs", "outputs", "description")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("model", metavar="MODEL.npz", help="model file written by tinyprop")
    parser.add_argument("--language", choices=LANGUAGES, action="append",
                        help="c or python; repeat for both (default: both)")
    parser.add_argument("--out", default=".", metavar="DIR", help="folder for the files (default: the current "
                                                                  "folder; created if missing)")
    parser.add_argument("--name", default="model",
                        help="file and identifier prefix: model.h/model.c, model_predict(), model.py (default model)")
    parser.add_argument("--c-type", choices=("float", "double"), default="float",
                        help="number type of the C code (default float)")
    parser.add_argument("--no-metadata", action="store_true",
                        help="leave the model's names, units and description out of the code")
    add_import_option(parser)


def run(args: argparse.Namespace) -> int:
    try:
        check_name(args.name)
    except ValueError as exc:
        raise CommandError(f"--name: {exc}", USAGE) from None
    import_modules(args.imports)
    model = read_model(args.model)
    folder = output_folder(args.out)
    metadata = None if args.no_metadata else _export_metadata(model.metadata)
    languages = args.language or list(LANGUAGES)
    written = []
    try:
        if "c" in languages:
            dtype = "float32" if args.c_type == "float" else "float64"
            written += export_c(model.network, folder, name=args.name, dtype=dtype, metadata=metadata)
        if "python" in languages:
            written.append(export_python(model.network, folder, name=args.name, metadata=metadata))
    except OSError as exc:
        raise CommandError(f"cannot write the code: {describe_os_error(exc)}") from None
    except (TypeError, ValueError) as exc:
        raise CommandError(f"cannot export: {exc}") from None
    for path in written:
        print(f"wrote {path}")
    print(f"model fingerprint {model.fingerprint} (also written into the code)")
    return 0


def _export_metadata(metadata: dict[str, Any]) -> dict[str, Any] | None:
    chosen = {key: metadata[key] for key in _EXPORTED_KEYS if key in metadata}
    return chosen or None
