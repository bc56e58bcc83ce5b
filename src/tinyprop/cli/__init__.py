"""The ``tinyprop`` command (also ``python -m tinyprop``).

Subcommands, one module each: ``demo``, ``train``, ``check``, ``inspect``,
``export``, ``predict``, ``bench``, ``certify``, ``docs``. Every module has ``add_arguments(parser)`` and
``run(args) -> int``; :func:`main` parses, dispatches and turns user mistakes
and failures into one line on stderr:

- exit status 0: done;
- exit status 1: a file, the data or the computation failed (a missing or
  malformed file, a non-numeric cell, a tampered model file, a failed
  gradient check, diverged training);
- exit status 2: the command line is wrong (an unknown option, a bad value, a
  column name that is not in the file);
- exit status 141: the output pipe was closed by its reader
  (``tinyprop check m.npz | head -2``); nothing more is printed.

Running out of memory and numerical warnings (overflow and the like) are
failures reported in one line too, never a traceback or a warning.

No traceback is shown for these; one would mean a bug in tinyprop.
"""

from __future__ import annotations

import argparse
import os
import sys
import warnings
from typing import NoReturn, Sequence

from .._version import __version__
from . import (
    bench_cmd,
    certify_cmd,
    check_cmd,
    demo_cmd,
    docs_cmd,
    envelope_cmd,
    export_cmd,
    inspect_cmd,
    predict_cmd,
    train_cmd,
)
from ._common import USAGE, CommandError, describe_os_error, option_words

__all__ = ["main"]

COMMANDS = {
    "demo": demo_cmd,
    "train": train_cmd,
    "check": check_cmd,
    "inspect": inspect_cmd,
    "export": export_cmd,
    "predict": predict_cmd,
    "bench": bench_cmd,
    "certify": certify_cmd,
    "envelope": envelope_cmd,
    "docs": docs_cmd,
}

SHORT_HELP = f"""tinyprop {__version__}: verified multilayer perceptrons for controllers, instruments and test rigs

Start here:   tinyprop demo        (the whole job on synthetic data in a few seconds)

Commands:
""" + "\n".join(f"  {name:<9}{module.HELP}" for name, module in COMMANDS.items()) + """

'tinyprop <command> --help' shows a command's options; 'tinyprop docs' lists the guides shipped with
tinyprop and 'tinyprop docs cli' prints the full guide to the command line.
"""


BROKEN_PIPE = 141  # the status of a command-line tool stopped by SIGPIPE (128 + 13)


def _discard_stdout() -> None:
    """Point stdout at the null device, so that the interpreter's final flush does not fail again."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    except (OSError, ValueError, AttributeError):  # stdout replaced by an object without a descriptor
        pass


class _Parser(argparse.ArgumentParser):
    """argparse, but a mistake is reported in one line (no usage block) with exit status 2."""

    def error(self, message: str) -> NoReturn:
        self.exit(USAGE, f"{self.prog}: error: {message} (see '{self.prog} --help')\n")


def build_parser() -> tuple[argparse.ArgumentParser, dict[str, argparse.ArgumentParser]]:
    """The ``tinyprop`` parser and the parser of each subcommand."""
    parser = _Parser(prog="tinyprop", description=SHORT_HELP.splitlines()[0],
                     epilog="Start with 'tinyprop demo'.")
    parser.add_argument("--version", action="version", version=f"tinyprop {__version__}")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND", title="commands")
    subparsers = {}
    for name, module in COMMANDS.items():
        subparsers[name] = commands.add_parser(name, help=module.HELP, description=module.HELP,
                                               epilog=getattr(module, "EPILOG", None),
                                               formatter_class=argparse.RawDescriptionHelpFormatter)
        module.add_arguments(subparsers[name])
    return parser, subparsers


def main(argv: Sequence[str] | None = None) -> int:
    """Run the ``tinyprop`` command with ``argv`` (default ``sys.argv[1:]``); return the exit status."""
    arguments = list(sys.argv[1:] if argv is None else argv)
    if not arguments:
        print(SHORT_HELP, end="")
        return 0
    parser, subparsers = build_parser()
    args, unknown = parser.parse_known_args(arguments)
    if args.command is None:
        parser.error(
            f"unrecognized arguments: {' '.join(unknown)}" if unknown else "give a command, e.g. 'tinyprop demo'"
        )
    if unknown:
        subparsers[args.command].error(f"unrecognized arguments: {' '.join(unknown)}")
    prefix = f"tinyprop {args.command}: error:"
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", RuntimeWarning)  # numerical trouble ends in one line, never a warning
            status = COMMANDS[args.command].run(args)
        sys.stdout.flush()  # a closed pipe shows here, not at interpreter exit
        return status
    except CommandError as exc:
        print(f"{prefix} {option_words(str(exc))}", file=sys.stderr)
        return exc.status
    except BrokenPipeError:  # the reader went away (`tinyprop check m.npz | head -2`): stop quietly
        _discard_stdout()
        return BROKEN_PIPE
    except MemoryError as exc:
        detail = f" ({exc})" if str(exc) else ""
        print(f"{prefix} not enough memory{detail}; use a smaller network or a smaller data file", file=sys.stderr)
        return 1
    except RuntimeWarning as exc:
        print(f"{prefix} numerical problem: {exc}; the data or the model hold values outside the range they can be "
              "computed in", file=sys.stderr)
        return 1
    except OSError as exc:  # a file that could not be read or written, reported without a traceback
        print(f"{prefix} {describe_os_error(exc)}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print(f"\ntinyprop {args.command}: interrupted", file=sys.stderr)
        return 130
