"""``nextword live``: key decoding, the line editor, the screen layout, and the real command in a pseudo-terminal.

The screen is checked the way a user sees it: the program's output is interpreted by
pyte (a VT100/ECMA-48 terminal emulator, test extra), and the visible rows are compared
with what they must show — the choice row equal to ``Model.suggest`` for the text left
of the cursor, the message exactly, the cursor where the text says, and nothing else.
Key sequences are the ones terminals send (xterm's control sequence list and ECMA-48
§5.4 for the CSI byte classes — from memory); character widths are checked against
wcwidth, the table pyte itself uses.
"""

from __future__ import annotations

import fcntl
import os
import re
import select
import signal
import struct
import subprocess
import sys
import termios
import time
from pathlib import Path
from typing import Callable, Iterator

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import nextword
from nextword.live import HELP, NO_SUGGESTION, SHORT_HELP, Key, KeyDecoder, LineEditor, display_width, layout, paint

pyte = pytest.importorskip("pyte", reason="pyte (terminal emulator, test extra) is not installed")
wcwidth = pytest.importorskip("wcwidth", reason="wcwidth (installed with pyte) is missing")

ROOT = Path(__file__).resolve().parent.parent
CORPUS = ROOT / "examples" / "data" / "demo_messages.txt"

LEFT, RIGHT, UP, DOWN = b"\x1b[D", b"\x1b[C", b"\x1b[A", b"\x1b[B"
HOME, END, DELETE = b"\x1b[H", b"\x1b[F", b"\x1b[3~"


# -- key decoding -------------------------------------------------------------------------------


def _names(data: bytes) -> list[Key]:
    return KeyDecoder().feed(data)


def test_cursor_keys_in_both_forms_terminals_send() -> None:
    # xterm: CSI A-D / H / F in normal mode, SS3 (ESC O) in application mode; VT220 ESC [ n ~
    assert _names(b"\x1b[D\x1b[C\x1b[A\x1b[B") == [Key("left"), Key("right"), Key("up"), Key("down")]
    assert _names(b"\x1bOD\x1bOC\x1bOH\x1bOF") == [Key("left"), Key("right"), Key("home"), Key("end")]
    assert _names(b"\x1b[H\x1b[F\x1b[1~\x1b[4~\x1b[7~\x1b[8~\x1b[3~") == [
        Key("home"), Key("end"), Key("home"), Key("end"), Key("home"), Key("end"), Key("delete"),
    ]
    # Ctrl+arrow (modifier 5) and Alt+arrow (3) move by word
    assert _names(b"\x1b[1;5D\x1b[1;5C\x1b[1;3D") == [Key("word_left"), Key("word_right"), Key("word_left")]


def test_unknown_sequences_are_swallowed_whole() -> None:
    # F5, F1 (SS3 P), Shift+Tab, bracketed-paste marks, a device report, an SGR mouse report, Alt+x
    unknown = [b"\x1b[15~", b"\x1bOP", b"\x1b[Z", b"\x1b[200~", b"\x1b[201~", b"\x1b[?1;2c", b"\x1b[<0;10;5M", b"\x1bx", b"\x1b[2;5~"]
    for seq in unknown:
        assert _names(b"a" + seq + b"b") == [Key("insert", "a"), Key("insert", "b")], seq


def test_alt_digit_tab_and_control_keys() -> None:
    assert _names(b"\x1b2\t\x1b9") == [Key("accept", n=2), Key("accept", n=1), Key("accept", n=9)]
    assert _names(b"\x7f\x08\x17\x15\x0b\x01\x05\x02\x06\r\n\x0c\x03\x04") == [
        Key(n) for n in ["backspace", "backspace", "kill_word", "kill_before", "kill_after", "home", "end",
                         "left", "right", "send", "send", "redraw", "quit", "quit"]
    ]
    # other control characters (bell, Ctrl-Z, a C1 CSI as UTF-8) are never typed
    assert _names("\x07\x1a\u009b".encode()) == []


