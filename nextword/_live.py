"""``nextword live``: type in a terminal and watch the choice row follow every key.

Keys: letters and punctuation type; Backspace deletes; Tab accepts the first suggestion,
Alt+1 … Alt+9 (Esc then a digit) accept the n-th; Enter starts a new message;
Ctrl-D or Ctrl-C quits. Accepting replaces the partial word and adds a space.
"""

from __future__ import annotations

import codecs
import os
import sys
import termios
import time
import tty

from .model import Model, Suggestion
from .text import parse_typed

__all__ = ["run_live", "accept"]

_CLEAR = "\x1b[2K\r"


def accept(text: str, word: str) -> str:
    """Text after accepting ``word``: the partial word at the end is replaced, a space added."""
    prefix = parse_typed(text).prefix
    base = text[: len(text) - len(prefix)] if prefix and text.endswith(prefix) else text
    return base + word + " "


def _render(out: int, text: str, sugg: list[Suggestion], micros: float) -> None:
    choices = "  ".join(f"[{i}] {s.word}" for i, s in enumerate(sugg, 1)) or "(no suggestion)"
    frame = f"{_CLEAR}\x1b[1A{_CLEAR}{choices}   ({micros:.0f} µs)\n{_CLEAR}> {text}"
    os.write(out, frame.encode("utf-8"))


def run_live(model: Model, *, k: int = 5, lam: float | None = None) -> int:
    """Run the interactive loop on the controlling terminal until Ctrl-D / Ctrl-C."""
    fd_in, fd_out = sys.stdin.fileno(), sys.stdout.fileno()
    saved = termios.tcgetattr(fd_in)
    decoder = codecs.getincrementaldecoder("utf-8")(errors="replace")
    text = ""
    escape = False
    try:
        # cbreak before the banner: keys typed after it are never flushed away
        tty.setcbreak(fd_in, termios.TCSANOW)
        os.write(fd_out, b"nextword live: Tab accepts the first suggestion, Alt+N the N-th, Ctrl-D quits\n\n")
        while True:
            t0 = time.perf_counter()
            sugg = model.suggest(text, k, lam=lam)
            micros = (time.perf_counter() - t0) * 1e6
            _render(fd_out, text, sugg, micros)
            data = os.read(fd_in, 64)
            if not data:
                break
            chars = decoder.decode(data)
            stop = False
            for ch in chars:
                if escape:
                    escape = False
                    if ch.isdigit() and 1 <= int(ch) <= len(sugg):
                        text = accept(text, sugg[int(ch) - 1].word)
                    continue
                if ch in ("\x03", "\x04"):
                    stop = True
                    break
                if ch == "\x1b":
                    escape = True
                elif ch == "\t":
                    if sugg:
                        text = accept(text, sugg[0].word)
                elif ch in ("\x7f", "\x08"):
                    text = text[:-1]
                elif ch in ("\r", "\n"):
                    os.write(fd_out, b"\n\n")
                    text = ""
                elif ch.isprintable():
                    text += ch
                # re-rank only after the whole burst of input (paste) is applied
            if stop:
                break
    finally:
        termios.tcsetattr(fd_in, termios.TCSADRAIN, saved)
        os.write(fd_out, b"\n")
    return 0
