"""Progress lines on stderr for long work, shown only when stderr is a terminal."""

from __future__ import annotations

import sys
import time
from typing import TextIO

__all__ = ["Progress"]


class Progress:
    """Rewrites one status line at most a few times a second; silent unless enabled."""

    def __init__(self, label: str, *, enabled: bool | None = None, stream: TextIO | None = None) -> None:
        self.stream = stream if stream is not None else sys.stderr
        if enabled is None:
            enabled = bool(getattr(self.stream, "isatty", lambda: False)())
        self.enabled = enabled
        self.label = label
        self.start = time.monotonic()
        self._last = 0.0
        self._shown = False

    def update(self, done: int, total: int, extra: str = "") -> None:
        """Report ``done`` out of ``total`` units (bytes, words...), with an ETA when known."""
        if not self.enabled:
            return
        now = time.monotonic()
        if now - self._last < 0.25:
            return
        self._last = now
        elapsed = now - self.start
        if total > 0 and done > 0:
            frac = min(done / total, 1.0)
            eta = elapsed * (1 - frac) / frac
            msg = f"{self.label}: {frac:6.1%}  {elapsed:5.1f}s elapsed, ~{eta:4.0f}s left {extra}"
        else:
            msg = f"{self.label}: {elapsed:5.1f}s {extra}"
        self.stream.write("\r" + msg[:120].ljust(80))
        self.stream.flush()
        self._shown = True

    def done(self, message: str = "") -> None:
        """Finish the status line (and print ``message`` on it, when enabled)."""
        if not self.enabled:
            return
        if self._shown or message:
            self.stream.write("\r" + message.ljust(80) + "\n")
            self.stream.flush()
