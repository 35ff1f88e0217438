"""Progress lines on stderr for long work, shown only when stderr is a terminal.

One status line, rewritten in place (carriage return), at most ``1 / interval`` times a
second (10/s by default), so a caller may report after every unit of work: a skipped
update costs one clock read. The line reads

    eval [2/4] baseline λ = 0: 1,234/5,000 messages  24.7%  512 messages/s  ETA 0:07

(stage index, label, done/total, share, rate, estimated time left). A stage whose total
is unknown shows the count, the rate and the elapsed time instead. A line that has not
been redrawn for a second (a step with no progress calls of its own, such as a library's
fit) is redrawn by a small daemon thread, so its elapsed time keeps moving and the
command never looks stuck; :meth:`Progress.done` stops it (call it in a ``finally``, so
an error message starts on a clean line). Nothing at all is written, and no thread is
started, when the stream is not a terminal, so pipes, logs and ``--json`` output stay clean.

Why not tqdm or rich: one line with a stage label, a count and an ETA is this one module,
the runtime dependencies stay numpy, marisa-trie and msgpack, and this class takes a
clock and a stream, so tests drive it without sleeping.
"""

from __future__ import annotations

import shutil
import sys
import threading
import time
from typing import Callable, TextIO

__all__ = ["Progress", "format_duration", "format_amount", "DEFAULT_INTERVAL", "DEFAULT_TICK"]

DEFAULT_INTERVAL = 0.1  # seconds between redraws: at most 10 a second
DEFAULT_TICK = 1.0  # a line not redrawn for this long is redrawn by the ticker thread


def format_duration(seconds: float) -> str:
    """``m:ss`` (or ``h:mm:ss``) for an ETA or an elapsed time."""
    s = max(0, int(round(seconds)))
    h, rest = divmod(s, 3600)
    m, s = divmod(rest, 60)
    return f"{h}:{m:02}:{s:02}" if h else f"{m}:{s:02}"


def format_amount(n: float, unit: str) -> str:
    """A count with its unit; bytes in kB/MB/GB (decimal), other units with thousands separators."""
    if unit == "B":
        for scale, name in ((1e9, "GB"), (1e6, "MB"), (1e3, "kB")):
            if n >= scale:
                return f"{n / scale:.1f} {name}"
        return f"{n:.0f} B"
    text = f"{n:,.0f}" if n >= 10 or n == int(n) else f"{n:.1f}"
    return f"{text} {unit}" if unit else text


class Progress:
    """A status line for a sequence of stages; silent unless enabled (default: stream is a TTY).

    ``stages`` (if > 0) is how many stages the work has: each :meth:`stage` call then shows
    ``[i/stages]``. ``update(done, total)`` reports the current stage's position; ``total``
    0 means unknown. ``done()`` clears the line (or replaces it with a final message).
    """

    def __init__(
        self,
        label: str,
        *,
        total: int = 0,
        unit: str = "",
        stages: int = 0,
        enabled: bool | None = None,
        stream: TextIO | None = None,
        interval: float = DEFAULT_INTERVAL,
        tick: float | None = DEFAULT_TICK,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.stream = stream if stream is not None else sys.stderr
        if enabled is None:
            isatty = getattr(self.stream, "isatty", None)
            try:
                enabled = bool(isatty()) if callable(isatty) else False
            except (OSError, ValueError):  # closed or detached stream
                enabled = False
        self.enabled = enabled
        self.command = label
        self.label = label
        self.unit = unit
        self.total = total
        self.stages = stages
        self.index = 0
        self.interval = interval
        self._clock = clock
        self.start = clock()
        self._last = -float("inf")
        self._done = 0
        self._width = 0  # length of the line on screen, to blank it out when it shrinks
        self.tick = tick  # None: no ticker thread (e.g. while worker processes are forked)
        self._lock = threading.Lock()  # one writer at a time: the caller or the ticker
        self._stop = threading.Event()
        self._ticker: threading.Thread | None = None

    def stage(self, label: str, *, total: int = 0, unit: str = "") -> None:
        """Start the next stage: new label, counter reset, shown at once (even if it never updates)."""
        self.index += 1
        self.label = label
        self.total = total
        self.unit = unit
        self._done = 0
        self.start = self._clock()
        if self.enabled:
            with self._lock:
                self._draw(self.start)
            if self.tick is not None and self._ticker is None and not self._stop.is_set():
                self._ticker = threading.Thread(target=self._tick, name="nextword-progress", daemon=True)
                self._ticker.start()

    @property
    def ticking(self) -> bool:
        """True while the ticker thread is running."""
        return self._ticker is not None and self._ticker.is_alive()

    def _tick(self) -> None:
        assert self.tick is not None
        while not self._stop.wait(min(self.interval, self.tick)):
            with self._lock:
                now = self._clock()
                if not self._stop.is_set() and now - self._last >= self.tick:
                    self._draw(now)

    def update(self, done: int, total: int | None = None, extra: str = "") -> None:
        """Report ``done`` units of the current stage (``total`` replaces the stage's total)."""
        if not self.enabled:
            return
        self._done = done
        if total is not None:
            self.total = total
        now = self._clock()
        if now - self._last < self.interval and not (self.total and done >= self.total):
            return
        with self._lock:
            self._draw(now, extra)

    def advance(self, n: int = 1) -> None:
        """Add ``n`` units to the current stage."""
        self.update(self._done + n)

    def line(self, now: float, extra: str = "") -> str:
        """The status text for the current state (what a redraw writes)."""
        elapsed = max(now - self.start, 0.0)
        name = self.command + (f" [{self.index}/{self.stages}]" if self.stages else "")
        if self.label != self.command:
            name += f" {self.label}"
        done, total = self._done, self.total
        parts = []
        if total > 0:
            if self.unit == "B":
                parts.append(f"{format_amount(done, 'B')}/{format_amount(total, 'B')}")
            else:
                parts.append(f"{done:,}/{total:,}" + (f" {self.unit}" if self.unit else ""))
            parts.append(f"{min(done / total, 1.0):.1%}")
        elif done:
            parts.append(format_amount(done, self.unit))
        rate = done / elapsed if elapsed > 0 and done > 0 else 0.0
        if rate > 0:
            parts.append(format_amount(rate, self.unit or "") + "/s")
        if total > 0 and rate > 0:
            parts.append(f"ETA {format_duration(max(total - done, 0) / rate)}")
        else:
            parts.append(f"{format_duration(elapsed)} elapsed")
        if extra:
            parts.append(extra)
        return f"{name}: " + "  ".join(parts)

    def _draw(self, now: float, extra: str = "") -> None:
        self._last = now
        text = self.line(now, extra)
        cols = shutil.get_terminal_size((100, 24)).columns - 1
        text = text[: max(cols, 20)]
        pad = " " * max(self._width - len(text), 0)
        self.stream.write("\r" + text + pad)
        self.stream.flush()
        self._width = len(text)

    def done(self, message: str = "") -> None:
        """Finish: stop the ticker, clear the status line or replace it with ``message`` (when enabled).

        Safe to call more than once (the second call has nothing left to clear).
        """
        if not self.enabled:
            return
        self._stop.set()
        if self._ticker is not None and self._ticker is not threading.current_thread():
            self._ticker.join(timeout=5)
        if message:
            self.stream.write("\r" + message + " " * max(self._width - len(message), 0) + "\n")
        elif self._width:
            self.stream.write("\r" + " " * self._width + "\r")
        else:
            return
        self.stream.flush()
        self._width = 0
