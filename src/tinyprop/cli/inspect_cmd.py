"""``tinyprop inspect``: what a model file holds, after verifying every hash and field."""

from __future__ import annotations

import argparse

from ..modelfile import describe
from ._common import read_model
from ._imports import add_import_option, import_modules

HELP = "show a model file's layers, shapes, parameter count, dtype, fingerprint and metadata"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("model", metavar="MODEL.npz", help="model file written by tinyprop")
    add_import_option(parser)


def run(args: argparse.Namespace) -> int:
    import_modules(args.imports)
    model = read_model(args.model)
    print(f"file: {args.model} (format version {model.format_version}, written by tinyprop "
          f"{model.tinyprop_version}; every array hash and the fingerprint verified)")
    print(describe(model.network, model.metadata))
    return 0
