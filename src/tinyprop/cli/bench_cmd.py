"""``tinyprop bench``: the bundled benchmark (:mod:`tinyprop.benchmarks`), a few minutes on a laptop."""

from __future__ import annotations

import argparse

HELP = "run the bundled speed and memory benchmark (a few minutes; --quick for a seconds-long smoke run)"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--quick", action="store_true", help="seconds-long smoke run (figures not meaningful)")
    parser.add_argument("--json", metavar="PATH", help="also write the results as JSON to PATH")
    parser.add_argument("--threads", type=int, metavar="N", help="BLAS threads (default: BLAS's own choice)")
    parser.add_argument("--strict", action="store_true", help="exit with status 1 when a figure misses its bar")


def run(args: argparse.Namespace) -> int:
    from ..benchmarks import main

    argv = (["--quick"] if args.quick else []) + (["--json", args.json] if args.json else [])
    argv += ["--threads", str(args.threads)] if args.threads is not None else []
    argv += ["--strict"] if args.strict else []
    return int(main(argv))
