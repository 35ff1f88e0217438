"""``nextword live``: type in a terminal and watch the choice row follow every key.

Keys: letters and punctuation type at the cursor; Left/Right/Home/End (also Ctrl-B,
Ctrl-F, Ctrl-A, Ctrl-E) move it, Ctrl+Left/Right by word; Backspace and Delete remove a
character, Ctrl-W the word before the cursor, Ctrl-U everything before it, Ctrl-K
everything after it; Tab accepts the first suggestion, Alt+1 … Alt+9 (or Esc, then the
digit) the n-th; Enter sends the message (it joins the list below and the line clears);
Ctrl-L redraws; Ctrl-D or Ctrl-C quits. Up/Down and every other key sequence are
ignored — never typed. Suggestions are always for the text left of the cursor, and
accepting replaces the partial word there and adds a space.

Why hand-written ANSI rather than :mod:`curses`: the three pieces that matter — decoding
key sequences, laying the screen out at a given size, and painting it — are small pure
functions here (:class:`KeyDecoder`, :func:`layout`, :func:`paint`) that tests drive
directly, at any width, and curses would still hand unknown sequences through as
separate characters. Every terminal in use today speaks the few ECMA-48 / VT100 controls
we send (alternate screen, auto-wrap off, cursor position, erase). The screen is
repainted by absolute row, no row is ever wider than the terminal minus one column, and
a size change (SIGWINCH, or a different size seen at the next key) clears and repaints
everything, so nothing stale survives a narrow or resized terminal.
"""

from __future__ import annotations

import codecs
import fcntl
import os
import select
import signal
import struct
import sys
import termios
import time
import unicodedata
from dataclasses import dataclass, field
from typing import Any, NamedTuple, Sequence

from .keyboard import Channel
from .mix import Predictor
from .model import Suggestion
from .text import parse_typed

__all__ = ["HELP", "SHORT_HELP", "Key", "KeyDecoder", "LineEditor", "Frame", "layout", "paint", "display_width", "run_live"]

#: what the top row says; cut to the terminal width like every other row
HELP = "Tab or Alt+N accepts · Enter sends · Ctrl-D quits"
SHORT_HELP = "Tab/Alt+N accept · ^D quits"
#: the choice row when the engine has nothing for the typed text
NO_SUGGESTION = "(no suggestion)"
#: the size assumed when the terminal reports none (0×0 on some pseudo-terminals)
FALLBACK_SIZE = (80, 24)
_GUTTER = "> "
_HELP_MIN = 12  # columns of help the status must leave, or it is not shown
_MORE = "…"
_CSI_MAX = 32  # longer parameter strings are not keys: the sequence is swallowed whole

# entering: alternate screen, auto-wrap off (a row that is somehow too wide is cut by the
# terminal, not wrapped into the next one); leaving undoes both
_ENTER = "\x1b[?1049h\x1b[?7l"
_LEAVE = "\x1b[?7h\x1b[?1049l"


class Key(NamedTuple):
    """One decoded key press: ``name`` says what it does; ``char`` for "insert", ``n`` for "accept"."""

    name: str
    char: str = ""
    n: int = 0


_CONTROL_KEYS = {
    "\x01": "home",  # Ctrl-A
    "\x02": "left",  # Ctrl-B
    "\x03": "quit",  # Ctrl-C (signals are off: it arrives as a byte)
    "\x04": "quit",  # Ctrl-D
    "\x05": "end",  # Ctrl-E
    "\x06": "right",  # Ctrl-F
    "\x08": "backspace",  # Ctrl-H
    "\n": "send",
    "\r": "send",
    "\x0b": "kill_after",  # Ctrl-K
    "\x0c": "redraw",  # Ctrl-L
    "\x15": "kill_before",  # Ctrl-U
    "\x17": "kill_word",  # Ctrl-W
    "\x7f": "backspace",
}
# final byte of CSI (ESC [) and SS3 (ESC O) cursor sequences; both forms are in use
_CURSOR_FINALS = {"A": "up", "B": "down", "C": "right", "D": "left", "H": "home", "F": "end"}
# ESC [ n ~ (VT220 editing keys)
_TILDE_KEYS = {"1": "home", "7": "home", "4": "end", "8": "end", "3": "delete"}
_WORD_MOVES = {"right": "word_right", "left": "word_left"}


