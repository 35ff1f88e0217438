"""A desktop typing box: a message box with a choice row of suggestion buttons that follows every key.

Run it from a checkout of the repository (only the standard library's Tk and nextword):

    python examples/typing_box.py [MODEL] [--user-layer PATH] [-k 3] [--cache-dir DIR]

It exists to show the engine where it will live — in an input box, re-ranked on every
key press — and to give people building input apps a small, readable starting point.

Keys (in the message box):
    Tab           accept the first suggestion
    Alt+1 … Alt+k accept the n-th suggestion (the number is shown on each button)
    Enter         send the message: the personal layer learns it, the box is cleared
    Shift+Enter   a new line inside the message
Accepting replaces the partial word before the cursor and adds a space. Clicking a
suggestion button does the same. The choice row shows one button per suggestion the
engine has (at most k) and "(no suggestion)" when the partial word matches nothing.

Without MODEL, the first run trains the bundled demo corpus (examples/data/demo_messages.txt)
into ``demo.nwm`` in the cache directory and later runs reuse it (retrained only when the
corpus is newer). The cache directory is ``$XDG_CACHE_HOME/nextword-typing-box`` (default
``~/.cache/nextword-typing-box``; ``~/Library/Caches/...`` on macOS, ``%LOCALAPPDATA%\\...``
on Windows) unless ``--cache-dir`` says otherwise; the personal layer is ``personal.nwp``
in the same directory unless ``--user-layer`` names another file.
"""

from __future__ import annotations

import argparse
import functools
import os
import sys
import time
import tkinter as tk
import tkinter.font as tkfont
from pathlib import Path
from tkinter import ttk
from typing import NoReturn, Sequence

import nextword
from nextword.errors import InvalidArgumentError, NextwordError
from nextword.keyboard import Channel
from nextword.mix import Predictor, open_any
from nextword.model import Suggestion
from nextword.personal import PersonalLayer
from nextword.text import parse_typed

__all__ = ["TypingBox", "main", "prepare_model", "default_cache_dir", "accepted_text", "format_latency", "use_plain_theme"]

HERE = Path(__file__).resolve().parent
DEMO_CORPUS = HERE / "data" / "demo_messages.txt"
MODEL_NAME = "demo.nwm"
LAYER_NAME = "personal.nwp"
#: Alt+1 … Alt+9: one digit per button, so at most nine buttons.
MAX_K = 9
HISTORY_LINES = 50


