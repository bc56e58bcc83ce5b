"""Writing generated source safely: escaped free text, the C header frame, the files themselves.

Every piece of free text that comes from a model or its author and reaches
generated code passes through one of these functions (the one user-chosen
identifier is checked by :mod:`tinyprop.export._identifiers`, the ``metadata``
argument by :mod:`tinyprop.export._metadata`):

- :func:`comment_text` -- free text placed in a comment (metadata names,
  units, description): the result is printable ASCII only, contains no line
  break, no ``*/`` or ``/*`` (which would end or nest a C block comment) and no
  ``??`` (C trigraphs);
- :func:`python_literal` -- free text placed in a Python string literal: the
  result of :func:`ascii`, which evaluates back to exactly the original string
  and is printable ASCII;
- :func:`c_block_comment` -- such lines as a C block comment;
- :func:`c_header` -- a C header file: include guard, ``extern "C"`` block for
  C++ callers, one declaration;
- :func:`write_source` -- the last guard: a generated file is written only if
  it is printable ASCII with LF line ends.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from pathlib import Path
from typing import Any

__all__ = ["comment_text", "python_literal", "c_block_comment", "c_header", "output_directory", "write_source"]

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


def c_block_comment(lines: Sequence[str]) -> list[str]:
    """``lines`` (already safe, see :func:`comment_text`) as one C block comment, trailing spaces removed."""
    return ["/*"] + [f" * {line}".rstrip() for line in lines] + [" */"]


def c_header(
    macro: str, comment: Sequence[str], defines: Sequence[str], declaration: str, *, includes: Sequence[str] = ()
) -> str:
    """The text of a C header: ``comment``, the guard ``<macro>_H``, ``includes``, ``defines`` and
    ``declaration`` inside ``extern "C"`` for C++ callers."""
    guard = f"{macro}_H"
    lines = [*comment, "", f"#ifndef {guard}", f"#define {guard}", ""]
    if includes:
        lines += [*includes, ""]
    lines += [*defines, "", "#ifdef __cplusplus", 'extern "C" {', "#endif", "", f"{declaration};", "",
              "#ifdef __cplusplus", "}", "#endif", "", f"#endif /* {guard} */"]
    return "\n".join(lines) + "\n"


def output_directory(path: Any) -> Path:
    """``path`` as an existing directory, or a ``ValueError`` saying what it is instead."""
    directory = Path(path)
    if not directory.is_dir():
        what = "is a file" if directory.exists() else "does not exist"
        raise ValueError(
            f"path must be an existing directory (the files are named after `name`), but {str(directory)!r} {what}"
        )
    return directory


def write_source(directory: Path, filename: str, text: str) -> Path:
    """Write generated source with LF line ends; it must be printable ASCII (a guard against bugs)."""
    stray = sorted({c for c in text if not (" " <= c <= "~" or c == "\n")})
    if stray:
        raise RuntimeError(f"generated {filename} holds the characters {stray}; this is a bug in tinyprop")
    target = directory / filename
    with open(target, "w", encoding="ascii", newline="\n") as handle:
        handle.write(text)
    return target