@dataclass
class KeyDecoder:
    """Bytes from the terminal → :class:`Key` values, across reads (a sequence may be split).

    Recognised sequences become keys; any other escape sequence — CSI with any parameters,
    SS3, Alt plus a key — is consumed whole and yields nothing, so none of its characters
    is ever typed. An Esc that ends a read waits for the next byte: a digit then accepts.
    """

    _utf8: codecs.IncrementalDecoder = field(default_factory=lambda: codecs.getincrementaldecoder("utf-8")(errors="replace"))
    _state: str = "text"  # text | esc | csi | ss3
    _params: str = ""

    def feed(self, data: bytes) -> list[Key]:
        """The keys completed by ``data`` (possibly none while a sequence is still open)."""
        keys: list[Key] = []
        for ch in self._utf8.decode(data):
            self._step(ch, keys)
        return keys

    def _step(self, ch: str, keys: list[Key]) -> None:
        state = self._state
        if state == "esc":
            self._state = "text"
            if ch == "[":
                self._state, self._params = "csi", ""
            elif ch == "O":
                self._state = "ss3"
            elif "1" <= ch <= "9":
                keys.append(Key("accept", n=int(ch)))
            elif ch == "\x7f":
                keys.append(Key("kill_word"))  # Alt+Backspace
            elif ch == "\x1b":
                self._state = "esc"  # a bare Esc, then the start of another sequence
            # anything else after Esc (Alt+letter, ...) is swallowed
            return
        if state == "csi":
            if "\x30" <= ch <= "\x3f" or "\x20" <= ch <= "\x2f":  # parameter / intermediate bytes
                if len(self._params) < _CSI_MAX:
                    self._params += ch
                return
            self._state = "text"
            if "\x40" <= ch <= "\x7e":  # final byte: the sequence is complete
                key = _csi_key(self._params, ch)
                if key is not None:
                    keys.append(key)
                return
            # a control character (or non-ASCII) inside a sequence aborts it and counts itself
        elif state == "ss3":
            self._state = "text"
            name = _CURSOR_FINALS.get(ch)
            if name is not None:
                keys.append(Key(name))
            return
        if ch == "\x1b":
            self._state = "esc"
        elif ch == "\t":
            keys.append(Key("accept", n=1))
        elif ch in _CONTROL_KEYS:
            keys.append(Key(_CONTROL_KEYS[ch]))
        elif ch.isprintable():
            keys.append(Key("insert", char=ch))
        # other control characters (C0 and C1) are ignored


def _csi_key(params: str, final: str) -> Key | None:
    fields = params.split(";")
    if final == "~":
        name = _TILDE_KEYS.get(fields[0])
        return Key(name) if name is not None and len(fields) == 1 else None
    name = _CURSOR_FINALS.get(final)
    if name is None or not all(f.isdigit() for f in fields if f):
        return None
    if len(fields) == 2 and fields[1] in ("3", "5") and name in _WORD_MOVES:  # Alt/Ctrl + arrow
        return Key(_WORD_MOVES[name])
    return Key(name)


def display_width(ch: str) -> int:
    """Columns a character takes in a terminal: 2 for wide East Asian forms, 0 for marks."""
    if unicodedata.combining(ch) or unicodedata.category(ch) in ("Mn", "Me", "Cf"):
        return 0
    return 2 if unicodedata.east_asian_width(ch) in ("W", "F") else 1


