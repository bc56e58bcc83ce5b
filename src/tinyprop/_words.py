"""Counted nouns in messages and reports: ``count(1, "row") == "1 row"``, ``count(3, "row") == "3 rows"``."""

from __future__ import annotations


def count(n: int, noun: str, plural: str | None = None) -> str:
    """``n`` and ``noun``, the noun in the plural (``plural``, or ``noun + "s"``) unless ``n == 1``.

    >>> count(1, "row"), count(0, "row"), count(2, "matrix", "matrices")
    ('1 row', '0 rows', '2 matrices')
    """
    return f"{n} {noun}" if n == 1 else f"{n} {plural or noun + 's'}"
