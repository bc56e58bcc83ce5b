"""Lists of arrays that are consecutive views of one flat vector.

``net.params`` and the gradients of ``net.backward`` are such lists: each
array is a view into one flat vector (``net.vector``, or the gradient vector
the backward pass filled), in order and without gaps. An optimizer that
receives two of them, in the same layout, can update every array with one
call per operation on the flat vectors instead of one per array; the result
is the same element for element.
"""

from __future__ import annotations

import math
from operator import is_
from typing import Sequence

import numpy as np

__all__ = ["Layout", "ViewList", "flat_vector", "view_list", "views_of"]


class ViewList(list):
    """A list of arrays that are, in order, the whole of the flat array ``vector``; made by :func:`view_list`."""

    __slots__ = ("vector", "shapes", "_items")


ViewList.__name__ = "list"  # a list in every respect; error messages that name the type say so


def view_list(arrays: tuple[np.ndarray, ...], vector: np.ndarray, shapes: tuple[tuple[int, ...], ...]) -> ViewList:
    """The :class:`ViewList` of ``arrays``, views of ``vector`` with ``shapes``.

    (A function rather than ``__init__``: list's own constructor and three
    attribute stores take half the time of a Python ``__init__``, and every
    ``net.params`` and backward pass makes one.)
    """
    made = ViewList(arrays)
    made.vector = vector
    made._items = arrays  # what the list held when it was made
    made.shapes = shapes
    return made


def flat_vector(arrays: Sequence[np.ndarray]) -> np.ndarray | None:
    """The flat vector behind ``arrays`` if it is a :class:`ViewList` nobody has changed, else ``None``."""
    if type(arrays) is not ViewList:
        return None
    items = arrays._items
    if len(arrays) != len(items):
        return None  # an element was added or removed since the list was made
    if not all(map(is_, arrays, items)):
        return None  # an element was replaced
    return arrays.vector


class Layout:
    """Where arrays of the given shapes lie, one after another, in a flat vector.

    Made once per list of shapes, so that views of each new vector are cut
    without recomputing the offsets (a backward pass without a workspace makes
    one such list per call).
    """

    __slots__ = ("shapes", "size", "_parts")

    def __init__(self, shapes: tuple[tuple[int, ...], ...]) -> None:
        parts, start = [], 0
        for shape in shapes:
            stop = start + math.prod(shape)
            parts.append((slice(start, stop), shape if len(shape) != 1 else None))  # a 1-D slice needs no reshape
            start = stop
        self.shapes = shapes
        self.size = start
        self._parts = tuple(parts)

    def views(self, vector: np.ndarray) -> ViewList:
        """Consecutive views of ``vector`` (of length :attr:`size`) with these shapes."""
        views = tuple([vector[part] if shape is None else vector[part].reshape(shape) for part, shape in self._parts])
        return view_list(views, vector, self.shapes)


def views_of(vector: np.ndarray, shapes: tuple[tuple[int, ...], ...]) -> ViewList:
    """Consecutive views of ``vector`` with the given shapes (their sizes must add up to its length)."""
    return Layout(shapes).views(vector)