def test_a_sequence_split_across_reads_is_still_one_key() -> None:
    dec = KeyDecoder()
    got = [k for byte in b"\x1b[1;5Dx\xc3\xa9\x1b" for k in dec.feed(bytes([byte]))]
    assert got == [Key("word_left"), Key("insert", "x"), Key("insert", "é")]
    assert dec.feed(b"3") == [Key("accept", n=3)]  # Esc at the end of a read, then the digit


_SEQUENCES = st.sampled_from(
    [LEFT, RIGHT, UP, DOWN, HOME, END, DELETE, b"\x1bOA", b"\x1b[15~", b"\x1b[1;5C", b"\x1bOP", b"\x1b[?25h", b"\x1b[<35;1;2m", b"\x1bq"]
)
_PLAIN = st.text(st.characters(min_codepoint=0x20, max_codepoint=0x7E, blacklist_characters="\x1b"), min_size=1, max_size=4)


@settings(max_examples=200, deadline=None)
@given(st.lists(st.one_of(_SEQUENCES, _PLAIN.map(str.encode)), max_size=20), st.data())
def test_no_byte_of_an_escape_sequence_is_ever_typed(parts: list[bytes], data: st.DataObject) -> None:
    """Invariant: the typed characters are exactly the plain text between sequences, however the bytes are split."""
    stream = b"".join(parts)
    cuts = sorted(data.draw(st.sets(st.integers(0, len(stream)), max_size=6)))
    dec = KeyDecoder()
    keys = [k for a, b in zip([0, *cuts], [*cuts, len(stream)]) for k in dec.feed(stream[a:b])]
    typed = "".join(k.char for k in keys if k.name == "insert")
    assert typed == "".join(p.decode() for p in parts if not p.startswith(b"\x1b"))
    assert keys == KeyDecoder().feed(stream)


# -- the line editor ----------------------------------------------------------------------------


def test_editing_at_the_cursor() -> None:
    ed = LineEditor()
    ed.insert("see you at the workshop")
    for _ in range(10):  # " workshop" is 9 characters
        ed.left()
    assert ed.typed == "see you at th"
    ed.insert("X")
    assert ed.text == "see you at thXe workshop" and ed.cursor == 14
    ed.backspace()
    ed.delete()
    assert ed.text == "see you at th workshop" and ed.typed == "see you at th"
    ed.kill_word()
    assert ed.text == "see you at  workshop" and ed.typed == "see you at "
    ed.word_left()
    assert ed.typed == "see you "
    ed.word_right()
    assert ed.typed == "see you at"
    ed.end()
    ed.word_left()
    assert ed.text[ed.cursor :] == "workshop"
    ed.kill_before()
    assert (ed.text, ed.cursor) == ("workshop", 0)
    ed.right()
    ed.kill_after()
    assert (ed.text, ed.cursor) == ("w", 1)
    ed.home()
    ed.left()  # nothing left of the start
    ed.backspace()
    assert (ed.text, ed.cursor) == ("w", 0)


def test_accept_replaces_the_partial_word_left_of_the_cursor() -> None:
    for typed, after, word, want in [
        ("see you at the wor", "", "workshop", "see you at the workshop "),
        ("see you at the ", "", "workshop", "see you at the workshop "),
        ("I don'", "", "don't", "I don't "),
        ("see you at the w", "on Thursday", "workshop", "see you at the workshop on Thursday"),
    ]:
        ed = LineEditor(typed + after, len(typed))
        ed.accept(word)
        assert ed.text == want
        assert ed.typed == want[: len(want) - len(after)]


def test_a_combining_mark_moves_and_goes_with_its_letter() -> None:
    ed = LineEditor("cafe\u0301s", 6)
    ed.left()
    assert ed.typed == "cafe\u0301"
    ed.left()
    assert ed.typed == "caf"
    ed.right()
    assert ed.typed == "cafe\u0301"
    ed.backspace()
    assert ed.text == "cafs"


