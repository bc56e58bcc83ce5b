"""Pieces every subcommand uses: the error type, model and CSV loading, JSON files, plots, progress lines."""

from __future__ import annotations

import contextlib
import json
import os
import re
import sys
from pathlib import Path
from typing import Any, Iterator, Sequence

import numpy as np

from ..archive import read_archive, write_bytes_atomically
from ..csvdata import CsvError, CsvTable, read_csv
from ..envelope import Envelope, EnvelopeError
from ..modelfile import ModelFile, load_model_file
from ..plots import PLOT_HINT, PlotsUnavailable, learning_curves, parity_plot
from ..registry import activation_class

USAGE = 2  # exit status: the command line is wrong
FAILURE = 1  # exit status: a file, the data or the computation failed

SAFETY = (
    "tinyprop is not certified for safety functions; validating a network and any code generated from it "
    "against the applicable functional-safety standards, local codes and qualified review is the user's "
    "responsibility."
)


class CommandError(Exception):
    """A user mistake or a failure, reported as one line on stderr with exit status ``status``."""

    def __init__(self, message: str, status: int = FAILURE) -> None:
        super().__init__(message)
        self.status = status


# Phrases of library messages that name a Python argument, and the command-line words for them. Every error
# and warning line a command prints passes through option_words (in cli.main and warn): this is the one place.
# tests/test_cli_first_use.py checks that each phrase still occurs in the library's source.
OPTION_WORDS: tuple[tuple[str, str], ...] = (
    (r"use method='([a-z-]+)'", r"use --method \1"),
    (r"\(lr=([^)]*)\) or set clip_norm on the optimizer", r"(--learning-rate \1) or set --clip-norm"),
    (r"\b(test|validation)_fraction\b", r"--\1-fraction"),
    (r"use fewer hidden units", "use a smaller --hidden"),
    (r"choose other starting weights", "try another --seed"),
    (r"see docs/([a-z-]+)\.md", r"see 'tinyprop docs \1'"),
)


def option_words(message: str) -> str:
    """``message`` with the Python arguments it names replaced by command-line options (``OPTION_WORDS``)."""
    for pattern, replacement in OPTION_WORDS:
        message = re.sub(pattern, replacement, message)
    return message


def warn(command: str, message: str) -> None:
    """One warning line on stderr: ``tinyprop <command>: warning: <message>`` (in option words)."""
    print(f"tinyprop {command}: warning: {option_words(message)}", file=sys.stderr)


def describe_os_error(exc: OSError) -> str:
    """``"cannot open 'x.csv': No such file or directory"`` rather than ``"[Errno 2] ..."``."""
    if exc.filename is not None and exc.strerror:
        return f"cannot open {os.fspath(exc.filename)!r}: {exc.strerror}"
    return str(exc)


def read_model(path: str) -> ModelFile:
    """Load and verify a model file, turning every problem into a one-line :class:`CommandError`."""
    if not Path(path).exists():
        raise CommandError(f"model file {path!r} does not exist")
    if Path(path).is_dir():
        raise CommandError(f"{path!r} is a folder; give the path of a model file (.npz) written by tinyprop")
    try:
        return load_model_file(path)
    except OSError as exc:
        raise CommandError(describe_os_error(exc)) from None
    except ValueError as exc:  # ModelFileError: unreadable, tampered or not a model file
        unknown = _unregistered_activations(path)
        hint = (f"; with the tinyprop command, name the module or .py file that registers "
                f"{', '.join(map(repr, unknown))} with --import" if unknown else "")
        raise CommandError(f"cannot use the model file: {exc}{hint}") from None


def _unregistered_activations(path: str) -> list[str]:
    """The activation names the file's manifest lists that no class is registered under (none if unreadable)."""
    try:
        _, manifest = read_archive(path)
    except (OSError, ValueError):
        return []
    layers = manifest.get("layers")
    records = layers if isinstance(layers, list) else []
    names = {r.get("name") for r in records if isinstance(r, dict) and r.get("kind") == "activation"}
    return sorted(name for name in names if isinstance(name, str) and activation_class(name) is None)


def read_table(path: str, delimiter: str) -> CsvTable:
    """:func:`read_table_and_units` without the units: columns named without their ``[unit]``."""
    return read_table_and_units(path, delimiter)[0]


def read_table_and_units(path: str, delimiter: str) -> tuple[CsvTable, dict[str, str]]:
    """Read a CSV file (:func:`tinyprop.csvdata.read_csv`) and split the units off its header (:func:`split_units`).

    Every problem becomes a one-line :class:`CommandError`.
    """
    try:
        return split_units(_read_csv(path, delimiter))
    except CsvError as exc:
        raise CommandError(str(exc)) from None


