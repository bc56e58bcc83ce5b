"""Numeric columns from a CSV file with a header row, with errors that name the line and column.

The accepted format:

- UTF-8 text (a byte-order mark is allowed), fields separated by ``delimiter``
  (default ``","``), quoted the usual CSV way when needed;
- lines whose first non-blank character is ``#`` are comments, blank lines are
  skipped (both anywhere in the file);
- the first other line is the header: one unique, non-empty name per column;
- every further line is a data row with exactly as many fields as the header.

Cells are read as text; :meth:`CsvTable.numeric` converts only the columns that
are asked for, so a text column (a timestamp, say) may stay in the file as
long as it is not used. A cell that is empty, not a number, or not finite
(``nan``, ``inf``) is refused with its line number (1-based, as a text editor
counts) and its column name.

Every problem raises :class:`CsvError` (a ``ValueError``); ``OSError`` is
raised unchanged when the file cannot be opened.

>>> import tempfile, pathlib
>>> path = pathlib.Path(tempfile.mkdtemp()) / "demo.csv"
>>> _ = path.write_text("# synthetic\\nx,y\\n1,2.5\\n3,4e-1\\n")
>>> table = read_csv(path)
>>> table.columns, table.numeric(["y"]).tolist()
(('x', 'y'), [[2.5], [0.4]])
"""

from __future__ import annotations

import csv
import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np

__all__ = ["CsvError", "CsvTable", "read_csv"]


class CsvError(ValueError):
    """A CSV file cannot be used: the message names the file, line and column and what is wrong."""


@dataclass(frozen=True)
class CsvTable:
    """The text of a CSV file: ``columns`` (header names) and ``rows`` (one tuple of cells per data row).

    ``line_numbers[i]`` is the line of the file on which data row ``i`` starts.
    """

    path: str
    columns: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]
    line_numbers: tuple[int, ...]

    def require_columns(self, names: Sequence[str], what: str) -> None:
        """Raise :class:`CsvError` if a name in ``names`` is not a column; ``what`` says what they are for."""
        missing = [name for name in names if name not in self.columns]
        if missing:
            raise CsvError(
                f"{self.path}: no column named {', '.join(map(repr, missing))} (asked for as {what}); "
                f"the header has {', '.join(map(repr, self.columns))}"
            )

    def subset(self, indices: Sequence[int]) -> "CsvTable":
        """The same table with only the data rows at ``indices`` (in that order)."""
        return CsvTable(
            self.path, self.columns, tuple(self.rows[i] for i in indices), tuple(self.line_numbers[i] for i in indices)
        )

    def numeric(self, names: Sequence[str]) -> np.ndarray:
        """The columns ``names``, in that order, as a float64 array of shape ``(n_rows, len(names))``."""
        self.require_columns(names, "a column")
        indices = [self.columns.index(name) for name in names]
        values = np.empty((len(self.rows), len(indices)), dtype=np.float64)
        for i, (row, line) in enumerate(zip(self.rows, self.line_numbers)):
            for j, (name, index) in enumerate(zip(names, indices)):
                values[i, j] = self._number(row[index], line, name)
        return values

    def _number(self, cell: str, line: int, column: str) -> float:
        text = cell.strip()
        where = f"{self.path}, line {line}, column {column!r}"
        if not text:
            raise CsvError(f"{where}: the cell is empty; every used cell must hold a number")
        try:
            value = float(text)
        except ValueError:
            raise CsvError(f"{where}: {_shorten(cell)!r} is not a number") from None
        if not math.isfinite(value):
            raise CsvError(f"{where}: {_shorten(cell)!r} is not a finite number")
        return value


def read_csv(path: str | os.PathLike[str], *, delimiter: str = ",") -> CsvTable:
    """Read the header and the data rows of a CSV file (see the module docstring for the format).

    Each line is one record: a quoted field may not span lines.
    """
    if not isinstance(delimiter, str) or len(delimiter) != 1 or delimiter in '\r\n"#':
        raise ValueError(f"delimiter must be one character other than a quote, '#' or a line break, got {delimiter!r}")
    name = os.fspath(path)
    if Path(name).is_dir():
        raise CsvError(f"{name}: is a folder, not a CSV file")
    with open(name, encoding="utf-8-sig", newline="") as handle:
        try:
            text = handle.read()
        except UnicodeDecodeError as exc:
            raise CsvError(
                f"{name}: not UTF-8 text (byte {exc.start} cannot be decoded); save the file as UTF-8 CSV"
            ) from None
    header: tuple[str, ...] | None = None
    header_line = 0
    rows: list[tuple[str, ...]] = []
    lines: list[int] = []
    for line, record in enumerate(text.split("\n"), 1):
        record = record.removesuffix("\r")
        if not record.strip() or record.lstrip().startswith("#"):
            continue
        fields = _fields(name, line, record, delimiter)
        if header is None:
            header, header_line = _header(name, line, fields, delimiter), line
        elif len(fields) != len(header):
            raise CsvError(
                f"{name}, line {line}: {len(fields)} fields, but the header (line {header_line}) has {len(header)}"
            )
        else:
            rows.append(fields)
            lines.append(line)
    if header is None:
        raise CsvError(f"{name}: no header row (the file is empty or holds only comments)")
    if not rows:
        raise CsvError(f"{name}: a header (line {header_line}) but no data rows")
    return CsvTable(name, header, tuple(rows), tuple(lines))


def _fields(name: str, line: int, record: str, delimiter: str) -> tuple[str, ...]:
    try:
        return tuple(next(csv.reader([record], delimiter=delimiter, strict=True)))
    except csv.Error as exc:
        raise CsvError(f"{name}, line {line}: malformed CSV ({exc})") from None


def _header(name: str, line: int, fields: tuple[str, ...], delimiter: str) -> tuple[str, ...]:
    names = tuple(field.strip() for field in fields)
    if len(names) == 1 and delimiter == "," and ";" in names[0]:
        raise CsvError(
            f"{name}, line {line}: the header has a single column {_shorten(names[0])!r}; "
            "the file seems to separate fields with ';': read it with delimiter ';' (command line: --delimiter ';')"
        )
    empty = [i + 1 for i, n in enumerate(names) if not n]
    if empty:
        raise CsvError(f"{name}, line {line}: header field {empty[0]} is empty; every column needs a name")
    repeated = sorted({n for n in names if names.count(n) > 1})
    if repeated:
        raise CsvError(f"{name}, line {line}: the header names {', '.join(map(repr, repeated))} more than once")
    return names


def _shorten(text: str, limit: int = 40) -> str:
    return text if len(text) <= limit else text[: limit - 3] + "..."
