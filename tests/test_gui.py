"""The desktop typing box (examples/typing_box.py) driven by synthetic keys under a virtual display.

A real X server (Xvfb) runs for the module; Tk connects to it in-process, the test types
with ``event_generate`` key events, and checks what a user would see: the choice row shows the
engine's words for the typed text, Tab / Alt+N / a click put the word in place
of the partial word plus a space, Enter teaches the personal layer (on disk) and changes the
next ranking. A screenshot of the window is taken with Pillow; set
``NEXTWORD_SCREENSHOT=docs/typing_box.png`` to keep it (that is how the README's picture is made).

Expected words come from ``Model.suggest`` / ``PersonalLayer.suggest`` called directly,
never from the widget, and box contents are compared exactly.
"""

from __future__ import annotations

import importlib.util
import os
import re
import select
import shutil
import subprocess
import sys
from pathlib import Path
from types import ModuleType
from typing import Any, Iterator

import pytest

import nextword
from nextword.personal import PersonalLayer

tk = pytest.importorskip("tkinter", reason="tkinter (the python3-tk package) is not installed")

ROOT = Path(__file__).resolve().parent.parent
EXAMPLE = ROOT / "examples" / "typing_box.py"
CORPUS = ROOT / "examples" / "data" / "demo_messages.txt"
SCREENSHOT_ENV = "NEXTWORD_SCREENSHOT"

# keysyms for the non-letter characters the test types (X11 keysym names)
_KEYSYMS = {" ": "space", "'": "apostrophe", ".": "period", ",": "comma", "?": "question", "!": "exclam"}


def _load_example() -> ModuleType:
    spec = importlib.util.spec_from_file_location("typing_box", EXAMPLE)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules["typing_box"] = module
    spec.loader.exec_module(module)
    return module


typing_box = _load_example()


@pytest.fixture(scope="module")
def xdisplay() -> Iterator[str]:
    """A private Xvfb server; it picks its own display number (``-displayfd``) and is killed at the end."""
    xvfb = shutil.which("Xvfb")
    if xvfb is None:
        pytest.skip("Xvfb is not installed (Debian package xvfb)")
    read_fd, write_fd = os.pipe()
    try:
        proc = subprocess.Popen(
            [xvfb, "-displayfd", str(write_fd), "-screen", "0", "1024x768x24", "-nolisten", "tcp", "-noreset"],
            pass_fds=(write_fd,),
            stdout=subprocess.DEVNULL,
            stderr=subprocess.PIPE,
        )
    except OSError as e:
        os.close(read_fd)
        os.close(write_fd)
        pytest.skip(f"Xvfb cannot start: {e}")
    os.close(write_fd)
    number = b""
    try:
        # generous: a busy shared machine can take seconds to start a server
        while not number.endswith(b"\n"):
            ready, _, _ = select.select([read_fd], [], [], 30.0)
            if not ready:
                break
            chunk = os.read(read_fd, 16)
            if not chunk:
                break
            number += chunk
    finally:
        os.close(read_fd)
    if not number.strip().isdigit():
        proc.kill()
        _, err = proc.communicate(timeout=10)
        pytest.skip(f"Xvfb did not start: {err.decode(errors='replace').strip()[-300:] or 'no display number reported'}")
    try:
        yield f":{int(number)}"
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=10)
        if proc.stderr is not None:
            proc.stderr.close()