_UNIT = re.compile(r"(?P<name>.*?\S)\s+\[(?P<unit>[^\[\]]*)\]")  # a space before "[": x[0] stays a name


def split_units(table: CsvTable) -> tuple[CsvTable, dict[str, str]]:
    """The table with its header cells ``name [unit]`` renamed ``name``, and a dict of the units.

    See :func:`split_header`. Two cells that give one name are refused (:class:`CsvError`).
    """
    try:
        names, units = split_header(table.columns)
    except ValueError as exc:
        raise CsvError(f"{table.path}: {exc}") from None
    return table.renamed(names), units


def split_header(cells: Sequence[str]) -> tuple[tuple[str, ...], dict[str, str]]:
    """A header cell ``name [unit]`` names the column ``name`` and gives its unit ``unit``.

    A cell without a space and ``[...]`` at its end (``note``, ``x[0]``) is a
    name with no unit. Two cells that give one name raise ``ValueError``.

    >>> split_header(("speed [rpm]", "head [m]", "note", "x[0]"))
    (('speed', 'head', 'note', 'x[0]'), {'speed': 'rpm', 'head': 'm'})
    """
    names: list[str] = []
    units: dict[str, str] = {}
    for cell in cells:
        match = _UNIT.fullmatch(cell)
        name = match["name"] if match else cell
        if name in names:
            raise ValueError(f"the header names the column {name!r} twice (with its unit or without)")
        names.append(name)
        if match and match["unit"].strip():
            units[name] = match["unit"].strip()
    return tuple(names), units


def _read_csv(path: str, delimiter: str) -> CsvTable:
    """Read a CSV file (:func:`tinyprop.csvdata.read_csv`); every problem becomes a one-line :class:`CommandError`.

    A first column without a name (row labels) is left out, with one note line on stderr saying so.
    """
    try:
        table = read_csv(path, delimiter=delimiter)
    except OSError as exc:
        raise CommandError(describe_os_error(exc)) from None
    except CsvError as exc:
        raise CommandError(str(exc)) from None
    except ValueError as exc:  # a --delimiter that cannot be used
        raise CommandError(f"--delimiter: {exc}", USAGE) from None
    if table.row_labels:
        print(f"note: {path}: the first column has no name in the header; it is read as row labels, never as an "
              "input", file=sys.stderr)
    return table


def require_columns(table: CsvTable, names: list[str], what: str) -> None:
    """:meth:`CsvTable.require_columns`, a missing column being a command-line mistake."""
    try:
        table.require_columns(names, what)
    except CsvError as exc:
        raise CommandError(str(exc), USAGE) from None


def numeric_columns(
    table: CsvTable, inputs: list[str], targets: list[str], *, default_inputs: bool = False
) -> tuple[np.ndarray, np.ndarray]:
    """``(X, y)``: the input and target columns as float64 arrays; bad cells fail the command.

    Every bad cell of the used columns is reported at once (up to
    :data:`tinyprop.csvdata.MAX_PROBLEMS` described, the rest counted). With
    ``default_inputs`` (``--inputs`` not given), a column holding text gets a
    hint that ``--inputs`` leaves it out.
    """
    try:
        values = table.numeric([*inputs, *targets])
    except CsvError as exc:
        raise CommandError(str(exc) + _text_column_hint(exc, inputs if default_inputs else [], len(table))) from None
    return np.ascontiguousarray(values[:, : len(inputs)]), np.ascontiguousarray(values[:, len(inputs):])


def _text_column_hint(exc: CsvError, default_inputs: list[str], n_rows: int) -> str:
    """A hint naming the input columns that hold text (in most rows), when ``--inputs`` was not given."""
    text = sorted({p.column for p in exc.problems if p.kind == "text" and p.column in default_inputs
                   and 2 * exc.counts.get(p.column, 0) > n_rows}, key=default_inputs.index)
    if not text:
        return ""
    hint = (f"{', '.join(map(repr, text))} {'holds' if len(text) == 1 else 'hold'} text; without --inputs every column "
            "that is not a target is an input: name the input columns with --inputs to leave "
            f"{'it' if len(text) == 1 else 'them'} out")
    return ("; " if len(exc.problems) == 1 and not exc.more else "\n  ") + hint


def stored_names(metadata: dict, key: str) -> list[str] | None:
    """The column names a model's metadata lists under ``key`` (``"inputs"`` or ``"outputs"``), if well formed."""
    entries = metadata.get(key)
    named = isinstance(entries, list) and all(isinstance(e, dict) and isinstance(e.get("name"), str) for e in entries)
    if not named:
        return None
    return [e["name"] for e in entries]


