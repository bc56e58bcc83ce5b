"""The one identifier a user chooses for generated code (``name``), checked for C and Python.

:func:`check_name` matches ``[A-Za-z_][A-Za-z0-9_]{0,63}`` and refuses C and
Python keywords; :func:`check_c_name` also refuses a leading underscore
(reserved in C); :func:`check_module_name` also refuses the name of a
standard-library module (the generated module would shadow it).
"""

from __future__ import annotations

import keyword
import re
import sys
from typing import Any

__all__ = ["C_KEYWORDS", "check_name", "check_c_name", "check_module_name"]

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


def check_c_name(name: Any) -> str:
    """:func:`check_name`, and no leading underscore (reserved identifiers, C99 7.1.3)."""
    name = check_name(name)
    if name.startswith("_"):
        raise ValueError(f"name must not start with an underscore in C (reserved, C99 7.1.3), got {name!r}")
    return name


def check_module_name(name: Any) -> str:
    """:func:`check_name`, and not the name of a standard-library module (it would shadow it)."""
    name = check_name(name)
    if name in sys.stdlib_module_names:
        raise ValueError(f"name must not be a standard-library module name (it would shadow it), got {name!r}")
    return name
