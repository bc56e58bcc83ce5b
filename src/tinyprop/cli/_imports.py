"""``--import MODULE``: run a module the user names before a model file is read.

A model file records a custom activation by its registered name, never as code
(:mod:`tinyprop.registry`), so a command can load it only after the code that
defines and registers the class has run. ``--import`` runs that code, given as

- a module name importable from ``sys.path`` (``importlib.import_module``), e.g.
  ``my_activations`` or ``plant.activations``; or
- the path of a ``.py`` file (a value ending in ``.py`` or holding a folder
  separator), loaded with ``importlib.util.spec_from_file_location`` under its
  file stem, every character other than an ASCII letter, digit or ``_``
  replaced by ``_``. A stem that names another module (already loaded, or
  importable from ``sys.path``) is refused rather than shadowing it.

Nothing is added to ``sys.path``. Importing runs the module's code with the
user's rights; the model file itself still cannot run code.

Errors: a module or file that cannot be found, or a value that is neither a
module name nor a ``.py`` path, is a command-line mistake (exit status 2); an
exception raised while the module runs, a syntax error included, fails the
command (exit status 1) with ``importing X failed: <ExceptionType>: <message>``.
"""

from __future__ import annotations

import argparse
import importlib
import importlib.util
import re
import sys
from pathlib import Path
from typing import Sequence

from ._common import USAGE, CommandError

HELP = ("before reading the model, import MODULE so that the custom activations it registers "
        "(tinyprop.register_activation) can be loaded: a module name importable from sys.path, or the path of "
        "a .py file; repeatable. This RUNS the module's code: name only code you trust")


def add_import_option(parser: argparse.ArgumentParser) -> None:
    """Add the repeatable ``--import MODULE`` option (stored as ``args.imports``, a list)."""
    parser.add_argument("--import", dest="imports", action="append", default=[], metavar="MODULE", help=HELP)


def import_modules(values: Sequence[str]) -> None:
    """Import each module name or ``.py`` path in ``values``, in order (module docstring)."""
    for value in values:
        path = Path(value)
        if path.suffix == ".py" or path.name != value:
            _import_file(value, path)
        else:
            _import_name(value)


def _import_name(name: str) -> None:
    if not all(part.isidentifier() for part in name.split(".")):
        raise CommandError(f"--import {name!r}: expected a module name such as my_activations, "
                           "or the path of a .py file", USAGE)
    try:
        importlib.import_module(name)
    except ModuleNotFoundError as exc:
        if exc.name is not None and (name == exc.name or name.startswith(exc.name + ".")):
            raise CommandError(f"--import {name}: no module named {exc.name!r} on the module search path "
                               "(sys.path); add its folder to PYTHONPATH or give the path of its .py file",
                               USAGE) from None
        raise _failed(name, exc) from None  # the module itself imports something missing
    except (Exception, SystemExit) as exc:
        raise _failed(name, exc) from None


def _import_file(value: str, path: Path) -> None:
    if path.suffix != ".py":
        raise CommandError(f"--import {value}: expected the path of a .py file or a module name", USAGE)
    if not path.is_file():
        reason = "is a folder" if path.is_dir() else "does not exist"
        raise CommandError(f"--import {value}: the file {reason}", USAGE)
    origin = path.resolve()
    name = re.sub(r"[^A-Za-z0-9_]", "_", path.stem)
    name = name if name[:1].isalpha() or name[:1] == "_" else "_" + name
    other = _module_origin(name)
    if other == origin and name in sys.modules:
        return  # this very file was imported already
    if other is not None and other != origin:
        raise CommandError(f"--import {value}: its module name {name!r} (from the file name) is already the "
                           f"module {other}; rename the file", USAGE)
    spec = importlib.util.spec_from_file_location(name, origin)
    assert spec is not None and spec.loader is not None  # a .py path always has a source loader
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module  # as an import would, so that the module can find itself (dataclasses, ...)
    try:
        spec.loader.exec_module(module)
    except (Exception, SystemExit) as exc:
        del sys.modules[name]
        raise _failed(value, exc) from None


def _module_origin(name: str) -> Path | str | None:
    """Where the module ``name`` (loaded, or importable from ``sys.path``) comes from; ``None`` if nowhere."""
    module = sys.modules.get(name)
    spec = getattr(module, "__spec__", None) if module is not None else importlib.util.find_spec(name)
    if module is not None and spec is None:
        return f"{name!r} loaded in this program"
    if spec is None:
        return None
    return Path(spec.origin).resolve() if spec.has_location and spec.origin else f"{name!r} ({spec.origin})"


def _failed(label: str, exc: BaseException) -> CommandError:
    detail = " ".join(str(exc).split())  # one line, whatever the message holds
    return CommandError(f"importing {label} failed: {type(exc).__name__}" + (f": {detail}" if detail else ""))
