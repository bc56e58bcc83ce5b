"""A text buffer that says it is a terminal, for tests of progress lines rewritten in place."""

from __future__ import annotations

import io


class FakeTerminal(io.StringIO):
    def isatty(self) -> bool:
        return True
