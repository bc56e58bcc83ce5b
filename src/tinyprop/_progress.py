"""One progress line on stderr for long work (``train``, ``solve``).

On a terminal the line is rewritten in place (carriage return, clear to the
end of the line) and ended with a newline when the work finishes; elsewhere
(a log file, a pipe) every update is its own line. ``every`` limits how often
an update is shown, so a fast loop does not flood a log.

:class:`EpochProgress` is the training loop's line: ``epoch 40/200  training
loss 1.2e-05  validation loss 1.3e-05  elapsed 0.3 s  remaining ~1.2 s``,
rewritten at most ten times a second on a terminal, and printed for the first
epoch, every tenth of the run and the last epoch elsewhere.
"""

from __future__ import annotations

import math
import sys
import time
from typing import Any, Callable, TextIO


class ProgressLine:
    """Show a line on ``stream`` (``sys.stderr`` as it is when the object is made), at most once per ``every`` s."""

    def __init__(
        self, every: float = 0.0, *, stream: TextIO | None = None, clock: Callable[[], float] = time.perf_counter
    ) -> None:
        self.stream = sys.stderr if stream is None else stream
        self.every = every
        self.clock = clock
        self._last = -math.inf
        self._shown = False

    @property
    def terminal(self) -> bool:
        """Whether the stream is a terminal (the line is then rewritten in place)."""
        return is_terminal(self.stream)

    def show(self, line: str, *, force: bool = False) -> None:
        """Show ``line`` unless the last one was shown less than ``every`` seconds ago (``force`` shows it anyway)."""
        now = self.clock()
        if not force and now - self._last < self.every:
            return
        self._last = now
        if self.terminal:
            self.stream.write("\r" + line + "\033[K")
        else:
            self.stream.write(line + "\n")
        self.stream.flush()
        self._shown = True

    def finish(self) -> None:
        """End the rewritten line on a terminal (nothing to do elsewhere)."""
        if self._shown and self.terminal:
            self.stream.write("\n")
            self.stream.flush()
        self._shown = False


class EpochProgress:
    """The per-epoch progress line of the training loop (see the module docstring)."""

    def __init__(self, *, stream: TextIO | None = None, clock: Callable[[], float] = time.perf_counter) -> None:
        self.line = ProgressLine(every=0.1, stream=stream, clock=clock)

    def show(
        self,
        epoch: int,
        epochs: int,
        training_loss: float,
        validation_loss: float | None,
        elapsed: float,
        remaining: float,
    ) -> None:
        """Show epoch ``epoch`` of ``epochs``; ``elapsed`` and the estimated ``remaining`` time in seconds."""
        last = epoch == epochs
        if not self.line.terminal and not (epoch == 1 or epoch % max(1, epochs // 10) == 0 or last):
            return
        text = f"epoch {epoch}/{epochs}  training loss {training_loss:.6g}"
        if validation_loss is not None:
            text += f"  validation loss {validation_loss:.6g}"
        self.line.show(text + f"  elapsed {elapsed:.1f} s  remaining ~{remaining:.1f} s",
                       force=last or not self.line.terminal)

    def finish(self) -> None:
        """End the rewritten line on a terminal."""
        self.line.finish()


def is_terminal(stream: Any) -> bool:
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError):
        return False