def require_one_per_input(n_in: int, *options: tuple[str, Sequence[float]]) -> None:
    """Refuse (exit 2) an option such as ``--low`` whose comma-separated numbers are not one per model input."""
    for option, values in options:
        if len(values) != n_in:
            raise CommandError(f"{option} must give one number per model input ({n_in}), got {len(values)}", USAGE)


def warn_outside_envelope(command: str, metadata: dict, X: np.ndarray, rows: str) -> None:
    """Warn on stderr when rows of ``X`` lie outside the model's stored envelope: a summary, then a line per input.

    ``rows`` names the rows in the summary (``"the 40 rows of data.csv"``).
    Distances are given in the input's unit when the metadata has one. A
    model without an envelope gets no warning; a malformed one gets one line.
    """
    try:
        envelope = Envelope.from_metadata(metadata, n_in=X.shape[1])
    except EnvelopeError as exc:
        warn(command, f"the model's stored envelope cannot be used, rows were not compared with it: {exc}")
        return
    if envelope is not None:
        warn_rows_outside(command, envelope, X, rows, _input_units(metadata, envelope.n_in))


def warn_rows_outside(command: str, envelope: Envelope, X: np.ndarray, rows: str,
                      units: list[str] | None = None) -> bool:
    """Warn on stderr when rows of ``X`` lie outside ``envelope`` (a summary, then a line per input); say whether."""
    if X.shape[0] == 0:
        return False
    result = envelope.check(X)
    if result.inside:
        return False
    outside = int(result.outside_rows.sum())
    warn(command, f"{outside} of {rows} {'lies' if outside == 1 else 'lie'} outside the model's operating envelope "
                  f"({envelope.source}); no error measured or bound proven for the model holds there:")
    for line in result.lines(units):
        warn(command, f"  {line}")
    return True


def _input_units(metadata: dict, n_in: int) -> list[str] | None:
    entries = metadata.get("inputs")
    if not isinstance(entries, list) or len(entries) != n_in:
        return None
    return [e.get("unit", "") if isinstance(e, dict) and isinstance(e.get("unit", ""), str) else "" for e in entries]


def output_folder(path: str | os.PathLike[str]) -> Path:
    """``path`` as a folder, created (with parents) if missing; refuse an existing file."""
    folder = Path(path)
    if folder.exists() and not folder.is_dir():
        raise CommandError(f"output folder {os.fspath(folder)!r} is an existing file", USAGE)
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise CommandError(f"cannot create the output folder: {describe_os_error(exc)}") from None
    return folder


def write_json(path: Path, document: dict[str, Any]) -> Path:
    """Write ``document`` as indented UTF-8 JSON (strict: no NaN or infinity), atomically.

    Readers see the previous file or the complete new one, never a mix
    (:func:`tinyprop.archive.write_bytes_atomically`).
    """
    text = json.dumps(document, indent=2, ensure_ascii=False, allow_nan=False)
    write_bytes_atomically(path, (text + "\n").encode("utf-8"))
    return path


@contextlib.contextmanager
def files_together(folder: Path) -> Iterator[None]:
    """Hold an exclusive lock on ``folder`` while writing files that must match each other (a model and its report).

    Two commands writing the same model file then write model and report one
    after the other, never interleaved, so the report on disk always
    describes the model on disk. POSIX advisory lock (``flock`` on the
    folder); elsewhere the files are still each written atomically.
    """
    try:
        import fcntl
    except ImportError:  # Windows
        yield
        return
    descriptor = os.open(folder, os.O_RDONLY)
    try:
        fcntl.flock(descriptor, fcntl.LOCK_EX)
        yield
    finally:
        os.close(descriptor)  # releases the lock



def write_plots(
    folder: Path,
    history: Any,
    actual: Any,
    predicted: Any,
    names: list[str],
    title: str,
    rows: str = "test rows",
) -> tuple[list[Path], str | None]:
    """Learning curves (when there is a per-epoch history) and the parity plot of ``actual`` vs ``predicted``.

    ``rows`` says which rows ``actual`` and ``predicted`` belong to (for the title).
    Returns the written paths and, when plots could not be drawn, a note saying why
    and how to enable them. Plotting never makes the command fail.
    """
    written: list[Path] = []
    try:
        if history is not None:
            written.append(
                learning_curves(history.training, history.validation, folder / "learning_curves.png",
                                title=f"{title}: loss per epoch", loss_name="mean squared error")
            )
        if actual is not None and len(actual):
            written.append(parity_plot(actual, predicted, folder / "parity.png", names=names,
                                       title=f"{title}: {rows}"))
    except PlotsUnavailable:
        return written, f"plots skipped: matplotlib is not installed (to enable plots: {PLOT_HINT})"
    except ValueError as exc:
        return written, f"plots skipped: {exc}"
    return written, None
