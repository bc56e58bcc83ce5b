"""Text safety for generated source: identifiers, comments, string literals, metadata.

Every piece of text that comes from a model or its author and reaches generated
code passes through one of these functions:

- :func:`check_name` -- the one user-chosen identifier (``name``), matched
  against ``[A-Za-z_][A-Za-z0-9_]{0,63}`` and refused if it is a C or Python
  keyword;
- :func:`comment_text` -- free text placed in a comment (metadata names,
  units, description): the result is printable ASCII only, contains no line
  break, no ``*/`` or ``/*`` (which would end or nest a C block comment) and no
  ``??`` (C trigraphs);
- :func:`python_literal` -- free text placed in a Python string literal: the
  result of :func:`ascii`, which evaluates back to exactly the original string
  and is printable ASCII;
- :func:`check_metadata` -- the shape and types of the ``metadata`` argument;
- :func:`write_source` -- the last guard: a generated file is written only if
  it is printable ASCII with LF line ends.
"""

from __future__ import annotations

import keyword
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

__all__ = [
    "Port",
    "Metadata",
    "check_name",
    "check_metadata",
    "comment_text",
    "python_literal",
    "output_directory",
    "write_source",
]

_IDENTIFIER = re.compile(r"[A-Za-z_][A-Za-z0-9_]{0,63}")

# C99 6.4.1 keywords, plus the C11 and C23 ones so that a name stays valid for newer compilers.
C_KEYWORDS = frozenset(
    """auto break case char const continue default do double else enum extern float for goto
    if inline int long register restrict return short signed sizeof static struct switch
    typedef union unsigned void volatile while _Bool _Complex _Imaginary _Alignas _Alignof
    _Atomic _Generic _Noreturn _Static_assert _Thread_local alignas alignof bool constexpr
    false nullptr static_assert thread_local true typeof typeof_unqual""".split()
)


def check_name(name: Any) -> str:
    """Return ``name`` if it is a safe identifier for both C and Python, else raise.

    Safe means: a ``str`` matching ``[A-Za-z_][A-Za-z0-9_]{0,63}`` in full,
    and neither a C keyword nor a Python keyword.
    """
    if not isinstance(name, str):
        raise TypeError(f"name must be a str, got {type(name).__name__} {name!r}")
    if _IDENTIFIER.fullmatch(name) is None:
        raise ValueError(
            "name must match [A-Za-z_][A-Za-z0-9_]{0,63} (a letter or underscore, then up to "
            f"63 letters, digits or underscores), got {name!r}"
        )
    if name in C_KEYWORDS or keyword.iskeyword(name):
        raise ValueError(f"name must not be a C or Python keyword, got {name!r}")
    return name


def comment_text(text: str) -> str:
    """``text`` made safe for a C block comment and a Python ``#`` comment.

    Printable ASCII (space to ``~``) is kept, except that a backslash is
    doubled; every other character becomes an escape (``\\n``, ``\\x00``,
    ``\\u2028``, ``\\U0001f600``). Then ``*/`` becomes ``*\\/``, ``/*`` becomes
    ``/\\*`` and a backslash is put between two question marks. The result has
    no line break, cannot end or open a comment, and holds no trigraph.
    """
    escaped = "".join(_escape_char(c) for c in text)
    escaped = escaped.replace("*/", "*\\/").replace("/*", "/\\*")
    return re.sub(r"\?(?=\?)", "?\\\\", escaped)


def _escape_char(c: str) -> str:
    if c == "\\":
        return "\\\\"
    if " " <= c <= "~":
        return c
    return ascii(c)[1:-1]  # \n, \t, \x00, \u2028, \U0001f600 ...


def python_literal(text: str) -> str:
    """A Python string literal, printable ASCII only, that evaluates to exactly ``text``."""
    return ascii(str(text))


@dataclass(frozen=True)
class Port:
    """One input or output of the model: its name and unit ("" when not given)."""

    name: str
    unit: str = ""