# -- the screen, through a terminal emulator --------------------------------------------------------


def _emulate(columns: int, rows: int) -> tuple[pyte.Screen, pyte.ByteStream]:
    screen = pyte.Screen(columns, rows)
    return screen, pyte.ByteStream(screen)


def _cells(screen: pyte.Screen, y: int, start: int, end: int | None = None) -> str:
    """Row y from column ``start`` to ``end`` as text: a wide character's second cell (pyte stores "") dropped."""
    return "".join(screen.buffer[y][x].data for x in range(start, screen.columns if end is None else end))


def test_display_width_agrees_with_wcwidth() -> None:
    for ch in "aZ9 .é€中文字ｶｸガ\u0301\u200b한😀":
        assert display_width(ch) == max(wcwidth.wcwidth(ch), 0), ch


_NARROW = st.characters(whitelist_categories=("Lu", "Ll", "Nd", "Po", "Sm"), max_codepoint=0x2FFF)
_WIDE = st.sampled_from("中文字한국어ガキ漢字🙂🚲")
_GLYPH = st.one_of(_NARROW, _WIDE)
# no spaces in these texts, so a row's trailing blanks are always padding, never text
_NO_SPACE = st.text(_GLYPH, max_size=150)
_WORDS = st.lists(st.text(_GLYPH, min_size=1, max_size=8), max_size=6)
SENT = "earlier message"


def _check_items(rows: list[str], words: list[str], width: int) -> None:
    """The choice rows hold ``[1] w1  [2] w2 …`` in order; an item is cut (with …) only if it cannot fit a row."""
    items = [item for row in rows for item in row.split("  ")]
    if not words:
        assert len(items) == 1 and (items[0] == NO_SUGGESTION or NO_SUGGESTION.startswith(items[0][:-1]))
        return
    assert len(items) == len(words)
    for i, (item, word) in enumerate(zip(items, words), 1):
        full = f"[{i}] {word}"
        if wcwidth.wcswidth(full) <= width - 1:
            assert item == full
        else:
            assert item.endswith("…") and full.startswith(item[:-1]) and wcwidth.wcswidth(item) <= width - 1


@settings(max_examples=150, deadline=None)
@given(_NO_SPACE, st.data(), st.integers(6, 130), _WORDS)
def test_layout_shows_text_cursor_and_choices_exactly_at_any_width(text: str, data: st.DataObject, width: int, words: list[str]) -> None:
    """Invariant, on a screen tall enough for everything: the last column stays blank; top to bottom the help
    row, the choice row with every word, the message (read back cell by cell) exactly, a blank row, the sent
    message, then blank rows only; the terminal's cursor sits where the cursor index says."""
    cursor = data.draw(st.integers(0, len(text)))
    height = len(text) + len(words) + 5  # every row holds at least one character or item
    frame = layout(text, cursor, words, width=width, height=height, status="12 µs", sent=[SENT])
    screen, stream = _emulate(width, height)
    stream.feed(paint(frame, height=height, clear=True).encode())
    shown = [line.rstrip() for line in screen.display]
    for y in range(height):
        assert screen.buffer[y][width - 1].data == " ", (y, shown[y])
    words_shown = shown[0].split("  ")[0]
    assert words_shown == HELP or SHORT_HELP.startswith(words_shown.rstrip("…"))
    top = next(y for y, line in enumerate(screen.display) if line.startswith("> "))
    _check_items(shown[1:top], words, width)
    sent_row = next(y for y, line in enumerate(shown) if y > top and line and SENT.startswith(line.rstrip("…")))
    assert shown[sent_row - 1] == "" and all(line == "" for line in shown[sent_row + 1 :])
    message_rows = range(top, sent_row - 1)
    assert all(screen.display[y].startswith("  ") or y == top for y in message_rows)
    assert "".join(_cells(screen, y, 2).rstrip() for y in message_rows) == text
    cy, cx = screen.cursor.y, screen.cursor.x
    assert cy in message_rows and cx >= 2
    assert "".join(_cells(screen, y, 2).rstrip() for y in message_rows if y < cy) + _cells(screen, cy, 2, cx) == text[:cursor]
    if cursor < len(text):
        assert screen.buffer[cy][cx].data == text[cursor]


