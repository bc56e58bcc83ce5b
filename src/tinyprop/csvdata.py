"""Numeric columns from a CSV file with a header row, with errors that name the line and column.

The accepted format:

- UTF-8 text (a byte-order mark is allowed), fields separated by ``delimiter``
  (default ``","``), quoted the usual CSV way when needed;
- lines whose first non-blank character is ``#`` are comments, blank lines are
  skipped (both anywhere in the file);
- the first other line is the header: one unique, non-empty name per column,
  except that the *first* header cell may be empty: that column holds row
  labels (the row-name column R's ``write.csv`` writes, say); it is kept out
  of :attr:`CsvTable.columns`, so it is never used, and
  :attr:`CsvTable.row_labels` says it was there. Any other empty header cell
  is refused;
- every further line is a data row with exactly as many fields as the header.

Numbers are decimal numbers as a spreadsheet writes them: an optional sign,
digits with an optional decimal point, an optional exponent (``-12``,
``3.5``, ``.5``, ``1e-3``, ``2.5E+04``), with blanks around them allowed.
Python-only spellings (``1_000``, non-ASCII digits) are not numbers; ``nan``
and ``inf`` are refused as not finite.

**How the file is held.** :func:`read_csv` reads the file's bytes once (so a
pipe such as ``/dev/stdin`` works, and :attr:`CsvTable.sha256` is the digest
of exactly the bytes parsed), checks the header, the UTF-8 encoding and the
field count of every row, and keeps only the bytes and the offset at which
each data row starts: about the file's size plus 8 bytes per row. Two layers
work on that:

1. splitting: :meth:`CsvTable.cells` yields, for each data row, the text of
   the requested columns (it knows about quotes, comments, line ends);
2. converting: :meth:`CsvTable.numeric` turns those cells into a float64
   array written in place, collecting every bad cell (up to ``max_problems``
   described, the rest counted) before it raises one :class:`CsvError`.

Another conversion (text labels, say) is another consumer of
:meth:`CsvTable.cells`; neither layer needs to change for it. Peak memory of
``read_csv`` plus ``numeric`` stays below about three times the file size
(``tests/test_csvdata.py`` measures it).

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

import array
import csv
import hashlib
import math
import operator
import os
import stat
from dataclasses import dataclass
from typing import Callable, Iterator, Sequence

import numpy as np

__all__ = ["CsvError", "CellProblem", "CsvTable", "read_csv"]

MAX_PROBLEMS = 20
"""Bad cells described in one :class:`CsvError` by default; further ones are counted."""

_BOM = b"\xef\xbb\xbf"
_CHUNK = 4096
_LISTED_PER_COLUMN = 3  # a column with more bad cells is summarised in one line


@dataclass(frozen=True)
class CellProblem:
    """One cell that is not a usable number: its ``line`` (1-based), ``column`` name, text and what is wrong.

    ``kind`` is ``"empty"``, ``"text"`` (not a decimal number) or ``"not finite"``.
    """

    line: int
    column: str
    cell: str
    kind: str

    def describe(self) -> str:
        if self.kind == "empty":
            return "the cell is empty; every used cell must hold a number"
        if self.kind == "text":
            return f"{_shorten(self.cell)!r} is not a number"
        return f"{_shorten(self.cell)!r} is not a finite number"


class CsvError(ValueError):
    """A CSV file cannot be used: the message names the file, line and column and what is wrong.

    For bad cells, ``problems`` lists the first of them (:class:`CellProblem`),
    ``more`` counts the rest and ``counts`` maps each column with bad cells to
    their number; all are empty otherwise.
    """

    def __init__(
        self, message: str, problems: Sequence[CellProblem] = (), more: int = 0, counts: dict[str, int] | None = None
    ) -> None:
        super().__init__(message)
        self.problems = tuple(problems)
        self.more = more
        self.counts = dict(counts or {})


class CsvTable:
    """A CSV file read into memory: ``columns`` (header names), ``len(table)`` data rows.

    ``path`` is the name it was read from and ``sha256`` the SHA-256 of the
    bytes read; ``row_labels`` is true when the file's first column has no
    name (row labels, left out of ``columns``). Build it with :func:`read_csv`.
    """

    def __init__(
        self, path: str, data: bytes, columns: tuple[str, ...], starts: np.ndarray, delimiter: str, sha256: str,
        row_labels: bool = False,
    ) -> None:
        self.path = path
        self.columns = columns
        self.sha256 = sha256
        self.row_labels = row_labels
        self._data = data
        self._starts = starts  # byte offset of each data row's first character
        self._delimiter = delimiter
        self._skip = int(row_labels)  # field index of columns[0]

    def __len__(self) -> int:
        return int(self._starts.shape[0])

    def __repr__(self) -> str:
        return f"CsvTable({self.path!r}, columns={self.columns!r}, rows={len(self)})"

    def line_number(self, row: int) -> int:
        """The line of the file (1-based, as a text editor counts) on which data row ``row`` starts."""
        return self._data.count(b"\n", 0, int(self._starts[row])) + 1

    def require_columns(self, names: Sequence[str], what: str) -> None:
        """Raise :class:`CsvError` if a name in ``names`` is not a column; ``what`` says what they are for."""
        missing = [name for name in names if name not in self.columns]
        if missing:
            raise CsvError(
                f"{self.path}: no column named {', '.join(map(repr, missing))} (asked for as {what}); "
                f"the header has {', '.join(map(repr, self.columns))}"
            )

    def renamed(self, columns: Sequence[str]) -> "CsvTable":
        """The same table with the header names ``columns`` (one per column, in order)."""
        if len(columns) != len(self.columns):
            raise ValueError(f"renamed needs {len(self.columns)} column names, got {len(columns)}")
        return CsvTable(self.path, self._data, tuple(columns), self._starts, self._delimiter, self.sha256,
                        self.row_labels)

    def subset(self, indices: Sequence[int]) -> "CsvTable":
        """The same table with only the data rows at ``indices`` (in that order)."""
        return CsvTable(self.path, self._data, self.columns, self._starts[np.asarray(indices, dtype=np.intp)],
                        self._delimiter, self.sha256, self.row_labels)

    # ------------------------------------------------------------ layer 1: splitting
    def cells(self, names: Sequence[str]) -> Iterator[tuple[int, tuple[str, ...]]]:
        """For each data row in order: ``(row index, the text of the columns names, in that order)``."""
        self.require_columns(names, "a column")
        pick = _picker([self._skip + self.columns.index(name) for name in names])
        data, delimiter = self._data, self._delimiter
        for first in range(0, len(self), _CHUNK):  # offsets as Python ints a chunk at a time: little memory
            for row, start in enumerate(self._starts[first:first + _CHUNK].tolist(), first):
                end = data.find(b"\n", start)
                record = data[start:] if end < 0 else data[start:end]
                fields = _split(record.decode("utf-8").removesuffix("\r"), delimiter)  # validated by read_csv
                yield row, pick(fields)

    # ------------------------------------------------------------ layer 2: converting
    def numeric(self, names: Sequence[str], *, max_problems: int = MAX_PROBLEMS) -> np.ndarray:
        """The columns ``names``, in that order, as a float64 array of shape ``(len(table), len(names))``.

        Every cell is converted; the bad ones (empty, not a number, not
        finite) are collected and reported together in one :class:`CsvError`:
        the first ``max_problems`` described with line and column, the rest
        counted. With exactly one bad cell the message is the single line
        ``"<path>, line <n>, column '<name>': <what is wrong>"``.
        """
        values = np.empty((len(self), len(names)), dtype=np.float64)
        problems: list[CellProblem] = []
        counts = dict.fromkeys(names, 0)
        count = 0
        for row, cells in self.cells(names):
            numbers = _plain_numbers(cells)
            if numbers is not None:
                values[row] = numbers
                continue
            for j, cell in enumerate(cells):
                value, kind = _number(cell)
                if kind is None:
                    values[row, j] = value
                    continue
                count += 1
                counts[names[j]] += 1
                if counts[names[j]] <= max_problems:  # the first few of every column
                    problems.append(CellProblem(self.line_number(row), names[j], cell, kind))
        if count:
            raise CsvError(self._describe(problems, counts, max_problems), problems, count - len(problems),
                           {name: n for name, n in counts.items() if n})
        return values

    def _describe(self, problems: list[CellProblem], counts: dict[str, int], limit: int) -> str:
        """One line for one bad cell; else a summary line, then a line per bad cell (up to ``limit``).

        A column with more than :data:`_LISTED_PER_COLUMN` bad cells (a text
        column, say) gets one line with its count and first bad cell.
        """
        count = sum(counts.values())
        if count == 1:
            (problem,) = problems
            return f"{self.path}, line {problem.line}, column {problem.column!r}: {problem.describe()}"
        lines = [f"{self.path}: {count} cells are not usable numbers (every used cell must hold a finite number):"]
        described = 0
        for problem in problems:
            column_count = counts[problem.column]
            if column_count > _LISTED_PER_COLUMN:
                if problem is next(p for p in problems if p.column == problem.column):
                    lines.append(f"  column {problem.column!r}: {column_count} cells, the first on line "
                                 f"{problem.line}: {problem.describe()}")
                    described += column_count
            elif len(lines) <= limit:
                lines.append(f"  line {problem.line}, column {problem.column!r}: {problem.describe()}")
                described += 1
        if count > described:
            lines.append(f"  ... and {count - described} more")
        return "\n".join(lines)


def read_csv(path: str | os.PathLike[str], *, delimiter: str = ",") -> CsvTable:
    """Read the header and the data rows of a CSV file (see the module docstring for the format).

    Each line is one record: a quoted field may not span lines. The file is
    read once, so ``/dev/stdin`` and other pipes work.
    """
    if not isinstance(delimiter, str) or len(delimiter) != 1 or delimiter in '\r\n"#':
        raise ValueError(f"delimiter must be one character other than a quote, '#' or a line break, got {delimiter!r}")
    name = os.fspath(path)
    if os.path.isdir(name):
        raise CsvError(f"{name}: is a folder, not a CSV file")
    with open(name, "rb") as handle:
        if stat.S_ISREG(os.fstat(handle.fileno()).st_mode):
            data = handle.read()
        else:  # a pipe: read in pieces, joined once
            data = b"".join(iter(lambda: handle.read(1 << 20), b""))
    return _parse(name, data, delimiter)


def _parse(name: str, data: bytes, delimiter: str) -> CsvTable:
    header: tuple[str, ...] | None = None
    header_line = 0
    starts = array.array("q")
    position = len(_BOM) if data.startswith(_BOM) else 0
    line = 0
    size = len(data)
    while position < size:
        line += 1
        end = data.find(b"\n", position)
        if end < 0:
            end = size
        record = data[position:end]
        try:
            text = record.decode("utf-8").removesuffix("\r")
        except UnicodeDecodeError as exc:
            raise CsvError(
                f"{name}: not UTF-8 text (byte {position + exc.start} cannot be decoded); save the file as UTF-8 CSV"
            ) from None
        stripped = text.strip()
        if stripped and not stripped.startswith("#"):
            fields = _fields(name, line, text, delimiter)
            if header is None:
                header, header_line = _header(name, line, fields, delimiter), line
            elif len(fields) != len(header):
                raise CsvError(
                    f"{name}, line {line}: {len(fields)} fields, but the header (line {header_line}) has {len(header)}"
                )
            else:
                starts.append(position)
        position = end + 1
    if header is None:
        raise CsvError(f"{name}: no header row (the file is empty or holds only comments)")
    if not starts:
        raise CsvError(f"{name}: a header (line {header_line}) but no data rows")
    offsets = np.frombuffer(starts, dtype=np.int64)
    row_labels = header[0] == ""
    return CsvTable(name, data, header[int(row_labels):], offsets, delimiter, hashlib.sha256(data).hexdigest(),
                    row_labels)


def _picker(indices: list[int]) -> Callable[[list[str]], tuple[str, ...]]:
    """A function taking the fields at ``indices`` from a list, as a tuple (fast for every count)."""
    if len(indices) == 1:
        (index,) = indices
        return lambda fields: (fields[index],)
    return operator.itemgetter(*indices) if indices else (lambda fields: ())


def _split(text: str, delimiter: str) -> list[str]:
    """The fields of one record: a plain split when it has no quotes, the csv module otherwise."""
    if '"' not in text:
        return text.split(delimiter)
    return next(csv.reader([text], delimiter=delimiter, strict=True))


def _fields(name: str, line: int, text: str, delimiter: str) -> list[str]:
    try:
        return _split(text, delimiter)
    except csv.Error as exc:
        raise CsvError(f"{name}, line {line}: malformed CSV ({exc})") from None


def _plain_numbers(cells: tuple[str, ...]) -> list[float] | None:
    """The cells as floats when every one is a finite decimal number (the common case, checked fast), else ``None``."""
    joined = "".join(cells)
    if "_" in joined or not joined.isascii():
        return None
    try:
        numbers = [float(cell) for cell in cells]
    except ValueError:
        return None
    return numbers if math.isfinite(sum(numbers)) else None  # overflow of the sum only means the slow path


def _number(cell: str) -> tuple[float, str | None]:
    """``(value, None)`` for a finite decimal number, else ``(nan, kind)`` (``"empty"``, ``"text"``, ...)."""
    text = cell.strip()
    if not text:
        return math.nan, "empty"
    try:
        value = float(text)
    except ValueError:
        return math.nan, "text"
    if "_" in text or not text.isascii():  # Python-only spellings: 1_000, non-ASCII digits
        return math.nan, "text"
    if not math.isfinite(value):
        return math.nan, "not finite"
    return value, None


def _header(name: str, line: int, fields: list[str], delimiter: str) -> tuple[str, ...]:
    names = tuple(field.strip() for field in fields)
    if len(names) == 1 and delimiter == "," and ";" in names[0]:
        raise CsvError(
            f"{name}, line {line}: the header has a single column {_shorten(names[0])!r}; "
            "the file seems to separate fields with ';': read it with delimiter ';' (command line: --delimiter ';')"
        )
    empty = [i + 1 for i, n in enumerate(names) if not n]
    unnamed = [i for i in empty if i > 1]  # an empty first cell names the row-label column
    if unnamed or len(names) == len(empty):
        listed = f"fields {', '.join(map(str, empty[:-1]))} and {empty[-1]} are" if len(empty) > 1 else (
            f"field {empty[0]} is")
        raise CsvError(f"{name}, line {line}: header {listed} empty; every column needs a name, except that "
                       "the first may be unnamed (it is then read as row labels and never used)")
    repeated = sorted({n for n in names if names.count(n) > 1})
    if repeated:
        raise CsvError(f"{name}, line {line}: the header names {', '.join(map(repr, repeated))} more than once")
    return names


def _shorten(text: str, limit: int = 40) -> str:
    return text if len(text) <= limit else text[: limit - 3] + "..."
