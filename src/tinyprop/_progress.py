"""One progress line on stderr for long work (``train``, ``solve``).

On a terminal the line is rewritten in place (carriage return, clear to the
end of the line) and ended with a newline when the work finishes; elsewhere
(a log file, a pipe) every update is its own line. ``every`` limits how often
an update is shown, so a fast loop does not flood a log.
"""

from __future__ import annotations

import math
import sys
import time
from typing import Any


class ProgressLine:
    """Show ``line`` on ``sys.stderr`` (as it is when the object is made), at most once per ``every`` seconds."""

    def __init__(self, every: float = 0.0) -> None:
        self.stream = sys.stderr
        self.every = every
        self._last = -math.inf
        self._shown = False

    @property
    def terminal(self) -> bool:
        """Whether the line goes to a terminal (rewritten in place) rather than a log file or a pipe."""
        return is_terminal(self.stream)

    def show(self, line: str, *, force: bool = False) -> None:
        """Show ``line`` unless the last one was shown less than ``every`` seconds ago (``force`` shows it anyway)."""
        now = time.perf_counter()
        if not force and now - self._last < self.every:
            return
        self._last = now
        if is_terminal(self.stream):
            self.stream.write("\r" + line + "\033[K")
        else:
            self.stream.write(line + "\n")
        self.stream.flush()
        self._shown = True

    def finish(self) -> None:
        """End the rewritten line on a terminal (nothing to do elsewhere)."""
        if self._shown and is_terminal(self.stream):
            self.stream.write("\n")
            self.stream.flush()
        self._shown = False


def is_terminal(stream: Any) -> bool:
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError):
        return False