def default_cache_dir() -> Path:
    """Where the demo model and the personal layer live when no path is given.

    A per-user cache directory rather than the checkout: the model is derived data that
    can be rebuilt at any time, and the personal layer belongs to the user, not the repo.
    """
    if sys.platform == "win32":
        root = Path(os.environ.get("LOCALAPPDATA") or Path.home() / "AppData" / "Local")
    elif sys.platform == "darwin":
        root = Path.home() / "Library" / "Caches"
    else:
        root = Path(os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache")
    return root / "nextword-typing-box"


def prepare_model(cache_dir: Path, corpus: Path = DEMO_CORPUS) -> tuple[Path, bool]:
    """The cached demo model, trained from ``corpus`` if missing, stale or unreadable.

    Returns (path, trained). Training the demo corpus takes a fraction of a second, but a
    cached file keeps start-up instant and shows the intended deployment: train once,
    memory-map the file on every start.
    """
    path = cache_dir / MODEL_NAME
    if path.exists() and path.stat().st_mtime >= corpus.stat().st_mtime:
        try:
            nextword.load(path).close()
            return path, False
        except NextwordError:
            pass  # a damaged cache is ours to rebuild
    cache_dir.mkdir(parents=True, exist_ok=True)
    nextword.train(str(corpus), str(path))  # written atomically: a crash never leaves half a file
    return path, True


def accepted_text(typed: str, word: str) -> tuple[int, str]:
    """How accepting ``word`` edits the typed text: (characters to delete, text to insert).

    The partial word the engine completed (the same prefix it parsed) is replaced and a
    space added, so the user can type the next word at once.
    """
    prefix = parse_typed(typed).prefix
    delete = len(prefix) if prefix and typed.endswith(prefix) else 0
    return delete, word + " "


def format_latency(seconds: float) -> str:
    """A short latency label: microseconds below a millisecond, where the engine usually is."""
    micros = seconds * 1e6
    return f"{micros:.0f} µs" if micros < 1000 else f"{micros / 1000:.1f} ms"


def use_plain_theme(root: tk.Tk) -> None:
    """A calm, platform-neutral ttk look ('clam' where available) with a roomy text font.

    Kept out of :class:`TypingBox` so an embedding application keeps its own theme.
    """
    style = ttk.Style(root)
    if "clam" in style.theme_names():
        style.theme_use("clam")
    style.configure("Suggestion.TButton", padding=(10, 4))
    style.configure("Latency.TLabel", foreground="#555555")
    style.configure("Status.TLabel", foreground="#555555")


class TypingBox:
    """The typing box inside any Tk container: choice row of suggestions, message box, history.

    It takes an existing root (or frame) and an open model so that tests and host
    applications can create it without the command line, and it never calls mainloop.
    With a personal layer, suggestions come from the layer (base + the user's counts) and
    every sent message is learned; without one, straight from the model.
    """

    def __init__(
        self,
        master: tk.Misc,
        model: Predictor,
        *,
        layer: PersonalLayer | None = None,
        k: int = 3,
        typo: Channel | None = None,
    ) -> None:
        if isinstance(k, bool) or not isinstance(k, int) or not 1 <= k <= MAX_K:
            raise InvalidArgumentError(f"k must be an integer from 1 to {MAX_K} (one Alt+digit per button), got {k!r}")
        self.model = model
        self.layer = layer
        self.k = k
        #: typo-tolerant suggestions (a nextword.keyboard.Channel) or exact prefixes (None)
        self.typo = typo
        self.suggestions: list[Suggestion] = []
        self.last_latency = 0.0
        self._pending = False

        self.frame = ttk.Frame(master, padding=10)
        self.frame.pack(fill="both", expand=True)
        self.frame.columnconfigure(0, weight=1)

        # the choice row: one button per suggestion the engine has, in fixed grid columns so a
        # hidden button (grid_remove) comes back in its place; empty slots are not shown at all
        row = ttk.Frame(self.frame)
        row.grid(row=0, column=0, columnspan=2, sticky="ew", pady=(0, 6))
        self.buttons: list[ttk.Button] = []
        for i in range(k):
            b = ttk.Button(row, style="Suggestion.TButton", command=functools.partial(self.accept, i), takefocus=False)
            b.grid(row=0, column=i, padx=(0, 6), sticky="w")
            self.buttons.append(b)
        self.no_suggestion = ttk.Label(row, text="(no suggestion)", style="Status.TLabel")
        self.no_suggestion.grid(row=0, column=k, sticky="w")
        row.columnconfigure(k, weight=1)
        self.latency_label = ttk.Label(row, style="Latency.TLabel", width=9, anchor="e")
        self.latency_label.grid(row=0, column=k + 1, sticky="e")
        # the row keeps a button's height when no button is shown: the message box never jumps
        row.update_idletasks()
        row.rowconfigure(0, minsize=self.buttons[0].winfo_reqheight())

        # the interface font, a little larger: a message box, not a code editor
        font = tkfont.nametofont("TkDefaultFont").copy()
        font.configure(size=font.cget("size") + 2 if font.cget("size") > 0 else font.cget("size") - 2)
        self.text = tk.Text(
            self.frame, height=3, width=52, wrap="word", undo=True, font=font, relief="solid", borderwidth=1, padx=6, pady=4
        )
        self.text.grid(row=1, column=0, sticky="nsew")
        self.send_button = ttk.Button(self.frame, text="Send\n(Enter)", command=self.send, takefocus=False)
        self.send_button.grid(row=1, column=1, sticky="ns", padx=(6, 0))

        ttk.Label(self.frame, text="Sent messages").grid(row=2, column=0, columnspan=2, sticky="w", pady=(10, 2))
        self.history = tk.Listbox(self.frame, height=5, activestyle="none", relief="solid", borderwidth=1, takefocus=False)
        self.history.grid(row=3, column=0, columnspan=2, sticky="nsew")
        self.frame.rowconfigure(3, weight=1)

        self.status = ttk.Label(self.frame, style="Status.TLabel")
        self.status.grid(row=4, column=0, columnspan=2, sticky="w", pady=(6, 0))

        t = self.text
        # content changes (typing, paste, undo, our own edits) and cursor moves both re-rank
        t.bind("<<Modified>>", self._on_modified)
        t.bind("<KeyRelease>", lambda e: self.schedule_refresh())
        t.bind("<ButtonRelease-1>", lambda e: self.schedule_refresh())
        t.bind("<Tab>", functools.partial(self._accept_key, 0))
        for i in range(k):
            t.bind(f"<Alt-Key-{i + 1}>", functools.partial(self._accept_key, i))
        t.bind("<Return>", lambda e: self._send_key())
        t.bind("<KP_Enter>", lambda e: self._send_key())
        t.bind("<Shift-Return>", lambda e: None)  # falls through to the Text class: a new line
        t.focus_set()
        self._update_status()
        self.refresh()

    # -- queries --------------------------------------------------------------------------------

    def typed_text(self) -> str:
        """The text the engine sees: everything before the insertion cursor."""
        return self.text.get("1.0", "insert")

    def suggest(self, typed: str) -> list[Suggestion]:
        """One query, to the layer when there is one (it mixes in the user's counts)."""
        if self.layer is not None:
            return self.layer.suggest(typed, self.k, typo=self.typo)
        return self.model.suggest(typed, self.k, typo=self.typo)

    def schedule_refresh(self) -> None:
        """Re-rank once the current burst of events is handled (a paste is one query, not many)."""
        if not self._pending:
            self._pending = True
            self.text.after_idle(self.refresh)

    def refresh(self) -> None:
        """Ask the engine for the typed text and redraw the choice row with the latency."""
        self._pending = False
        typed = self.typed_text()
        t0 = time.perf_counter()
        self.suggestions = self.suggest(typed)
        self.last_latency = time.perf_counter() - t0
        for i, b in enumerate(self.buttons):
            if i < len(self.suggestions):
                key = "Tab" if i == 0 else f"Alt+{i + 1}"
                b.configure(text=f"{self.suggestions[i].word}   {key}")
                b.grid()
            else:
                b.grid_remove()  # fewer suggestions than buttons: the rest are not shown, not left empty
        if self.suggestions:
            self.no_suggestion.grid_remove()
        else:
            self.no_suggestion.grid()
        self.latency_label.configure(text=format_latency(self.last_latency))

    def choice_words(self) -> list[str]:
        """The words on the shown buttons, in order (what the user sees)."""
        return [str(b.cget("text")).rsplit("   ", 1)[0] for b in self.buttons if b.winfo_manager()]

    # -- actions ----------------------------------------------------------------------------------

    def accept(self, i: int) -> None:
        """Put the i-th suggestion in place of the partial word before the cursor, then a space."""
        if not 0 <= i < len(self.suggestions):
            return
        delete, insert = accepted_text(self.typed_text(), self.suggestions[i].word)
        t = self.text
        t.edit_separator()
        if delete:
            t.delete(f"insert-{delete}c", "insert")
        t.insert("insert", insert)
        t.edit_separator()
        t.see("insert")
        t.focus_set()
        self.refresh()

    def send(self) -> None:
        """Commit the message: the layer learns it (saved at once), it joins the history, the box clears."""
        message = self.text.get("1.0", "end-1c").strip()
        if not message:
            return
        if self.layer is not None:
            self.layer.learn(message)
        self.history.insert("end", message)
        if self.history.size() > HISTORY_LINES:
            self.history.delete(0)
        self.history.see("end")
        self.text.delete("1.0", "end")
        self.text.edit_reset()
        self.text.focus_set()
        self._update_status()
        self.refresh()

    # -- event glue -------------------------------------------------------------------------------

    def _on_modified(self, event: tk.Event) -> None:
        # the flag must be reset or Tk will not report the next change
        self.text.edit_modified(False)
        self.schedule_refresh()

    def _accept_key(self, i: int, event: tk.Event) -> str:
        self.accept(i)
        return "break"  # no tab character, no digit

    def _send_key(self) -> str:
        self.send()
        return "break"  # no newline in the (now empty) box

    def _update_status(self) -> None:
        where = f"model {Path(self.model.path).name}: {self.model.n_words:,} words"
        if self.layer is not None:
            where += f"  ·  personal layer {Path(self.layer.path).name if self.layer.path else '(in memory)'}: {self.layer.messages:,} messages learned"
        self.status.configure(text=where)


# -- command line -------------------------------------------------------------------------------


class _UsageError(Exception):
    """A command-line mistake: one line on stderr, exit status 2."""


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> NoReturn:
        raise _UsageError(message)


def _k(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number from 1 to {MAX_K}, got {text!r}") from None
    if not 1 <= value <= MAX_K:
        raise argparse.ArgumentTypeError(f"expected a whole number from 1 to {MAX_K}, got {value}")
    return value


def _parser() -> argparse.ArgumentParser:
    p = _Parser(prog="typing_box.py", description="A desktop typing box whose choice row follows every key.")
    p.add_argument("model", nargs="?", help="a .nwm model (default: the demo corpus, trained once into the cache directory)")
    p.add_argument("--user-layer", metavar="PATH", help=f"personal layer file (default: {LAYER_NAME} in the cache directory)")
    p.add_argument("-k", type=_k, default=3, help=f"number of suggestion buttons, 1-{MAX_K} (default 3)")
    p.add_argument("--tolerate-typos", action="store_true",
                   help="also offer words the typed letters miss by one slip of the finger (QWERTY; default: off)")
    p.add_argument("--cache-dir", metavar="DIR", help=f"where the demo model and default layer live (default: {default_cache_dir()})")
    return p


def main(argv: Sequence[str] | None = None) -> int:
    """Open the window and run until it is closed; returns the exit status."""
    try:
        args = _parser().parse_args(argv)
        cache = Path(args.cache_dir) if args.cache_dir else default_cache_dir()
        if args.model:
            model_path = Path(args.model)
        else:
            model_path, trained = prepare_model(cache)
            print(f"{'trained' if trained else 'using cached'} demo model {model_path}", file=sys.stderr)
        model = open_any(model_path)  # a model file or a mixture (.nwx)
        layer_path = Path(args.user_layer) if args.user_layer else cache / LAYER_NAME
        layer_path.parent.mkdir(parents=True, exist_ok=True)
        layer = PersonalLayer.open(model, layer_path, create=True)
        try:
            root = tk.Tk(className="NextwordTypingBox")
        except tk.TclError as e:
            print(f"typing_box.py: error: cannot open a window: {e}", file=sys.stderr)
            return 1
        root.title("nextword typing box")
        use_plain_theme(root)
        TypingBox(root, model, layer=layer, k=args.k, typo=Channel() if args.tolerate_typos else None)
        root.mainloop()
        return 0
    except _UsageError as e:
        print(f"typing_box.py: error: {e}", file=sys.stderr)
        return 2
    except InvalidArgumentError as e:
        print(f"typing_box.py: error: {e}", file=sys.stderr)
        return 2
    except NextwordError as e:
        print(f"typing_box.py: error: {e}", file=sys.stderr)
        return 1
    except OSError as e:
        where = f"{e.filename}: " if e.filename else ""
        print(f"typing_box.py: error: {where}{e.strerror or e}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