@dataclass(frozen=True)
class Metadata:
    """Checked metadata: input and output descriptions (or empty) and a description."""

    inputs: tuple[Port, ...] = ()
    outputs: tuple[Port, ...] = ()
    description: str = ""


_METADATA_KEYS = ("inputs", "outputs", "description")
_PORT_KEYS = ("name", "unit")


def check_metadata(metadata: Any, n_in: int, n_out: int) -> Metadata:
    """Check and normalise the ``metadata`` argument of the exporters.

    Accepted form (every key optional)::

        {"inputs":  [{"name": str, "unit": str}, ...],   # n_in entries, in input order
         "outputs": [{"name": str, "unit": str}, ...],   # n_out entries, in output order
         "description": str}

    ``"unit"`` may be left out of an entry. Any other key is refused, so a
    misspelt key is not silently ignored. The strings may contain anything;
    they are escaped where they are written.
    """
    if metadata is None:
        return Metadata()
    if not isinstance(metadata, Mapping):
        raise TypeError(f"metadata must be a dict or None, got {type(metadata).__name__}")
    unknown = sorted(str(k) for k in metadata if k not in _METADATA_KEYS)
    if unknown:
        raise ValueError(f"metadata keys must be among {_METADATA_KEYS}, got unknown {unknown}")
    description = metadata.get("description", "")
    if not isinstance(description, str):
        raise TypeError(f"metadata['description'] must be a str, got {type(description).__name__}")
    return Metadata(
        inputs=_check_ports(metadata.get("inputs"), "inputs", n_in),
        outputs=_check_ports(metadata.get("outputs"), "outputs", n_out),
        description=description,
    )


def _check_ports(entries: Any, key: str, count: int) -> tuple[Port, ...]:
    if entries is None:
        return ()
    if isinstance(entries, (str, bytes)) or not isinstance(entries, Sequence):
        raise TypeError(f"metadata[{key!r}] must be a list of dicts, got {type(entries).__name__}")
    if len(entries) != count:
        raise ValueError(
            f"metadata[{key!r}] must have one entry per network {key[:-1]} ({count}), "
            f"got {len(entries)}"
        )
    ports = []
    for index, entry in enumerate(entries):
        where = f"metadata[{key!r}][{index}]"
        if not isinstance(entry, Mapping):
            raise TypeError(f"{where} must be a dict with 'name' and optionally 'unit', got {entry!r}")
        unknown = sorted(str(k) for k in entry if k not in _PORT_KEYS)
        if unknown or "name" not in entry:
            raise ValueError(
                f"{where} must have the key 'name' and optionally 'unit', got keys {sorted(map(str, entry))}"
            )
        values = [entry["name"], entry.get("unit", "")]
        for field, value in zip(_PORT_KEYS, values):
            if not isinstance(value, str):
                raise TypeError(f"{where}[{field!r}] must be a str, got {type(value).__name__}")
        ports.append(Port(*values))
    return tuple(ports)


def output_directory(path: Any) -> Path:
    """``path`` as a directory to write into, or a ``ValueError`` when it is an existing file.

    The rule of every export function (and of the ``tinyprop`` command): a
    missing directory, and its missing parents, are created when the first
    file is written (:func:`write_source`), so a refused call creates nothing.
    """
    directory = Path(path)
    if directory.exists() and not directory.is_dir():
        raise ValueError(
            f"path must be a directory (the files are named after `name`), but {str(directory)!r} is a file"
        )
    return directory


def write_source(directory: Path, filename: str, text: str) -> Path:
    """Write generated source with LF line ends, creating ``directory`` if missing; printable ASCII only.

    The ASCII check is a guard against bugs.
    """
    stray = sorted({c for c in text if not (" " <= c <= "~" or c == "\n")})
    if stray:
        raise RuntimeError(f"generated {filename} holds the characters {stray}; this is a bug in tinyprop")
    directory.mkdir(parents=True, exist_ok=True)
    target = directory / filename
    with open(target, "w", encoding="ascii", newline="\n") as handle:
        handle.write(text)
    return target