@settings(max_examples=150, deadline=None)
@given(_NO_SPACE, st.data(), st.integers(1, 130), st.integers(1, 8), _WORDS)
def test_a_small_screen_keeps_the_cursor_row_and_the_choice_row(
    text: str, data: st.DataObject, width: int, height: int, words: list[str]
) -> None:
    """Invariant at any size, even 1×1: no row past the screen, the last column blank, the cursor on its character,
    and the choice row (its first row at least) above the message whenever there are two rows."""
    cursor = data.draw(st.integers(0, len(text)))
    frame = layout(text, cursor, words, width=width, height=height, status="12 µs", sent=[SENT])
    assert len(frame.lines) <= height
    screen, stream = _emulate(width, height)
    stream.feed(paint(frame, height=height, clear=True).encode())
    if width >= 3:  # from 2 usable columns on, any character fits a row
        assert all(screen.buffer[y][width - 1].data == " " for y in range(height))
    cy, cx = screen.cursor.y, screen.cursor.x
    if cursor < len(text) and width >= 3:
        assert screen.buffer[cy][cx].data == text[cursor]
    if width >= 6:
        assert screen.display[cy][:2] in ("> ", "  ")
        y = cy  # up through the message rows still on screen; above them the choice row, above it the help row
        while y > 0 and screen.display[y - 1][:2] in ("> ", "  "):
            y -= 1
        choice_rows = [row.rstrip() for row in screen.display[:y] if not row.startswith("Tab")]
        assert bool(choice_rows) == (height >= 2)
        if choice_rows:
            shown_items = sum(len(row.split("  ")) for row in choice_rows)
            _check_items(choice_rows, words[:shown_items] if words else [], width)


@settings(max_examples=150, deadline=None)
@given(_NO_SPACE, _NO_SPACE, st.data(), st.integers(6, 100), st.integers(2, 30), _WORDS, _WORDS)
def test_a_repaint_leaves_nothing_of_the_previous_screen(
    old: str, new: str, data: st.DataObject, width: int, height: int, old_words: list[str], new_words: list[str]
) -> None:
    """Invariant: painting a frame over any earlier one (no full clear, as on every key) shows exactly what
    painting it on a blank screen shows — no stale rows after text got shorter or choices fewer."""
    before = layout(old, data.draw(st.integers(0, len(old))), old_words, width=width, height=height, sent=[SENT] * 3)
    after = layout(new, data.draw(st.integers(0, len(new))), new_words, width=width, height=height)
    dirty, dirty_stream = _emulate(width, height)
    dirty_stream.feed(paint(before, height=height, clear=True).encode())
    dirty_stream.feed(paint(after, height=height).encode())
    fresh, fresh_stream = _emulate(width, height)
    fresh_stream.feed(paint(after, height=height, clear=True).encode())
    assert dirty.display == fresh.display
    assert (dirty.cursor.x, dirty.cursor.y) == (fresh.cursor.x, fresh.cursor.y)


# -- the real command in a pseudo-terminal ------------------------------------------------------------

posix_only = pytest.mark.skipif(sys.platform == "win32", reason="needs a POSIX pseudo-terminal")


def _set_size(fd: int, columns: int, rows: int) -> None:
    fcntl.ioctl(fd, termios.TIOCSWINSZ, struct.pack("HHHH", rows, columns, 0, 0))