@pytest.fixture(scope="module")
def model_path(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("model") / "demo.nwm"
    nextword.train(str(CORPUS), str(path))
    return path


@pytest.fixture()
def root(xdisplay: str) -> Iterator[Any]:
    try:
        r = tk.Tk(screenName=xdisplay, className="NextwordTypingBoxTest")
    except tk.TclError as e:
        pytest.skip(f"Tk cannot open the virtual display {xdisplay}: {e}")
    typing_box.use_plain_theme(r)
    r.geometry("+0+0")
    try:
        yield r
    finally:
        r.destroy()


def _focus(app: Any) -> None:
    app.text.focus_force()
    app.text.update()


def _type(app: Any, text: str) -> None:
    """Type ``text`` key by key, as the keyboard would: press and release each key, let Tk run."""
    _focus(app)
    for ch in text:
        keysym = _KEYSYMS.get(ch, ch)
        app.text.event_generate("<KeyPress>", keysym=keysym)
        app.text.event_generate("<KeyRelease>", keysym=keysym)
        app.text.update()


def _press(app: Any, sequence: str) -> None:
    _focus(app)
    app.text.event_generate(sequence)
    app.text.update()


def _box(app: Any) -> str:
    return str(app.text.get("1.0", "end-1c"))


def _words(sugg: list[nextword.Suggestion]) -> list[str]:
    return [s.word for s in sugg]


def test_typing_accepting_sending_and_screenshot(root: Any, xdisplay: str, model_path: Path, tmp_path: Path) -> None:
    model = nextword.load(model_path)
    layer_file = tmp_path / "me.nwp"
    # strength=1: the user's counts weigh in after one message, so the test can see learning
    layer = PersonalLayer.open(model, layer_file, strength=1.0)
    app = typing_box.TypingBox(root, model, layer=layer, k=3)
    root.update()

    # empty box: sentence-start suggestions, exactly the engine's
    assert app.choice_words() == _words(model.suggest("", 3))

    # every key re-ranks: after each typed prefix the choice row is the engine's answer for it
    typed = ""
    for chunk in ["Can", " someone", " bring", " the", " tr"]:
        _type(app, chunk)
        typed += chunk
        assert _box(app) == typed
        want = _words(model.suggest(typed, 3))
        assert want, typed
        assert app.choice_words() == want, typed
        assert re.fullmatch(r"\d+ µs|\d+\.\d ms", str(app.latency_label.cget("text")))
    # the shortcut is shown on each button
    labels = [str(b.cget("text")) for b in app.buttons]
    assert labels[0].endswith("Tab") and labels[1].endswith("Alt+2") and labels[2].endswith("Alt+3")

    # Tab accepts the first: the partial word "tr" is replaced, a space added
    first = model.suggest(typed, 3)[0].word
    _press(app, "<Tab>")
    assert _box(app) == "Can someone bring the " + first + " "
    assert app.choice_words() == _words(model.suggest(_box(app), 3))
    assert str(app.history.get(0, "end")) == "()"

    # Enter sends: box cleared, history shows the message, the layer learned it on disk
    message = "Can someone bring the " + first
    _press(app, "<Return>")
    assert _box(app) == ""
    assert list(app.history.get(0, "end")) == [message]
    on_disk = PersonalLayer.load(model, layer_file)
    assert on_disk.messages == 1
    assert on_disk.pair_count("the", first) == 1.0

    # Alt+3 accepts the third suggestion after a completed word (no partial word to replace)
    context = "See you at the "
    _type(app, context)
    base = _words(model.suggest(context, 3))
    assert app.choice_words() == _words(layer.suggest(context, 3))
    third = app.suggestions[2].word
    _press(app, "<Alt-Key-3>")
    assert _box(app) == context + third + " "
    _press(app, "<Return>")
    assert list(app.history.get(0, "end")) == [message, (context + third)]
    assert PersonalLayer.load(model, layer_file).messages == 2

    # the next suggestion reflects what was sent: the word this user picked now ranks first
    _type(app, context)
    now = app.choice_words()
    assert now == _words(layer.suggest(context, 3))
    assert third != base[0] and now[0] == third

    # a click on a button (press and release over it) accepts that suggestion
    app.text.delete("1.0", "end")
    _type(app, "Repair night on Th")
    assert app.choice_words() == _words(layer.suggest("Repair night on Th", 3))
    second = app.suggestions[1].word
    button = app.buttons[1]
    x, y = button.winfo_width() // 2, button.winfo_height() // 2
    button.event_generate("<Enter>", x=x, y=y)
    button.event_generate("<ButtonPress-1>", x=x, y=y)
    button.event_generate("<ButtonRelease-1>", x=x, y=y)
    button.event_generate("<Leave>")  # the pointer moves on: no hover highlight left behind
    root.update()
    assert _box(app) == "Repair night on " + second + " "

    # leave a partial word for the picture, then grab the window from the X server
    app.text.delete("1.0", "end")
    _type(app, "Thanks for bringing the ch")
    root.update()
    _screenshot(root, xdisplay, tmp_path / "typing_box.png")


def _screenshot(root: Any, xdisplay: str, path: Path) -> None:
    """Grab the window's pixels from the X server, check they are a real picture, save a PNG."""
    image_grab = pytest.importorskip("PIL.ImageGrab", reason="Pillow is not installed (test extra)")
    root.update_idletasks()
    x, y, w, h = root.winfo_rootx(), root.winfo_rooty(), root.winfo_width(), root.winfo_height()
    assert w > 100 and h > 100
    shot = image_grab.grab(bbox=(x, y, x + w, y + h), xdisplay=xdisplay)
    assert shot.size == (w, h)
    # text, buttons and borders: far more than a blank window's one or two colours
    colours = shot.convert("RGB").getcolors(maxcolors=1 << 16)
    assert colours is None or len(colours) > 8
    shot.save(path)
    assert path.stat().st_size > 1000
    keep = os.environ.get(SCREENSHOT_ENV)
    if keep:
        shot.save(Path(keep))


def test_without_a_layer_suggestions_come_from_the_model(root: Any, model_path: Path) -> None:
    model = nextword.load(model_path)
    app = typing_box.TypingBox(root, model, k=2)
    root.update()
    _type(app, "thanks for ")
    assert app.choice_words() == _words(model.suggest("thanks for ", 2))
    assert len(app.buttons) == 2
    # a click through the button's command, then Enter: history grows, nothing is learned anywhere
    app.buttons[1].invoke()
    root.update()
    assert _box(app) == "thanks for " + model.suggest("thanks for ", 2)[1].word + " "
    _press(app, "<Return>")
    assert _box(app) == "" and app.history.size() == 1


def _shown(app: Any) -> list[bool]:
    """Which choice-row buttons are on the screen (mapped and viewable), as Tk reports it."""
    return [bool(b.winfo_ismapped()) and bool(b.winfo_viewable()) for b in app.buttons]


def test_fewer_suggestions_than_buttons_show_only_that_many(root: Any, model_path: Path) -> None:
    model = nextword.load(model_path)
    app = typing_box.TypingBox(root, model, k=5)
    root.update()
    assert _shown(app) == [True] * 5
    box_top = app.text.winfo_y()
    prefix = "pri"  # a prefix matching fewer than 5 vocabulary words in the demo model
    _type(app, prefix)
    want = _words(model.suggest(prefix, 5))
    n = len(want)
    assert 0 < n < 5
    root.update()
    # only n buttons on the screen, no empty ones; they carry the engine's words in order
    assert _shown(app) == [True] * n + [False] * (5 - n)
    assert app.choice_words() == want
    assert [str(b.cget("text")).split("   ")[0] for b in app.buttons[:n]] == want
    assert not app.no_suggestion.winfo_ismapped()
    # a shortcut for a slot that is not shown changes nothing
    _press(app, "<Alt-Key-5>")
    assert _box(app) == prefix
    # a click on the last shown button accepts its word
    button = app.buttons[n - 1]
    x, y = button.winfo_width() // 2, button.winfo_height() // 2
    button.event_generate("<Enter>", x=x, y=y)
    button.event_generate("<ButtonPress-1>", x=x, y=y)
    button.event_generate("<ButtonRelease-1>", x=x, y=y)
    button.event_generate("<Leave>")  # the pointer moves on: no hover highlight left behind
    root.update()
    assert _box(app) == want[n - 1] + " "
    # after a completed word all five are back, left to right in their own places
    after = _words(model.suggest(_box(app), 5))
    assert len(after) == 5 and app.choice_words() == after
    assert _shown(app) == [True] * 5
    xs = [b.winfo_x() for b in app.buttons]
    assert xs == sorted(xs) and len(set(xs)) == 5
    # a prefix nothing matches: no buttons, a plain "(no suggestion)", the message box stays put
    _type(app, "zqxj")
    root.update()
    assert model.suggest(_box(app), 5) == [] and app.choice_words() == []
    assert _shown(app) == [False] * 5
    assert app.no_suggestion.winfo_ismapped() and str(app.no_suggestion.cget("text")) == "(no suggestion)"
    assert app.text.winfo_y() == box_top
    _press(app, "<Tab>")
    assert _box(app) == want[n - 1] + " zqxj"


def test_bad_k_is_refused(root: Any, model_path: Path) -> None:
    model = nextword.load(model_path)
    with pytest.raises(nextword.InvalidArgumentError, match="got 10"):
        typing_box.TypingBox(root, model, k=10)


# -- no display needed ------------------------------------------------------------------------


def test_the_query_parameter_is_named_typed() -> None:
    # our own name for the text the engine is asked about (see tests/test_naming.py)
    import inspect

    for fn in (typing_box.TypingBox.suggest, typing_box.accepted_text):
        assert "typed" in inspect.signature(fn).parameters, fn


def test_accepted_text_replaces_the_partial_word() -> None:
    assert typing_box.accepted_text("bring the tr", "truing") == (2, "truing ")
    assert typing_box.accepted_text("bring the ", "truing") == (0, "truing ")
    assert typing_box.accepted_text("", "Hi") == (0, "Hi ")
    assert typing_box.accepted_text("we don'", "don't") == (4, "don't ")


def test_demo_model_is_trained_once_then_reused(tmp_path: Path) -> None:
    cache = tmp_path / "cache"
    path, trained = typing_box.prepare_model(cache)
    assert trained and path == cache / "demo.nwm"
    first = path.stat()
    again, trained_again = typing_box.prepare_model(cache)
    assert again == path and not trained_again
    assert path.stat().st_ino == first.st_ino and path.stat().st_mtime_ns == first.st_mtime_ns
    # a damaged cache is rebuilt, not used
    path.write_bytes(b"not a model")
    _, rebuilt = typing_box.prepare_model(cache)
    assert rebuilt
    assert nextword.load(path).suggest("See you at the ", 1)


def _run_example(*args: str, env: dict[str, str] | None = None) -> subprocess.CompletedProcess[str]:
    base = dict(os.environ, PYTHONPATH=str(ROOT))
    base.pop("DISPLAY", None)
    return subprocess.run([sys.executable, str(EXAMPLE), *args], env={**base, **(env or {})}, capture_output=True, text=True, timeout=120)


def test_command_line_errors_are_one_line(tmp_path: Path) -> None:
    bad_k = _run_example("-k", "12", "--cache-dir", str(tmp_path))
    assert bad_k.returncode == 2
    assert bad_k.stderr.strip().splitlines() == ["typing_box.py: error: argument -k: expected a whole number from 1 to 9, got 12"]
    missing = _run_example(str(tmp_path / "nope.nwm"), "--cache-dir", str(tmp_path))
    assert missing.returncode == 1
    assert len(missing.stderr.strip().splitlines()) == 1 and "nope.nwm" in missing.stderr
    assert "Traceback" not in missing.stderr


def test_command_line_opens_a_window(xdisplay: str, tmp_path: Path) -> None:
    """The real entry point on the virtual display: trains the demo into the cache, opens, is closed."""
    code = (
        "import runpy, sys, tkinter\n"
        "tkinter.Tk.mainloop = lambda self, n=0: (self.update(), print('window', self.winfo_width() > 100), self.destroy())\n"
        f"sys.argv = ['typing_box.py', '--cache-dir', {str(tmp_path / 'c')!r}, '-k', '4']\n"
        f"runpy.run_path({str(EXAMPLE)!r}, run_name='__main__')\n"
    )
    env = dict(os.environ, PYTHONPATH=str(ROOT), DISPLAY=xdisplay)
    proc = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == "window True"
    assert "trained demo model" in proc.stderr
    assert (tmp_path / "c" / "demo.nwm").exists() and (tmp_path / "c" / "personal.nwp").exists()
