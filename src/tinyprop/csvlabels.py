"""Class-label columns of a CSV file: the raw cell strings of one column as labels.

A companion of :mod:`tinyprop.csvdata`, which reads the file and converts
numeric columns; this module takes the cells of one column as text. A label is
the cell with surrounding blanks removed; an empty cell is a missing label, and
every missing one is reported at once, by line, in one
:class:`~tinyprop.csvdata.CsvError`.

>>> label_cells(["run", " idle ", "run"], lambda i: i + 2, "state", "plant.csv").tolist()
['run', 'idle', 'run']
>>> is_text_column(["run", "idle"]), is_text_column(["0", "1", "2"])
(True, False)
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence

import numpy as np

from .csvdata import CsvError

__all__ = ["is_text_column", "label_cells"]


def label_cells(cells: Sequence[str], line_of: Callable[[int], int], column: str, path: str) -> np.ndarray:
    """The labels of one column (cells stripped) as an array of strings; refuse empty cells.

    ``line_of(i)`` is the file line of ``cells[i]`` (asked only for empty cells); the error lists the
    lines of all empty cells (the first 20 and how many more).
    """
    labels = [cell.strip() for cell in cells]
    empty = [line_of(i) for i, label in enumerate(labels) if not label]
    if empty:
        shown = ", ".join(map(str, empty[:20])) + (f" and {len(empty) - 20} more" if len(empty) > 20 else "")
        raise CsvError(f"{path}, column {column!r}: {len(empty)} empty cell{'s' * (len(empty) > 1)} on "
                       f"line{'s' * (len(empty) > 1)} {shown}; every row needs a class label "
                       "(remove or fill those rows)")
    return np.array(labels, dtype=str)


def is_text_column(cells: Sequence[str]) -> bool:
    """True when no non-empty cell of the column is a finite number: a column of text labels."""
    for cell in cells:
        text = cell.strip()
        if not text:
            continue
        try:
            if math.isfinite(float(text)):
                return False
        except ValueError:
            continue
    return True