class LiveSession:
    """``python -m nextword live MODEL`` on a pseudo-terminal that is its controlling terminal (so a size change
    sends it SIGWINCH, as a terminal window does), with pyte showing what a user would see."""

    def __init__(self, model: Path, columns: int, rows: int, *, k: int) -> None:
        self.master, slave = os.openpty()
        _set_size(slave, columns, rows)
        env = dict(os.environ, PYTHONPATH=str(ROOT), TERM="xterm-256color")
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "nextword", "live", str(model), "-k", str(k)],
            stdin=slave, stdout=slave, stderr=slave, env=env, close_fds=True, start_new_session=True,
            preexec_fn=lambda: fcntl.ioctl(0, termios.TIOCSCTTY, 0),  # after setsid: the pty becomes its terminal
        )
        os.close(slave)
        self.screen = pyte.Screen(columns, rows)
        self.stream = pyte.ByteStream(self.screen)
        self.output = b""

    def pump(self, wait: float) -> None:
        while True:
            ready, _, _ = select.select([self.master], [], [], wait)
            if not ready:
                return
            try:
                chunk = os.read(self.master, 65536)
            except OSError:  # EIO: the program has closed the terminal
                return
            if not chunk:
                return
            self.output += chunk
            self.stream.feed(chunk)
            wait = 0.02

    def wait_for(self, check: Callable[[], str], timeout: float = 30.0) -> None:
        """Pump output until ``check`` returns "" (all good); otherwise fail with its last complaint and the screen."""
        end = time.monotonic() + timeout
        problem = "no output"
        while time.monotonic() < end:
            self.pump(0.05)
            problem = check()
            if not problem:
                return
        screen = "\n".join(f"{y:2d}|{line}|" for y, line in enumerate(self.screen.display))
        raise AssertionError(f"{problem}\nscreen ({self.screen.columns}x{self.screen.lines}):\n{screen}")

    def send(self, data: bytes) -> None:
        os.write(self.master, data)

    def resize(self, columns: int, rows: int) -> None:
        self.pump(0.1)  # what was painted at the old size lands on the old-size emulator
        self.screen.resize(rows, columns)
        _set_size(self.master, columns, rows)

    def close(self) -> int:
        try:
            return self.proc.wait(timeout=20)
        finally:
            if self.proc.poll() is None:
                self.proc.kill()
                self.proc.wait()
            os.close(self.master)


@pytest.fixture(scope="module")
def demo_model(tmp_path_factory: pytest.TempPathFactory) -> nextword.Model:
    path = tmp_path_factory.mktemp("live") / "demo.nwm"
    nextword.train(str(CORPUS), str(path))
    return nextword.load(path)


@pytest.fixture()
def session_factory(demo_model: nextword.Model) -> Iterator[Callable[..., LiveSession]]:
    made: list[LiveSession] = []

    def make(columns: int, rows: int = 24, *, k: int = 5) -> LiveSession:
        made.append(LiveSession(Path(demo_model.path), columns, rows, k=k))
        return made[-1]

    yield make
    for s in made:
        if s.proc.poll() is None:
            s.proc.kill()
            s.close()


GARBAGE = re.compile(r"\[[0-9;]*[A-Za-z~]|DD|CC|O[A-D]|\x1b")