@dataclass
class LineEditor:
    """The message being written and the cursor in it (an index into ``text``)."""

    text: str = ""
    cursor: int = 0

    @property
    def typed(self) -> str:
        """What the engine is asked about: the text left of the cursor."""
        return self.text[: self.cursor]

    def insert(self, s: str) -> None:
        self.text = self.text[: self.cursor] + s + self.text[self.cursor :]
        self.cursor += len(s)

    def accept(self, word: str) -> None:
        """Replace the partial word left of the cursor (the one the engine completed) by ``word`` and a space."""
        typed = self.typed
        prefix = parse_typed(typed).prefix
        if prefix and typed.endswith(prefix):
            self.text = typed[: -len(prefix)] + self.text[self.cursor :]
            self.cursor -= len(prefix)
        self.insert(word + " ")

    def left(self) -> None:
        # a combining mark moves with its base character
        while self.cursor > 0:
            self.cursor -= 1
            if display_width(self.text[self.cursor]) or self.cursor == 0:
                break

    def right(self) -> None:
        if self.cursor < len(self.text):
            self.cursor += 1
            while self.cursor < len(self.text) and not display_width(self.text[self.cursor]):
                self.cursor += 1

    def home(self) -> None:
        self.cursor = 0

    def end(self) -> None:
        self.cursor = len(self.text)

    def word_left(self) -> None:
        self.cursor = self._word_start()

    def word_right(self) -> None:
        i, n = self.cursor, len(self.text)
        while i < n and self.text[i].isspace():
            i += 1
        while i < n and not self.text[i].isspace():
            i += 1
        self.cursor = i

    def backspace(self) -> None:
        start = self.cursor
        self.left()
        self.text = self.text[: self.cursor] + self.text[start:]

    def delete(self) -> None:
        start = self.cursor
        self.right()
        self.text = self.text[:start] + self.text[self.cursor :]
        self.cursor = start

    def kill_word(self) -> None:
        start = self._word_start()
        self.text = self.text[:start] + self.text[self.cursor :]
        self.cursor = start

    def kill_before(self) -> None:
        self.text = self.text[self.cursor :]
        self.cursor = 0

    def kill_after(self) -> None:
        self.text = self.text[: self.cursor]

    def clear(self) -> None:
        self.text, self.cursor = "", 0

    def _word_start(self) -> int:
        i = self.cursor
        while i > 0 and self.text[i - 1].isspace():
            i -= 1
        while i > 0 and not self.text[i - 1].isspace():
            i -= 1
        return i


_EDITS = {
    "left": LineEditor.left,
    "right": LineEditor.right,
    "home": LineEditor.home,
    "end": LineEditor.end,
    "word_left": LineEditor.word_left,
    "word_right": LineEditor.word_right,
    "backspace": LineEditor.backspace,
    "delete": LineEditor.delete,
    "kill_word": LineEditor.kill_word,
    "kill_before": LineEditor.kill_before,
    "kill_after": LineEditor.kill_after,
}


# -- layout ---------------------------------------------------------------------------------------


class Frame(NamedTuple):
    """What the screen shows: one string per row (none wider than ``width - 1``) and the cursor (row, column)."""

    lines: list[str]
    cursor: tuple[int, int]


def _cut(s: str, columns: int) -> str:
    """``s`` cut to ``columns`` display columns, with "…" where something was cut off."""
    if sum(map(display_width, s)) <= columns:
        return s
    out, used = [], 0
    for ch in s:
        w = display_width(ch)
        if used + w > columns - 1:
            break
        out.append(ch)
        used += w
    return "".join(out) + _MORE if columns >= 1 else ""


def _help(columns: int) -> str:
    """The help row's words: the long form if it fits, else the short one, cut if even that is too long."""
    return HELP if len(HELP) <= columns else _cut(SHORT_HELP, columns)


def _wrap_text(text: str, cursor: int, columns: int) -> tuple[list[str], tuple[int, int]]:
    """Break ``text`` into rows of at most ``columns`` display columns; where the cursor lands."""
    rows: list[str] = []
    row: list[str] = []
    used = 0
    where = (0, 0)
    for i, ch in enumerate(text):
        w = display_width(ch)
        if used + w > columns and row:
            rows.append("".join(row))
            row, used = [], 0
        if i == cursor:
            where = (len(rows), used)
        row.append(ch)
        used += w
    if cursor >= len(text):
        if used >= columns:  # the cursor after a full row starts the next one
            rows.append("".join(row))
            row, used = [], 0
        where = (len(rows), used)
    rows.append("".join(row))
    return rows, where