def screen_check(live: LiveSession, model: nextword.Model, text: str, cursor: int, *, k: int = 5, sent: tuple[str, ...] = ()) -> Callable[[], str]:
    """A check that the whole visible screen is the live view of ``text`` with the cursor at ``cursor``.

    Built from first principles for ASCII text: row 0 is the help row (help words, query time at its
    end); then the choice row, ``[n] word`` items for ``model.suggest(text[:cursor], k)`` packed into rows of
    ``columns - 1``; then the message, ``> `` then ``columns - 3`` characters a row; the terminal cursor at
    row ``cursor // (columns - 3)``, column ``2 + cursor % (columns - 3)`` of it; a blank row and the sent
    messages newest first (cut with "…" to ``columns - 1``); nothing else anywhere.
    """
    want_words = [s.word for s in model.suggest(text[:cursor], k)]

    def check() -> str:
        screen = live.screen
        columns, rows = screen.columns, screen.lines
        display = [line.rstrip() for line in screen.display]
        width = columns - 1
        if any(GARBAGE.search(line) for line in display):
            return "escape-sequence characters on the screen"
        help_words = HELP if len(HELP) + 2 + 8 <= width else SHORT_HELP  # the status ("123 µs") fits beside
        if not (display[0].startswith(help_words + "  ") and re.search(r"\d+(\.\d)? (µs|ms)$", display[0])):
            return "help row"
        items = [f"[{i}] {w}" for i, w in enumerate(want_words, 1)] or [NO_SUGGESTION]
        choice: list[str] = []
        for item in items:
            if choice and len(choice[-1]) + 2 + len(item) <= width:
                choice[-1] += "  " + item
            else:
                choice.append(item)
        avail = width - 2
        chunks = [text[i : i + avail] for i in range(0, max(len(text), 1), avail)]
        if text and cursor == len(text) and len(text) % avail == 0:
            chunks.append("")  # the cursor after a full row starts the next one
        message = [("> " if i == 0 else "  ") + c for i, c in enumerate(chunks)]
        expected = [*choice, *message]
        if sent:
            expected += ["", *(m if len(m) <= width else m[: width - 1] + "…" for m in reversed(sent))]
        expected = [line.rstrip() for line in expected] + [""] * (rows - 1 - len(expected))
        if display[1:] != expected:
            diff = [f"row {y + 1}: {got!r} != {want!r}" for y, (got, want) in enumerate(zip(display[1:], expected)) if got != want]
            return "screen differs: " + "; ".join(diff[:4])
        where = (1 + len(choice) + cursor // avail, 2 + cursor % avail)
        if (screen.cursor.y, screen.cursor.x) != where:
            return f"cursor at {(screen.cursor.y, screen.cursor.x)}, want {where}"
        return ""

    return check


def _type(live: LiveSession, text: str) -> None:
    for ch in text:
        live.send(ch.encode())


@posix_only
@pytest.mark.parametrize("columns", [40, 120])
def test_editing_keys_and_the_choice_row_in_a_terminal(session_factory: Callable[..., LiveSession], demo_model: nextword.Model, columns: int) -> None:
    m = demo_model
    live = session_factory(columns)
    live.wait_for(screen_check(live, m, "", 0))
    text = "see you at the w"
    _type(live, text)
    live.wait_for(screen_check(live, m, text, len(text)))

    # arrows move the cursor; the choice row follows the text left of it ("see you at the": completing "the")
    live.send(LEFT + LEFT)
    live.wait_for(screen_check(live, m, text, 14))
    # up/down, F5, Shift+Up, F1, Alt+x: nothing typed, nothing moved
    live.send(UP + DOWN + b"\x1b[15~" + b"\x1b[1;2A" + b"\x1bOP" + b"\x1bx")
    live.send(RIGHT + LEFT)  # and the cursor still moves both ways
    live.wait_for(screen_check(live, m, text, 14))
    # Home, type at the start: the sentence-start suggestions after "Hi "
    live.send(HOME)
    live.wait_for(screen_check(live, m, text, 0))
    _type(live, "Hi ")
    text = "Hi " + text
    live.wait_for(screen_check(live, m, text, 3))

    # End, Tab: the partial word "w" is replaced by the first suggestion and a space
    live.send(END)
    live.wait_for(screen_check(live, m, text, len(text)))
    first = m.suggest(text, 5)[0].word
    live.send(b"\t")
    text = text[:-1] + first + " "
    live.wait_for(screen_check(live, m, text, len(text)))

    # a long message wraps (three rows at 40 columns), every row exact
    more = "on Thursday and please bring the spoke key back to the wall"
    _type(live, more)
    text += more
    live.wait_for(screen_check(live, m, text, len(text)))
    # deleting shrinks it back: the rows it no longer needs are blank, not stale
    live.send(b"\x17" * 6 + b"\x7f" * 3)  # Ctrl-W ×6: wall, the, to, back, key, spoke; Backspace ×3: "he "
    text = text[: text.index("spoke")][:-3]
    assert text.endswith("please bring t")
    live.wait_for(screen_check(live, m, text, len(text)))

    # Alt+2 in the middle of the text, right after a space: the word is inserted there, the rest kept
    cut = text.index("on Thursday")
    live.send(LEFT * (len(text) - cut))
    live.wait_for(screen_check(live, m, text, cut))
    second = m.suggest(text[:cut], 5)[1].word
    live.send(b"\x1b2")
    text = text[:cut] + second + " " + text[cut:]
    cut += len(second) + 1
    live.wait_for(screen_check(live, m, text, cut))
    # Delete removes the character under the cursor; Ctrl-U everything left of it
    live.send(DELETE + b"\x15")
    text = text[cut + 1 :]
    live.wait_for(screen_check(live, m, text, 0))

    # Enter sends: the line clears and the message is listed below
    live.send(b"\r")
    live.wait_for(screen_check(live, m, "", 0, sent=(text,)))
    _type(live, "Thanks")
    live.wait_for(screen_check(live, m, "Thanks", 6, sent=(text,)))
    live.send(b"\x04")
    assert live.close() == 0


@posix_only
def test_keys_arriving_together_use_the_suggestions_for_the_text_they_typed(
    session_factory: Callable[..., LiveSession], demo_model: nextword.Model
) -> None:
    live = session_factory(80)
    live.wait_for(screen_check(live, demo_model, "", 0))
    live.send(b"see you at the w\t")  # one write: a paste, or a fast typist on a slow link
    first = demo_model.suggest("see you at the w", 5)[0].word
    text = "see you at the " + first + " "
    live.wait_for(screen_check(live, demo_model, text, len(text)))
    live.send(b"\x03")  # Ctrl-C quits cleanly too
    assert live.close() == 0


@posix_only
def test_resizing_the_terminal_repaints_everything(session_factory: Callable[..., LiveSession], demo_model: nextword.Model) -> None:
    m = demo_model
    live = session_factory(120, 24)
    live.wait_for(screen_check(live, m, "", 0))
    _type(live, "Can someone bring the bottom bracket tool\r")
    sent = ("Can someone bring the bottom bracket tool",)
    text = "I'll be at the workshop from half seven on Thursday with the spare wheels and the loaner bike book"
    _type(live, text)
    live.send(LEFT * 5)
    live.wait_for(screen_check(live, m, text, len(text) - 5, sent=sent))
    # narrower: the message wraps onto four rows, nothing of the 120-column rows is left; no key is pressed
    live.resize(40, 24)
    live.wait_for(screen_check(live, m, text, len(text) - 5, sent=sent))
    # wider and taller again
    live.resize(100, 30)
    live.wait_for(screen_check(live, m, text, len(text) - 5, sent=sent))
    live.resize(40, 24)
    live.wait_for(screen_check(live, m, text, len(text) - 5, sent=sent))
    live.send(b"x")  # and typing goes on at the new size
    text = text[:-5] + "x" + text[-5:]
    live.wait_for(screen_check(live, m, text, len(text) - 5, sent=sent))
    live.send(b"\x04")
    assert live.close() == 0


@posix_only
def test_quitting_restores_the_terminal(session_factory: Callable[..., LiveSession], demo_model: nextword.Model) -> None:
    live = session_factory(60)
    before = termios.tcgetattr(live.master)  # the pty's settings as the program found them (echo, lines)
    live.wait_for(screen_check(live, demo_model, "", 0))
    during = termios.tcgetattr(live.master)
    assert not during[3] & (termios.ECHO | termios.ICANON | termios.ISIG)
    live.send(b"\x04")
    assert live.proc.wait(timeout=20) == 0
    live.pump(0.2)
    assert termios.tcgetattr(live.master) == before
    # auto-wrap back on, the normal screen back (xterm's private modes 7 and 1049)
    assert live.output.endswith(b"\x1b[?7h\x1b[?1049l")
    assert live.close() == 0