def _choice_rows(words: Sequence[str], columns: int) -> list[str]:
    """The choice row, ``[1] word  [2] word …``, wrapped between items (an item is never split)."""
    if not words:
        return [_cut(NO_SUGGESTION, columns)]
    rows: list[str] = []
    row = ""
    for i, word in enumerate(words, 1):
        item = _cut(f"[{i}] {word}", columns)
        joined = f"{row}  {item}" if row else item
        if row and sum(map(display_width, joined)) > columns:
            rows.append(row)
            row = item
        else:
            row = joined
    rows.append(row)
    return rows


def layout(
    text: str,
    cursor: int,
    choices: Sequence[str],
    *,
    width: int,
    height: int,
    status: str = "",
    sent: Sequence[str] = (),
) -> Frame:
    """The whole screen for a terminal of ``width`` × ``height``.

    Top to bottom: the help row (``status``, e.g. the query time, at its right end), the
    choice row (as many rows as the words need), the message with the cursor (wrapped,
    ``> `` before the first row), a blank row and the sent messages, newest first. When
    rows run short, the sent messages go first, then the help row, then message rows far
    from the cursor. Nothing is ever wider than ``width - 1`` columns: writing the last
    column would leave some terminals waiting to wrap.
    """
    columns = max(width - 1, 1)
    gutter = _GUTTER if columns >= len(_GUTTER) + 2 else ""
    text_rows, (crow, ccol) = _wrap_text(text, cursor, max(columns - len(gutter), 2))
    text_lines = [(gutter if i == 0 else " " * len(gutter)) + r for i, r in enumerate(text_rows)]
    choice_lines = _choice_rows(choices, columns)

    room = max(height, 1)
    help_lines: list[str] = []
    if len(choice_lines) + len(text_lines) < room:
        status_width = sum(map(display_width, status))
        keep = columns - status_width - 2 if status and status_width + 2 + _HELP_MIN <= columns else columns
        left = _help(keep)
        if keep < columns:
            left += " " * (columns - sum(map(display_width, left)) - status_width) + status
        help_lines = [left]
    choice_lines = choice_lines[: max(room - 1, 0)]
    shown = max(room - len(help_lines) - len(choice_lines), 1)
    first = min(max(crow - shown + 1, 0), max(len(text_lines) - shown, 0))
    text_lines = text_lines[first : first + shown]

    lines = help_lines + choice_lines + text_lines
    cursor_at = (len(help_lines) + len(choice_lines) + crow - first, len(gutter) + ccol)
    left_over = room - len(lines)
    if left_over >= 2 and sent:
        lines.append("")
        lines += [_cut(m, columns) for m in list(reversed(sent))[: left_over - 1]]
    return Frame(lines, cursor_at)


def paint(frame: Frame, *, height: int, clear: bool = False) -> str:
    """Terminal output that draws ``frame``: each row by absolute position, erased to its end, the rest cleared."""
    out = ["\x1b[?25l"]  # no cursor flicker while drawing
    if clear:
        out.append("\x1b[2J")
    for i, line in enumerate(frame.lines):
        out.append(f"\x1b[{i + 1};1H{line}\x1b[K")
    if len(frame.lines) < height:
        out.append(f"\x1b[{len(frame.lines) + 1};1H\x1b[J")
    row, col = frame.cursor
    out.append(f"\x1b[{row + 1};{col + 1}H\x1b[?25h")
    return "".join(out)


def format_latency(seconds: float) -> str:
    """The query time as shown: microseconds below a millisecond, where the engine usually is."""
    micros = seconds * 1e6
    return f"{micros:.0f} µs" if micros < 1000 else f"{micros / 1000:.1f} ms"


# -- the terminal -----------------------------------------------------------------------------------


def _terminal_size(fd: int) -> tuple[int, int]:
    try:
        rows, cols, _, _ = struct.unpack("HHHH", fcntl.ioctl(fd, termios.TIOCGWINSZ, b"\0" * 8))
    except OSError:
        rows = cols = 0
    return (cols, rows) if cols > 0 and rows > 0 else FALLBACK_SIZE


def _write_all(fd: int, data: bytes) -> None:
    while data:
        data = data[os.write(fd, data) :]


def _key_mode(saved: list[Any]) -> list[Any]:
    """Byte-at-a-time input without echo; Ctrl-C/Ctrl-Z/Ctrl-S arrive as bytes; output unchanged."""
    iflag, oflag, cflag, lflag, ispeed, ospeed, cc = saved
    cc = list(cc)
    cc[termios.VMIN], cc[termios.VTIME] = 1, 0
    iflag &= ~(termios.IXON | termios.ICRNL)
    lflag &= ~(termios.ICANON | termios.ECHO | termios.ISIG | termios.IEXTEN)
    return [iflag, oflag, cflag, lflag, ispeed, ospeed, cc]


def run_live(model: Predictor, *, k: int = 5, lam: float | None = None, typo: Channel | None = None) -> int:
    """Run the interactive screen on the terminal (stdin/stdout) until Ctrl-D / Ctrl-C; returns 0.

    ``typo``: typo-tolerant suggestions (:meth:`Model.suggest`)."""
    fd_in, fd_out = sys.stdin.fileno(), sys.stdout.fileno()
    saved = termios.tcgetattr(fd_in)
    wake_r, wake_w = os.pipe()
    os.set_blocking(wake_r, False)
    os.set_blocking(wake_w, False)
    # a size change wakes the select below through the signal module's wakeup fd
    try:
        old_handler = signal.signal(signal.SIGWINCH, lambda signum, frame: None)
        old_wakeup = signal.set_wakeup_fd(wake_w)
    except ValueError:  # not the main thread: the size is still re-read before every repaint
        old_handler, old_wakeup = None, -1
    editor, decoder = LineEditor(), KeyDecoder()
    sent: list[str] = []
    suggestions: list[Suggestion] = []
    asked: str | None = None
    latency = 0.0

    def suggest() -> list[Suggestion]:
        nonlocal asked, suggestions, latency
        if editor.typed != asked:  # a burst of keys (a paste, fast typing) is one query
            t0 = time.perf_counter()
            suggestions = model.suggest(editor.typed, k, lam=lam, typo=typo)
            latency = time.perf_counter() - t0
            asked = editor.typed
        return suggestions

    try:
        termios.tcsetattr(fd_in, termios.TCSANOW, _key_mode(saved))
        _write_all(fd_out, _ENTER.encode())
        size: tuple[int, int] | None = None
        clear = True
        while True:
            words = [s.word for s in suggest()]
            now = _terminal_size(fd_out)
            clear = clear or now != size
            size = now
            frame = layout(editor.text, editor.cursor, words, width=size[0], height=size[1], status=format_latency(latency), sent=sent)
            _write_all(fd_out, paint(frame, height=size[1], clear=clear).encode("utf-8"))
            clear = False
            ready, _, _ = select.select([fd_in, wake_r], [], [])
            if wake_r in ready:
                try:
                    while os.read(wake_r, 64):
                        pass
                except BlockingIOError:
                    pass
                clear = True  # a resized terminal may have reflowed what it showed: repaint all
            if fd_in not in ready:
                continue
            try:
                data = os.read(fd_in, 4096)
            except OSError:  # the terminal went away
                break
            if not data:
                break
            stop = False
            for key in decoder.feed(data):
                if key.name == "quit":
                    stop = True
                    break
                if key.name == "insert":
                    editor.insert(key.char)
                elif key.name == "accept":
                    choices = suggest()
                    if 1 <= key.n <= len(choices):
                        editor.accept(choices[key.n - 1].word)
                elif key.name == "send":
                    if editor.text.strip():
                        sent.append(editor.text)
                    editor.clear()
                elif key.name == "redraw":
                    clear = True
                elif key.name in _EDITS:
                    _EDITS[key.name](editor)
                # up, down: nothing to move to on a one-message screen
            if stop:
                break
    finally:
        try:
            _write_all(fd_out, _LEAVE.encode())
        except OSError:
            pass
        try:
            termios.tcsetattr(fd_in, termios.TCSADRAIN, saved)
        except termios.error:
            pass  # the terminal went away
        if old_handler is not None:
            signal.set_wakeup_fd(old_wakeup)
            signal.signal(signal.SIGWINCH, old_handler)
        os.close(wake_r)
        os.close(wake_w)
    return 0
