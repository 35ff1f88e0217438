"""The ``nextword`` command: train, suggest, info, a live typing mode and a local service.

Errors are one line on stderr naming the bad value: exit status 2 for usage mistakes
(unknown option, λ out of range), 1 for data problems (unreadable corpus, damaged model).
Every command that prints results can print JSON instead (``--json``).
"""

from __future__ import annotations

import argparse
import errno
import json
import os
import statistics
import sys
import textwrap
import time
from typing import Any, NoReturn, Sequence

from . import __version__
from ._progress import Progress
from .build import DEFAULT_LAMBDA, SMOOTHINGS, TRAIN_ORDERS, train, train_texts
from .codecs import QUANT_BITS
from .corpus import FORMATS, iter_messages, open_sources
from .counts import DEFAULT_MAX_VOCAB, DEFAULT_MIN_COUNT, PARALLEL_MIN_BYTES
from .errors import InputDataError, InvalidArgumentError, NextwordError
from .mix import MixedModel, is_mix_file, load_mix, open_any
from .model import Model, load
from .paths import Labelled, check_outputs, check_writable
from .serve import DEFAULT_MAX_OPEN_USERS
from .prune import DEFAULT_RULE
from .text import fold

__all__ = ["main", "build_parser"]


class UsageError(Exception):
    """A command-line mistake: reported in one line, exit status 2."""


class _HelpFormatter(argparse.RawDescriptionHelpFormatter):
    """Keeps the epilog's example lines as written and adds "(default: X)" to every
    option help that does not state its default already."""

    def _get_help_string(self, action: argparse.Action) -> str:
        text = action.help or ""
        if "default" in text.lower() or action.default in (None, False, argparse.SUPPRESS):
            return text
        if not action.option_strings and action.nargs not in ("?", "*"):
            return text  # a required positional has no default
        return f"{text} (default: %(default)s)"


class _Parser(argparse.ArgumentParser):
    """Usage errors raise :class:`UsageError`; with ``intermixed`` set (every subcommand),
    options may come anywhere among the positionals (``suggest MODEL -k 5 "the "``)."""

    intermixed = False
    _mixing = False

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        kwargs.setdefault("formatter_class", _HelpFormatter)
        super().__init__(*args, **kwargs)

    def error(self, message: str) -> NoReturn:
        raise UsageError(message)

    def parse_known_args(  # type: ignore[override]
        self, args: Sequence[str] | None = None, namespace: argparse.Namespace | None = None
    ) -> tuple[argparse.Namespace, list[str]]:
        if not self.intermixed or self._mixing:
            return super().parse_known_args(args, namespace)
        self._mixing = True  # parse_known_intermixed_args calls back into this method
        try:
            return self.parse_known_intermixed_args(args, namespace)
        finally:
            self._mixing = False


def _lam(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"λ must be a number in [0, 1], got {text!r}") from None
    if not 0.0 <= value <= 1.0:
        raise argparse.ArgumentTypeError(f"λ must be in [0, 1], got {text}")
    return value


def _positive(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 1, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 1, got {text}")
    return value


def _seconds(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number of seconds, got {text!r}") from None
    if not 0.0 <= value < 1e6:
        raise argparse.ArgumentTypeError(f"expected a number of seconds from 0 to 1e6, got {text}")
    return value


def _slip_rate(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a rate in [0, 0.5], got {text!r}") from None
    if not 0.0 <= value <= 0.5:
        raise argparse.ArgumentTypeError(f"expected a rate in [0, 0.5], got {text}")
    return value


def _typo_channel(args: argparse.Namespace) -> Any:
    """The typing channel of ``--tolerate-typos``, ``--channel-rate`` and ``--layout`` (None when off)."""
    from .keyboard import Channel, load_layout

    if not args.tolerate_typos:
        return None
    if not 0.0 < args.channel_rate < 0.5:
        raise UsageError(f"--channel-rate must be in (0, 0.5), got {args.channel_rate}")
    return Channel.from_rate(args.channel_rate, load_layout(args.layout))


def _add_typo_options(p: argparse.ArgumentParser) -> None:
    from .keyboard import DEFAULT_TYPO_RATE, LAYOUTS

    p.add_argument("--tolerate-typos", action="store_true",
                   help="also complete words the typed letters miss by one slip of the finger (a neighbouring key, "
                   "a left-out, extra or swapped letter); scores become channel weight × probability (default: off)")
    p.add_argument("--channel-rate", type=_slip_rate, default=DEFAULT_TYPO_RATE, metavar="RATE",
                   help="with --tolerate-typos: the letter-slip rate the channel assumes, i.e. how much the typed "
                   "letters are trusted against the language model (default %(default)s, tuned on held-out text)")
    p.add_argument("--layout", default="qwerty", metavar="NAME|FILE",
                   help=f"keyboard layout of the slips: {', '.join(LAYOUTS)} or a layout JSON file (default %(default)s)")


def _percent(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole percentage 1-99, got {text!r}") from None
    if not 1 <= value <= 99:
        raise argparse.ArgumentTypeError(f"expected a whole percentage 1-99, got {text}")
    return value


MAX_SIZE_BYTES = 1 << 50
"""Largest size accepted for ``--max-size`` / ``--memory-cap`` (1 PiB): anything above is a typo."""


def _size(text: str) -> str:
    """Check a size such as ``4MB``, ``1.5MiB`` or ``800000`` (1 byte to 1 PiB); returns the text.

    The text (not the number) is kept so commands parse it where they use it; a value
    that overflows (hundreds of digits) or rounds to 0 bytes is refused here, in one line.
    """
    from .prune import parse_size

    shown = text if len(text) <= 40 else text[:37] + "..."
    try:
        value = parse_size(text)
    except InvalidArgumentError as e:
        raise argparse.ArgumentTypeError(str(e).replace(repr(text), repr(shown))) from None
    except (OverflowError, ValueError):
        raise argparse.ArgumentTypeError(f"size {shown!r} is too large (at most {MAX_SIZE_BYTES:,} bytes, 1 PiB)") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"size {shown!r} is less than one byte")
    if value > MAX_SIZE_BYTES:
        raise argparse.ArgumentTypeError(f"size {shown!r} is too large (at most {MAX_SIZE_BYTES:,} bytes, 1 PiB)")
    return text


DEFAULT_TUNE_PERCENT = 10
"""Share of the tune part when ``nextword split --tune-out`` is given without ``--tune-percent``."""

_MODEL_HELP = "model file (.nwm) written by nextword train, or a mixture file (.nwx) written by nextword mix"
_LAM_HELP = "override the model's λ, in [0, 1] (default: the λ stored in the model)"
_FORMAT_HELP = "text (one message per line) or jsonl; auto = jsonl for .jsonl/.ndjson/.json names (default: %(default)s)"

_EXAMPLES: dict[str, list[str]] = {
    "train": [
        "nextword train examples/data/demo_messages.txt -o demo.nwm",
        "nextword train logs.jsonl.gz --field body --min-count 3 -o shop.nwm --json",
        "nextword train big.txt -o small.nwm --max-size 4MB --rule count",
    ],
    "suggest": [
        'nextword suggest demo.nwm "See you at the " "Can someone bring the tr"',
        'nextword suggest demo.nwm -k 5 "thanks for " --json',
        'nextword suggest demo.nwm --tolerate-typos "See you at the ststion"',
    ],
    "info": ["nextword info demo.nwm", "nextword info demo.nwm --verify --json"],
    "eval": [
        "nextword eval demo.nwm held.txt -k 1 3 5",
        "nextword eval trigram-kn.nwm held.txt -k 3 --report report/",
        "nextword eval demo.nwm held.jsonl --train-data train.jsonl --report report/ --json",
        "nextword eval demo.nwm held.txt -k 3 --typo-rate 0.05 --tolerate-typos --no-baselines",
    ],
    "split": [
        "nextword split logs.txt --train-out train.txt --test-out test.txt",
        "nextword split logs.jsonl --format jsonl --field body --test-percent 10 --tune-out tune.jsonl "
        "--tune-percent 10 --train-out train.jsonl --test-out test.jsonl --json",
        "nextword split test.txt --salt again --test-percent 50 --train-out a.txt --test-out b.txt",
    ],
    "tune": [
        "nextword tune demo.nwm tune.txt --test-percent 30 -o tuned.nwm",
        "nextword tune demo.nwm tune.txt --objective keystrokes -k 3 -o tuned.nwm --json",
        "nextword tune trigram.nwm tune.txt -o trigram-tuned.nwm --report tune-report/",
    ],
    "personal": [
        'nextword personal me.nwp --model demo.nwm learn "Meet me at Quarrington Lake"',
        'nextword personal me.nwp --model demo.nwm suggest "see you at Qu" --json',
    ],
    "prune": [
        "nextword prune demo.nwm -o small.nwm --max-size 2MB",
        "nextword prune demo.nwm -o small.nwm --max-size 1.5MiB --rule count --json",
        "nextword prune demo.nwm --curve tune.txt --sizes 16KB 12KB 8KB --plot sizes.png",
    ],
    "export": [
        "nextword export demo.nwm -o demo.arpa.gz",
        "nextword export demo.nwm -o demo.arpa --lam 0.7 --json",
        "nextword export trigram-kn.nwm -o trigram-kn.arpa",
    ],
    "serve": ["nextword serve demo.nwm --users users/", "nextword serve demo.nwm --tcp 127.0.0.1:0"],
    "live": ["nextword live demo.nwm", "nextword live demo.nwm -k 3 --lam 0.8"],
    "mix": [
        "nextword mix general.nwm ferry.nwm --heldout ferry-tune.txt -o ferry.nwx",
        "nextword mix general.nwm ferry.nwm --weights 0.3 0.7 -o ferry.nwx --json",
    ],
}
"""Example lines shown under each command's --help (tests parse every one)."""


def _parser() -> _Parser:
    p = _Parser(
        prog="nextword",
        description="Train and query compact next-word suggestion models.",
        epilog="Options may come before, between or after the positionals; `nextword COMMAND --help` describes each command.",
    )
    p.add_argument("--version", action="version", version=f"nextword {__version__}")
    sub = p.add_subparsers(dest="command", required=True, parser_class=_Parser)

    t = sub.add_parser("train", help="count a corpus and write a model file")
    t.add_argument("inputs", nargs="+", metavar="INPUT", help="text or JSON Lines files (.gz ok); - for stdin")
    t.add_argument("-o", "--output", required=True, help="model file to write (atomically; never over an input)")
    t.add_argument("--lam", type=_lam, default=None, help=f"bigram weight λ (default {DEFAULT_LAMBDA}; Jelinek-Mercer only, refused with --smoothing kn)")
    t.add_argument("--order", type=int, choices=TRAIN_ORDERS, default=2, help="n-gram order: 2 = the last word as context, 3 = the last two (default %(default)s)")
    t.add_argument("--smoothing", choices=SMOOTHINGS, default="jm", help="jm = Jelinek-Mercer interpolation with λ, kn = interpolated modified Kneser-Ney with fitted discounts (default %(default)s)")
    t.add_argument("--lam3", type=_lam, default=None, help=f"trigram weight λ3 with --order 3 --smoothing jm (default {DEFAULT_LAMBDA})")
    t.add_argument("--min-count", type=_positive, default=DEFAULT_MIN_COUNT, help="drop rarer words (default %(default)s)")
    t.add_argument("--max-vocab", type=_positive, default=DEFAULT_MAX_VOCAB, help="keep this many words (default %(default)s)")
    t.add_argument("--format", choices=FORMATS, default="auto", help=_FORMAT_HELP)
    t.add_argument("--field", default="text", help="JSON Lines field holding the message (default %(default)s)")
    t.add_argument("--workers", type=int, default=None, help=f"counting processes (0 = one per core; default: one per core for inputs of {PARALLEL_MIN_BYTES >> 20} MB or more, else 1; same file either way)")
    t.add_argument("--memory-cap", metavar="SIZE", type=_size, help="bound the pair counts in memory, spilling to disk, e.g. 1GB (default: no bound)")
    t.add_argument("--max-size", metavar="SIZE", type=_size, help="prune n-grams (and words) until the file fits, e.g. 4MB; any --order and --smoothing (default: no budget)")
    t.add_argument("--rule", choices=("count", "entropy"), default=DEFAULT_RULE, help="pruning rule with --max-size (default %(default)s)")
    t.add_argument("--quantize", metavar="BITS", type=int, choices=QUANT_BITS, default=None,
                   help="store n-gram values as BITS-bit codes (2 to 8) into a codebook fitted per level (format 1.5, smaller file, top k still exact for its own probabilities; default: exact values)")
    t.add_argument("--compact", action="store_true",
                   help="code the successor lists by chunked Elias-Fano (format 1.6: the same answers, about a third fewer bytes)")
    t.add_argument("--json", action="store_true", help="print the training report as JSON")

    s = sub.add_parser("suggest", help="print suggestions for typed texts")
    s.add_argument("model", help=_MODEL_HELP)
    s.add_argument("texts", nargs="*", metavar="TEXT", help="typed text; none = one per line on stdin")
    s.add_argument("-k", type=_positive, default=3, help="suggestions per text (default %(default)s)")
    s.add_argument("--lam", type=_lam, default=None, help=_LAM_HELP)
    s.add_argument("--time", action="store_true", help="time each query (median of repeated calls)")
    _add_typo_options(s)
    s.add_argument("--json", action="store_true", help="print JSON")

    i = sub.add_parser("info", help="describe a model file")
    i.add_argument("model", help=_MODEL_HELP)
    i.add_argument("--verify", action="store_true", help="read and check every section of the file, not only what opening it needs")
    i.add_argument("--json", action="store_true", help="print JSON")

    e = sub.add_parser("eval", help="measure keystroke savings, accuracy and latency on typing logs, beside baselines "
                       "(λ = 0 and 0.999; for an order-3 model the bigram of the same smoothing)")
    e.add_argument("model", help=_MODEL_HELP)
    e.add_argument("logs", nargs="+", metavar="LOG", help="held-out typing logs: text or JSON Lines (.gz ok)")
    e.add_argument("-k", type=_positive, nargs="+", default=[1, 3, 5], help="suggestion counts (default 1 3 5)")
    e.add_argument("--lam", type=_lam, default=None, help=_LAM_HELP)
    e.add_argument("--format", choices=FORMATS, default="auto", help=_FORMAT_HELP)
    e.add_argument("--field", default="text", help="JSON Lines field holding the message (default %(default)s)")
    e.add_argument("--no-baselines", action="store_true",
                   help="skip the baseline runs: λ = 0 and λ = 0.999 (Jelinek-Mercer) and, for an order-3 model, the bigram "
                   "of the same smoothing on the same counts")
    e.add_argument("--train-data", nargs="+", metavar="FILE", help="training text: also time the plain-dict and nltk baselines (default: none, no timing baselines)")
    e.add_argument("--baseline-queries", type=_positive, default=200, help="queries timed per slow baseline (default %(default)s)")
    e.add_argument("--report", metavar="DIR", help="write report.md and plots into DIR, created if missing (default: none)")
    e.add_argument("--typo-rate", type=_slip_rate, default=0.0, metavar="R",
                   help="simulate a typist whose letter taps land on a neighbouring key with probability R (a 2-D "
                   "Gaussian touch model; wrong letters stay, no backspace) (default %(default)s: error-free)")
    e.add_argument("--omission-rate", type=_slip_rate, default=0.0, metavar="R",
                   help="share of letters the simulated typist leaves out (default %(default)s)")
    e.add_argument("--insertion-rate", type=_slip_rate, default=0.0, metavar="R",
                   help="share of letters followed by an extra tap near them (default %(default)s)")
    e.add_argument("--transposition-rate", type=_slip_rate, default=0.0, metavar="R",
                   help="share of letters swapped with the next one (default %(default)s)")
    e.add_argument("--typo-seed", type=int, default=0, metavar="N", help="seed of the simulated slips (default %(default)s)")
    _add_typo_options(e)
    e.add_argument("--json", action="store_true", help="print JSON")

    sp = sub.add_parser("split", help="split logs into train, tune and test parts by a hash of each message")
    sp.add_argument("logs", nargs="+", metavar="LOG", help="text or JSON Lines files (.gz ok); - for stdin")
    sp.add_argument("--test-percent", type=_percent, default=10,
                    help="share of messages in the test part, by the hash rule every benchmark uses (default %(default)s)")
    sp.add_argument("--train-out", required=True, metavar="FILE", help="where the training part goes (.gz = compressed)")
    sp.add_argument("--test-out", required=True, metavar="FILE", help="where the test (held-out) part goes (.gz = compressed)")
    sp.add_argument("--tune-out", metavar="FILE",
                    help="also write a tune part for nextword tune, carved from the non-test messages (default: none)")
    sp.add_argument("--tune-percent", type=_percent, default=None, metavar="P",
                    help=f"share of all messages in the tune part (default {DEFAULT_TUNE_PERCENT} with --tune-out)")
    sp.add_argument("--salt", default="", metavar="TEXT",
                    help="text hashed with every message: another salt gives an independent split, e.g. to re-split "
                    "a file that was itself held out (default: empty, the benchmarks' rule)")
    sp.add_argument("--format", choices=FORMATS, default="auto", help=_FORMAT_HELP)
    sp.add_argument("--field", default="text", help="JSON Lines field holding the message (default %(default)s)")
    sp.add_argument("--json", action="store_true", help="print the counts as JSON")

    tu = sub.add_parser(
        "tune",
        help="choose λ on held-out text (perplexity by EM, keystrokes by search, per history count); "
        "λ per order for a Jelinek-Mercer trigram; Kneser-Ney files are refused (their discounts stay fixed)",
    )
    tu.add_argument("model", help=_MODEL_HELP)
    tu.add_argument("heldout", nargs="+", metavar="HELDOUT", help="held-out text or JSON Lines (.gz ok), never the test text")
    tu.add_argument("-k", type=_positive, default=3, help="suggestions for the keystroke objective (default %(default)s)")
    tu.add_argument("--objective", choices=("perplexity", "keystrokes"), default="perplexity",
                    help="what the chosen λ optimises: held-out perplexity (EM; a trigram gets λ per order) or keystroke "
                    "savings at -k (search; a trigram gets one λ for both orders)")
    tu.add_argument("--buckets", action="store_true",
                    help="fit λ per history-count bucket (perplexity objective); for a trigram per order and bucket, "
                    "reported but not stored (its file keeps one λ per order)")
    tu.add_argument("--no-ksr-curve", action="store_true", help="skip the keystroke simulation curve (perplexity objective)")
    tu.add_argument("--min-bucket-events", type=_positive, default=500, help="held-out tokens per bucket (default %(default)s)")
    tu.add_argument("--test-percent", type=int, default=0, metavar="P",
                    help="hold P%% of HELDOUT out of tuning (by hash) and report before/after on it "
                    "(default 0: tune and measure on the same text)")
    tu.add_argument("-o", "--output", metavar="NEW_MODEL", help="write the model with the chosen λ here, atomically, never over its input (default: only report)")
    tu.add_argument("--format", choices=FORMATS, default="auto", help=_FORMAT_HELP)
    tu.add_argument("--field", default="text", help="JSON Lines field holding the message (default %(default)s)")
    tu.add_argument("--report", metavar="DIR", help="write tune.md and curve plots into DIR, created if missing (default: none)")
    tu.add_argument("--json", action="store_true", help="print JSON")

    pe = sub.add_parser("personal", help="a user's personal layer: learn, forget, block, suggest, info")
    pe.add_argument("layer", metavar="LAYER_FILE", help="the layer's file (learn and block create it if missing, other actions need it unless --create; every change saved at once)")
    pe.add_argument("--model", required=True, help="the base model (never written)")
    pe.add_argument("action", choices=("learn", "forget", "clear", "block", "unblock", "suggest", "info"),
                    help="what to do with the layer")
    pe.add_argument("items", nargs="*", metavar="TEXT", help="messages to learn, words, or typed texts")
    pe.add_argument("-k", type=_positive, default=3, help="suggestions per text (default %(default)s)")
    pe.add_argument("--create", action="store_true", help="create LAYER_FILE if missing for any action (default: only learn and block create)")
    pe.add_argument("--min-uses", type=_positive, default=2, help="uses before a new word is offered (new layers)")
    pe.add_argument("--half-life-messages", type=float, default=None, help="decay: a message's weight halves after this many newer ones (new layers; default: no decay)")
    pe.add_argument("--half-life-days", type=float, default=None, help="decay: a message's weight halves after this many days (new layers; default: no decay)")
    pe.add_argument("--json", action="store_true", help="print JSON")

    pr = sub.add_parser("prune", help="drop the least valuable n-grams (and words) until the model fits a size budget (any estimator and order)")
    pr.add_argument("model", help=_MODEL_HELP)
    pr.add_argument("-o", "--output", help="the pruned model (written atomically, never over its input); required unless --curve (default: none)")
    pr.add_argument("--max-size", metavar="SIZE", type=_size, help="budget, e.g. 4MB, 1.5MiB, 800000; required unless --curve (default: none)")
    pr.add_argument("--rule", choices=("count", "entropy"), default=DEFAULT_RULE, help="which pairs and words go first (default %(default)s)")
    pr.add_argument("--keep-vocabulary", action="store_true",
                    help="remove n-grams only, never words (default: words go too when they are worth less per byte; "
                    "Kneser-Ney and order-3 files always keep their words)")
    pr.add_argument("--curve", nargs="+", metavar="HELDOUT",
                    help="write nothing; print file size against KSR@k and perplexity on these held-out logs, both rules, for each of --sizes (default: no curve)")
    pr.add_argument("--sizes", nargs="+", metavar="SIZE", type=_size,
                    help="budgets for --curve (default: 100%%, 75%%, 50%%, 35%%, 25%% of the model's size)")
    pr.add_argument("-k", type=_positive, default=3, help="suggestions for KSR in --curve (default %(default)s)")
    pr.add_argument("--messages", type=_positive, default=400, help="held-out messages simulated for KSR in --curve (default %(default)s; perplexity uses all)")
    pr.add_argument("--plot", metavar="PNG", help="with --curve: also draw file size against KSR@k, one line per rule (needs matplotlib; default: no plot)")
    pr.add_argument("--json", action="store_true", help="print the result as JSON")

    ex = sub.add_parser("export", help="export a model (any estimator and order) as an ARPA back-off file")
    ex.add_argument("model", help=_MODEL_HELP)
    ex.add_argument("-o", "--output", "--arpa", dest="output", required=True, metavar="FILE",
                    help="write the ARPA back-off text here: every stored n-gram with its interpolated log10 probability, "
                    "every context with its back-off weight (.gz = compressed; atomically, never over the model)")
    ex.add_argument("--lam", type=_lam, default=None, help="override every order's λ, as at query time (Jelinek-Mercer only; default: the λ stored in the model)")
    ex.add_argument("--json", action="store_true", help="print the result as JSON")

    sv = sub.add_parser("serve", help="answer suggest/learn/forget requests over a local socket (JSON lines)")
    sv.add_argument("model", help=_MODEL_HELP)
    where = sv.add_mutually_exclusive_group()
    where.add_argument("--socket", metavar="PATH", help="Unix socket to listen on (default $XDG_RUNTIME_DIR/nextword.sock, else ./nextword.sock)")
    where.add_argument("--tcp", metavar="HOST:PORT", help="listen on TCP instead, loopback only (port 0 = any free port; default: the Unix socket)")
    sv.add_argument("--allow-non-loopback", action="store_true", help="let --tcp listen on a non-loopback address (no authentication!)")
    sv.add_argument("--users", metavar="DIR", help="keep one personal layer file per user here (default: none, personal requests are refused)")
    sv.add_argument("--max-line-bytes", type=_positive, default=64 * 1024, help="longest request line (default %(default)s)")
    sv.add_argument("--request-timeout", type=_seconds, default=10.0, help="seconds to finish sending a request (default %(default)s)")
    sv.add_argument("--idle-timeout", type=_seconds, default=0.0, help="close silent connections after this many seconds (default 0 = never)")
    sv.add_argument("--max-clients", type=_positive, default=64, help="simultaneous connections (default %(default)s)")
    sv.add_argument("--max-k", type=_positive, default=50, help="largest k a request may ask for (default %(default)s)")
    sv.add_argument("--grace", type=_seconds, default=5.0, help="seconds a stop waits for requests in progress (default %(default)s)")
    sv.add_argument("--max-open-users", type=_positive, default=DEFAULT_MAX_OPEN_USERS, help="personal layers kept open at once; the least recently used is closed (default %(default)s)")

    mx = sub.add_parser("mix", help="mix several models (e.g. a general and a domain model) with weights fitted on held-out text")
    mx.add_argument("parts", nargs="+", metavar="MODEL", help="model files to mix (any estimator and order; counted under the same text rules)")
    mx.add_argument("-o", "--output", required=True, metavar="MIX_FILE",
                    help="the mixture file to write (atomically; it names its parts by relative path, with their size and SHA-256)")
    how = mx.add_mutually_exclusive_group(required=True)
    how.add_argument("--heldout", nargs="+", metavar="HELDOUT",
                     help="fit the weights by EM on this held-out text (the domain's, never its test text); one of --heldout and --weights is required (default: none)")
    how.add_argument("--weights", nargs="+", type=float, metavar="W", help="use these weights, one per part, each >= 0, summing to 1 (default: none)")
    mx.add_argument("--format", choices=FORMATS, default="auto", help=_FORMAT_HELP)
    mx.add_argument("--field", default="text", help="JSON Lines field holding the message (default %(default)s)")
    mx.add_argument("--json", action="store_true", help="print the result as JSON")

    lv = sub.add_parser("live", help="type in the terminal and watch suggestions update on every key")
    lv.add_argument("model", help=_MODEL_HELP)
    lv.add_argument("-k", type=_positive, default=5, help="suggestions shown (default %(default)s)")
    lv.add_argument("--lam", type=_lam, default=None, help=_LAM_HELP)
    _add_typo_options(lv)

    tu.description = (
        "Choose λ on held-out text. A Jelinek-Mercer bigram gets one λ (or λ per history-count bucket with --buckets); "
        "a Jelinek-Mercer trigram gets λ per order (perplexity) or one λ for both orders (keystrokes). "
        "Kneser-Ney files are refused in one line (exit 2): their discounts stay at the count-of-counts estimate."
    )
    e.description = (
        "Simulate typing held-out logs: keystroke savings, hit@k, perplexity, latency. Baselines on the same logs: "
        "the model at λ = 0 and λ = 0.999 (Jelinek-Mercer) and, for an order-3 model, the bigram of the same "
        "smoothing on the same counts (what the two-word context buys)."
    )
    ex.description = (
        "Write any model (Jelinek-Mercer or Kneser-Ney, order 2 or 3) as an ARPA back-off file: every stored n-gram "
        "with its interpolated log10 probability, every context with its back-off weight log10 γ, so the ordinary "
        "back-off reading reproduces the model for every context and word."
    )
    for command in (tu, e, ex):  # the raw formatter keeps text as written: wrap it here
        command.description = textwrap.fill(command.description or "", width=88)
    for name, command in sub.choices.items():
        command.intermixed = True
        if name in _EXAMPLES:
            command.epilog = "examples:\n" + "\n".join(f"  {line}" for line in _EXAMPLES[name])
    return p


def build_parser() -> argparse.ArgumentParser:
    """The ``nextword`` argument parser (for documentation tools and tests; :func:`main` runs it)."""
    return _parser()


def _cmd_train(args: argparse.Namespace) -> int:
    if args.lam3 is not None and (args.order != 3 or args.smoothing != "jm"):
        raise InvalidArgumentError(f"--lam3 {args.lam3} needs --order 3 --smoothing jm (got --order {args.order} --smoothing {args.smoothing})")
    report = train(
        args.inputs,
        args.output,
        lam=args.lam,
        order=args.order,
        smoothing=args.smoothing,
        lam3=DEFAULT_LAMBDA if args.lam3 is None else args.lam3,
        min_count=args.min_count,
        max_vocab=args.max_vocab,
        fmt=args.format,
        field=args.field,
        max_bytes=None if args.max_size is None else _size_arg(args.max_size),
        prune_rule=args.rule,
        workers=args.workers,
        memory_cap=None if args.memory_cap is None else _size_arg(args.memory_cap),
        quantize=args.quantize,
        compact=args.compact,
    )
    data = {
        "path": report.path,
        "vocabulary": report.n_words,
        "bigrams": report.n_bigrams,
        "word_tokens": report.word_tokens,
        "messages": report.messages,
        "file_bytes": report.file_bytes,
        "bytes_per_bigram": report.file_bytes / max(report.n_bigrams, 1),
        "trigrams": report.n_trigrams,
        "bytes_per_ngram": report.file_bytes / max(report.n_bigrams + report.n_trigrams, 1),
        "count_seconds": round(report.count_seconds, 4),
        "build_seconds": round(report.build_seconds, 4),
        "words_per_second": round(report.words_per_second),
    }
    if args.json:
        print(json.dumps(data, indent=2))
    else:
        print(
            f"wrote {report.path}: {report.n_words:,} words, {report.n_bigrams:,} bigrams, "
            + (f"{report.n_trigrams:,} trigrams, {report.file_bytes:,} bytes ({data['bytes_per_ngram']:.2f} bytes/n-gram); "
               if report.n_trigrams else f"{report.file_bytes:,} bytes ({data['bytes_per_bigram']:.2f} bytes/bigram); ")
            + f"counted {report.word_tokens:,} words in {report.count_seconds + report.build_seconds:.2f} s "
            f"({report.words_per_second:,.0f} words/s)"
        )
    return 0


def _size_arg(text: str) -> int:
    from .prune import parse_size

    return parse_size(text)


def _time_query(model: Model | MixedModel, text: str, k: int, lam: float | None, typo: Any = None) -> float:
    """Median seconds of repeated calls (the first, cold call excluded)."""
    model.suggest(text, k, lam=lam, typo=typo)
    runs = []
    for _ in range(51):
        t0 = time.perf_counter()
        model.suggest(text, k, lam=lam, typo=typo)
        runs.append(time.perf_counter() - t0)
    return statistics.median(runs)


def _cmd_suggest(args: argparse.Namespace) -> int:
    t0 = time.perf_counter()
    model = open_any(args.model)
    load_s = time.perf_counter() - t0
    typo = _typo_channel(args)
    texts = args.texts if args.texts else [line.rstrip("\n") for line in sys.stdin]
    results: list[dict[str, Any]] = []
    for text in texts:
        sugg = model.suggest(text, args.k, lam=args.lam, typo=typo)
        # with --tolerate-typos the score is channel weight × probability, not a probability
        item: dict[str, Any] = {"text": text, "suggestions": [{"word": s.word, "prob": s.prob} for s in sugg]}
        if args.time:
            item["microseconds"] = round(_time_query(model, text, args.k, args.lam, typo) * 1e6, 1)
        results.append(item)
    if args.json:
        out: dict[str, Any] = {"model": args.model, "results": results}
        if args.time:
            out["load_milliseconds"] = round(load_s * 1e3, 3)
        print(json.dumps(out, ensure_ascii=False, indent=2))
        return 0
    if args.time:
        print(f"loaded {args.model} in {load_s * 1e3:.2f} ms")
    width = min(max((len(r["text"]) for r in results), default=0) + 2, 40)
    for r in results:
        words = _strip(r["suggestions"])
        timing = f"   [{r['microseconds']:.0f} µs]" if args.time else ""
        print(f"{json.dumps(r['text'], ensure_ascii=False):<{width}} -> {words}{timing}")
    return 0


def _strip(suggestions: list[dict[str, Any]]) -> str:
    """One line of suggestions with their probabilities, as the text commands print them."""
    return "  ".join(f"{s['word']} ({s['prob']:.3f})" for s in suggestions) or "(no suggestion)"


def _cmd_info(args: argparse.Namespace) -> int:
    model = open_any(args.model, verify=args.verify)
    data = model.info()
    data["verified"] = bool(args.verify)
    if args.json:
        print(json.dumps(data, indent=2, ensure_ascii=False))
        return 0
    if isinstance(model, MixedModel):
        print(f"{'mixture':48} {args.model}")
        print(f"{'union vocabulary':48} {data['vocabulary']}")
        print(f"{'file bytes (the parts and the mixture file)':48} {data['file_bytes']}")
        for i, (part, w) in enumerate(zip(data["parts"], data["weights"])):
            kind = f"{part.get('estimator', 'jm')} order {part.get('order', 2)}"
            print(f"{'part ' + str(i):48} weight {w:.4f}: {part['path']} ({kind}, {part['vocabulary']} words, {part['file_bytes']} bytes)")
        return 0
    corpus = data.pop("corpus")
    labels = {
        "vocabulary_bytes": "vocabulary bytes (trie, ids, counts, rows)",
        "pair_bytes": "pair bytes (successors, counts, skybands)",
        "other_bytes": "other bytes (header, table, metadata, padding)",
        "vocabulary_share": "vocabulary share of the file",
        "pair_bytes_per_pair": "pair bytes per pair (vocabulary excluded)",
        "file_bytes_per_pair": "whole file / pairs (vocabulary included)",
    }
    for key, value in data.items():
        if key == "bytes_per_bigram":
            continue  # the same figure as file_bytes_per_pair, labelled there
        if key == "vocabulary_share":
            value = f"{100 * value:.1f}%"
        elif isinstance(value, float):
            value = f"{value:.3f}"
        print(f"{labels.get(key, key):48} {value}")
    for key, value in corpus.items():
        print(f"{'corpus.' + key:48} {value}")
    return 0


def _cmd_eval(args: argparse.Namespace) -> int:
    model = open_any(args.model, lam=args.lam)
    if isinstance(model, MixedModel) and args.train_data:
        raise UsageError("--train-data times the plain-dict and nltk baselines against one model file, not a mixture")
    # stages: reading, the model, the λ baselines (Jelinek-Mercer) and the bigram of the same
    # smoothing (order 3) — or each part alone (a mixture) —, then (with --train-data) 6 timing stages
    if isinstance(model, MixedModel):
        baselines = 0 if args.no_baselines else len(model.parts)
    else:
        baselines = 0 if args.no_baselines else 2 * (model.estimator == "jm") + (model.order == 3)
    bar = Progress("eval", stages=2 + baselines + 6 * bool(args.train_data))
    try:
        return _run_eval(args, bar, model)
    finally:
        bar.done()  # also on errors: the error message then starts on a clean line


def _run_eval(args: argparse.Namespace, bar: Progress, model: Model | MixedModel) -> int:
    from .evaluate import evaluate
    from .report import eval_data, text_report, write_report

    ks = sorted(set(args.k))
    sources = open_sources(args.logs, fmt=args.format, field=args.field)
    sizes = [0 if s.name == "-" else os.path.getsize(s.name) for s in sources]
    bar.stage("reading the logs", total=sum(sizes), unit="B")
    logs: list[tuple[str, list[str]]] = []
    for i, s in enumerate(sources):
        before = sum(sizes[:i])

        def read(done: int, _total: int, before: int = before) -> None:
            bar.update(before + done)

        logs.append((s.name, list(iter_messages([s], progress=read))))
    for name, msgs in logs:
        if not any(m.strip() for m in msgs):
            raise InputDataError(f"{name}: no messages to evaluate (the log is empty or blank)")
    n_msgs = sum(1 for _, msgs in logs for m in msgs if m.strip())  # what evaluate() simulates
    typist, typo = _eval_typist(args), _typo_channel(args)
    noisy = {"typist": typist, "typo": typo}
    bar.stage("simulating typing", total=n_msgs, unit="messages")
    overall, per_log = evaluate(model, logs, ks, progress=bar.update, **noisy)
    baselines: dict[str, Any] = {}
    if isinstance(model, MixedModel):
        if not args.no_baselines:  # what mixing buys: each part alone on the same logs
            baselines["parts"] = {}
            for i, (part, w) in enumerate(zip(model.parts, model.weights)):
                bar.stage(f"baseline: part {i} alone", total=n_msgs, unit="messages")
                o, _ = evaluate(part, logs, ks, progress=bar.update, **noisy)
                baselines["parts"][f"part {i} alone ({part.path}, weight {w:.3f})"] = o.as_dict()
    else:
        if not args.no_baselines:
            baselines.update(_model_baselines(bar, model, logs, ks, n_msgs, noisy))
        if args.train_data:
            baselines.update(_timing_baselines(args, bar, model, logs, ks))
    bar.done()
    data = eval_data(args.model, overall, per_log, baselines)
    if typist is not None or typo is not None:
        data["typing"] = {
            "typist": None if typist is None else typist.describe(),
            "tolerance": None if typo is None else repr(typo),
            "backspace": "none: a wrong tap stays; a word not offered is left as typed",
        }
    if args.report:
        write_report(args.report, data, overall.latencies)
    if args.json:
        print(json.dumps(data, indent=2, ensure_ascii=False))
    else:
        print(text_report(data, overall, per_log))
        if "typing" in data:
            print(_typing_lines(data["typing"], overall))
    return 0


def _model_baselines(
    bar: Progress, model: Model, logs: list[tuple[str, list[str]]], ks: list[int], n_msgs: int, noisy: dict[str, Any]
) -> dict[str, Any]:
    """The λ runs (Jelinek-Mercer) and the bigram of the same smoothing (order 3) on the same logs,
    with the same typist and typo tolerance (``noisy``) as the model's own run."""
    from .evaluate import evaluate

    baselines: dict[str, Any] = {}
    if model.estimator == "jm":  # λ has no meaning for Kneser-Ney
        baselines["lambda"] = {}
        top = "bigram only" if model.order == 2 else "highest order only"
        for label, lam in (("unigram only (λ = 0)", 0.0), (f"{top} (λ = 0.999)", 0.999)):
            bar.stage(f"baseline {label.split(' (')[0]}", total=n_msgs, unit="messages")
            o, _ = evaluate(model, logs, ks, lam=lam, progress=bar.update, **noisy)
            baselines["lambda"][label] = o.as_dict()
    if model.order == 3:  # what the two-word context buys
        import tempfile

        from .build import write_same_smoothing_bigram

        bar.stage("baseline: the bigram of the same smoothing", total=n_msgs, unit="messages")
        with tempfile.TemporaryDirectory(prefix="nextword-eval-") as tmp:
            try:
                how = write_same_smoothing_bigram(model, os.path.join(tmp, "bigram.nwm"))
            except InvalidArgumentError as e:  # a pruned file: its raw counts are gone; say so, measure the rest
                baselines["bigram_skipped"] = str(e)
                print(f"nextword: note: no bigram baseline: {e}", file=sys.stderr)
            else:
                bigram = load(os.path.join(tmp, "bigram.nwm"))
                o, _ = evaluate(bigram, logs, ks, progress=bar.update, **noisy)
                bigram.close()
                name = f"{'Kneser-Ney' if model.estimator == 'kn' else 'Jelinek-Mercer'} bigram, same counts"
                baselines["bigram"] = {**o.as_dict(), "name": name, "how": how}
    return baselines


def _timing_baselines(
    args: argparse.Namespace, bar: Progress, model: Model, logs: list[tuple[str, list[str]]], ks: list[int]
) -> dict[str, Any]:
    """Training and query time beside the plain-dict and nltk baselines (``--train-data``)."""
    from .baselines import DictBigram, nltk_baseline, sample_queries, time_queries

    baselines: dict[str, Any] = {}
    bar.stage("reading training data")
    train_msgs = list(iter_messages(open_sources(args.train_data, fmt=args.format, field=args.field)))
    queries = sample_queries((m for _, msgs in logs for m in msgs), args.baseline_queries)
    k = max(ks)
    bar.stage(f"timing our training on {len(train_msgs):,} messages")
    t0 = time.perf_counter()
    train_texts(train_msgs, _scratch(), min_count=model.stats.get("min_count", 2))
    ours_fit = time.perf_counter() - t0
    bar.stage("fitting the plain-dict baseline")
    t0 = time.perf_counter()
    base = DictBigram(train_msgs, min_count=model.stats.get("min_count", 2), max_vocab=model.stats.get("max_vocab", 30000))
    fit = time.perf_counter() - t0
    bar.stage("timing the engine's queries", total=len(queries), unit="queries")
    eng = time_queries(lambda q: model.suggest(q, k), queries, progress=bar.update)
    bar.stage("timing the plain-dict baseline's queries", total=len(queries), unit="queries")
    slow = time_queries(lambda q: base.suggest_keys(q, k, model.lam), queries, progress=bar.update)
    same = sum(
        [fold(s.word) for s in model.suggest(q, k)] == [w for w, _ in base.suggest_keys(q, k, model.lam)]
        for q in queries
    )
    eng_p50 = statistics.median(eng) * 1e6
    baselines["dict"] = {
        "fit_seconds": fit, "queries": len(queries), "p50_us": statistics.median(slow) * 1e6,
        "engine_p50_us": eng_p50, "ratio_p50": statistics.median(slow) * 1e6 / eng_p50, "identical": same,
    }
    nq = queries[: max(1, min(len(queries), 20))]
    bar.stage("nltk.lm baseline: fit, then queries", total=len(nq), unit="queries")
    n = nltk_baseline(train_msgs, nq, k, model.lam, min_count=model.stats.get("min_count", 2), progress=bar.update)
    n_p50 = statistics.median(n["query_seconds"]) * 1e6
    baselines["nltk"] = {
        "fit_seconds": n["fit_seconds"], "fit_ratio": n["fit_seconds"] / ours_fit, "queries": len(nq),
        "p50_us": n_p50, "ratio_p50": n_p50 / eng_p50, "engine_fit_seconds": ours_fit,
    }
    return baselines


def _typing_lines(typing: dict[str, Any], overall: Any) -> str:
    """What ``eval`` adds to its table for a noisy typist or typo-tolerant suggestions."""
    t = typing["typist"]
    who = ("error-free typist" if t is None else
           f"noisy typist: substitution {t['substitution']}, omission {t['omission']}, insertion {t['insertion']}, "
           f"transposition {t['transposition']} ({t['layout']}, σ {t['sigma']} keys, seed {t['seed']}); "
           f"backspace {typing['backspace']}")
    lines = ["", who, f"typo tolerance: {typing['tolerance'] or 'off'}"]
    for k in overall.ks:
        st = overall.per_k[k]
        lines.append(f"  k={k}: words never offered {100 * st.not_completed_rate:.1f}%, "
                     f"of them misspelt by a slip {100 * st.lost_rate:.1f}% of all words")
    return "\n".join(lines)


def _eval_typist(args: argparse.Namespace) -> Any:
    """The noisy typist of ``eval``'s slip options (None for an error-free typist)."""
    from .evaluate import NoisyTypist
    from .keyboard import load_layout

    rates = (args.typo_rate, args.omission_rate, args.insertion_rate, args.transposition_rate)
    if not any(rates):
        return None
    if args.typo_seed < 0:
        raise UsageError(f"--typo-seed must be >= 0, got {args.typo_seed}")
    if sum(rates) > 0.5:
        raise UsageError(f"the slip rates must sum to at most 0.5, got {sum(rates)}")
    return NoisyTypist(substitution=args.typo_rate, omission=args.omission_rate, insertion=args.insertion_rate,
                       transposition=args.transposition_rate, seed=args.typo_seed, layout=load_layout(args.layout))


def _scratch() -> str:
    """A temporary model path for timing our own training next to a baseline's fit."""
    import tempfile

    return os.path.join(tempfile.mkdtemp(prefix="nextword-eval-"), "timing.nwm")


def _cmd_split(args: argparse.Namespace) -> int:
    from .evaluate import split_messages

    if args.tune_percent is not None and not args.tune_out:
        raise UsageError("--tune-percent sets the tune part's share; give --tune-out FILE too")
    tune_percent = (DEFAULT_TUNE_PERCENT if args.tune_percent is None else args.tune_percent) if args.tune_out else 0
    if args.test_percent + tune_percent > 99:
        raise UsageError(
            f"--test-percent {args.test_percent} and --tune-percent {tune_percent} leave no training part (at most 99 together)"
        )
    bar = Progress("split")
    bar.stage("reading the inputs", unit="B")
    try:
        counts = split_messages(
            open_sources(args.logs, fmt=args.format, field=args.field),
            args.train_out,
            args.test_out,
            test_percent=args.test_percent,
            salt=args.salt,
            tune_out=args.tune_out,
            tune_percent=tune_percent,
            progress=bar.update,
        )
    finally:
        bar.done()
    total = sum(counts.values())
    parts = [("train", args.train_out), ("test", args.test_out)] + ([("tune", args.tune_out)] if args.tune_out else [])
    for part, path in parts:
        if counts[part] == 0:
            why = (
                "; every message hashed to one side: were these messages split by the same rule before? "
                "--salt TEXT gives an independent split"
                if total
                else ""
            )
            label = "training" if part == "train" else part
            print(f"nextword: warning: the {label} part ({path}) is empty: 0 of {total:,} messages{why}", file=sys.stderr)
    if args.json:
        out: dict[str, Any] = {
            "inputs": args.logs,
            "messages": total,
            "salt": args.salt,
            "test_percent": args.test_percent,
            "tune_percent": tune_percent,
            **{part: {"path": path, "messages": counts[part]} for part, path in parts},
        }
        print(json.dumps(out, ensure_ascii=False))
    else:
        tune = f", {counts['tune']:,} to {args.tune_out}" if args.tune_out else ""
        print(f"wrote {counts['train']:,} messages to {args.train_out}{tune} and {counts['test']:,} to {args.test_out}")
    return 0


def _cmd_tune(args: argparse.Namespace) -> int:
    from .tune import check_tunable

    if not 0 <= args.test_percent <= 90:
        raise UsageError(f"argument --test-percent: expected 0-90, got {args.test_percent}")
    if args.buckets and args.objective != "perplexity":
        raise UsageError("--buckets fits λ per bucket by perplexity; use it with --objective perplexity")
    if is_mix_file(args.model):
        if args.buckets or args.report:
            raise UsageError(f"{'--buckets' if args.buckets else '--report'} applies to a model file's λ; a mixture's tuning refits its weights")
        return _tune_mix(args)
    model = load(args.model)
    check_tunable(model)  # Kneser-Ney: one line, exit 2 (its discounts stay fixed)
    # stages: held-out events, the keystroke search (unless off), before, writing (-o), after
    search = args.objective == "keystrokes" or not args.no_ksr_curve
    trigram = model.order == 3  # λ per order: "after" is always measured, from a written file
    measured_after = trigram or bool(args.output) or not args.buckets
    bar = Progress("tune", stages=2 + search + (trigram or bool(args.output)) + measured_after)
    try:
        return _run_tune(args, bar, search, model)
    finally:
        bar.done()  # also on errors: the error message then starts on a clean line


def _tune_mix(args: argparse.Namespace) -> int:
    """Refit a mixture's weights: EM on held-out perplexity, or (two parts) the weight of best KSR@k on a grid."""
    from .evaluate import evaluate, is_held_out
    from .mix import fit_weights, load_mix, read_mix, write_mix

    mix = load_mix(args.model)
    messages = [m for m in iter_messages(open_sources(args.heldout, fmt=args.format, field=args.field)) if m.strip()]
    if args.test_percent:
        tune_msgs = [m for m in messages if not is_held_out(m, args.test_percent, salt="tune:")]
        test_msgs = [m for m in messages if is_held_out(m, args.test_percent, salt="tune:")]
    else:
        tune_msgs, test_msgs = messages, messages
    if not tune_msgs or not test_msgs:
        raise InvalidArgumentError("not enough held-out messages to tune and measure")
    if args.objective == "keystrokes" and len(mix.parts) != 2:
        raise UsageError(f"--objective keystrokes searches the weight of a two-part mixture; {args.model} has {len(mix.parts)} parts")
    bar = Progress("tune")
    try:
        bar.stage(f"fitting weights by EM on {len(tune_msgs):,} messages")
        fit = fit_weights(mix.parts, tune_msgs)
        chosen = fit.weights
        curve: list[dict[str, float]] = []
        if args.objective == "keystrokes":
            grid = sorted({0.0, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 1.0, round(fit.weights[0], 4)})
            for w in grid:
                bar.stage(f"KSR@{args.k} at weight {w:.2f}", unit="messages")
                o, _ = evaluate(MixedModel(mix.parts, [w, 1.0 - w]), [("tune", tune_msgs)], (args.k,), progress=bar.update)
                curve.append({"weight": w, "ksr": o.per_k[args.k].ksr})
            best = max(curve, key=lambda r: (r["ksr"], -abs(r["weight"] - fit.weights[0])))
            chosen = [best["weight"], 1.0 - best["weight"]]
        measured: dict[str, dict[str, Any]] = {}
        for when, ws in (("before", list(mix.weights)), ("after", chosen)):
            bar.stage(f"measuring {when}", unit="messages")
            o, _ = evaluate(MixedModel(mix.parts, ws), [("test", test_msgs)], (args.k,), progress=bar.update)
            measured[when] = {"weights": ws, "perplexity": o.perplexity, "ksr": o.per_k[args.k].ksr}
        if args.output:
            bar.stage(f"writing {args.output}")
            fitted = {"method": "em" if args.objective == "perplexity" else f"ksr@{args.k} grid", "messages": len(tune_msgs), **fit.as_dict()}
            write_mix(args.output, [p["path"] for p in read_mix(args.model)["parts"]], chosen, fitted=fitted)
    finally:
        bar.done()
    result: dict[str, Any] = {"model": args.model, "objective": args.objective, "k": args.k, "em": fit.as_dict(),
                              "chosen_weights": chosen, "ksr_curve": curve, **measured, "output": args.output}
    if args.json:
        print(json.dumps(result, ensure_ascii=False))
        return 0
    b, a = measured["before"], measured["after"]
    print(f"weights {', '.join(f'{w:.4f}' for w in b['weights'])} -> {', '.join(f'{w:.4f}' for w in chosen)} ({args.objective})")
    print(f"perplexity {b['perplexity']:.2f} -> {a['perplexity']:.2f}; KSR@{args.k} {100 * b['ksr']:.2f}% -> {100 * a['ksr']:.2f}%")
    if args.output:
        print(f"wrote {args.output}")
    return 0


def _run_tune(args: argparse.Namespace, bar: Progress, search: bool, model: Model) -> int:
    from .evaluate import evaluate, is_held_out
    from .store import rewrite_model
    from .tune import events_of, fit_buckets, keystroke_search, optimal_lambda, perplexity_at

    messages = [m for m in iter_messages(open_sources(args.heldout, fmt=args.format, field=args.field)) if m.strip()]
    if args.test_percent:
        tune_msgs = [m for m in messages if not is_held_out(m, args.test_percent, salt="tune:")]
        test_msgs = [m for m in messages if is_held_out(m, args.test_percent, salt="tune:")]
        used = f"tuned on {len(tune_msgs):,} messages; before/after on {len(test_msgs):,} others held out by hash ({args.test_percent}%)"
    else:
        tune_msgs, test_msgs = messages, messages
        used = f"tuned and measured on the same {len(tune_msgs):,} messages (optimistic; use --test-percent)"
    if not tune_msgs or not test_msgs:
        raise InvalidArgumentError("not enough held-out messages to tune and measure")
    n_test = sum(1 for m in test_msgs if m.strip())

    def measure(m: Model, when: str) -> dict[str, float]:
        bar.stage(f"measuring {when} on {n_test:,} messages", total=n_test, unit="messages")
        overall, _ = evaluate(m, [("test", test_msgs)], (args.k,), progress=bar.update)
        return {"perplexity": overall.perplexity, "ksr": overall.per_k[args.k].ksr}

    if model.order == 3:
        return _tune_orders(args, bar, search, model, tune_msgs, used, measure)
    bar.stage(f"held-out events of {len(tune_msgs):,} messages, perplexity curve")
    ev = events_of(model, tune_msgs)
    b, u = ev.bu()
    ppl_lam = optimal_lambda(b, u)
    lams = [0.0, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 0.95, 0.99, round(ppl_lam, 4)]
    ppl_curve = {lam: perplexity_at(ev, lam) for lam in sorted(set(lams))}
    ksr_curve: dict[float, float] = {}
    buckets = None
    ksr_lam = None
    if search:
        bar.stage(f"searching λ for KSR@{args.k}", unit="messages")
        ksr_lam, ksr_curve = keystroke_search(model, tune_msgs, k=args.k, progress=bar.update)
    if args.objective == "keystrokes" and ksr_lam is not None:
        chosen = ksr_lam
    else:
        chosen = ppl_lam
        if args.buckets:
            buckets = fit_buckets(ev, min_events=args.min_bucket_events)
    before = measure(model, "before")
    result: dict[str, Any] = {
        "model": args.model,
        "objective": args.objective,
        "held_out_use": used,
        "stored_lambda": model.stored_lam,
        "perplexity_optimal_lambda": ppl_lam,
        "keystroke_optimal_lambda": ksr_lam,
        "chosen_lambda": chosen,
        "buckets": None if buckets is None else {**buckets.as_meta(), "events": buckets.events},
        "perplexity_curve": [{"lambda": k, "perplexity": v} for k, v in ppl_curve.items()],
        "ksr_curve": [{"lambda": k, "ksr": v} for k, v in ksr_curve.items()],
        "k": args.k,
        "before": before,
    }
    if args.output:
        bar.stage(f"writing {args.output}")
        rewrite_model(args.model, args.output, lam=chosen, buckets=None if buckets is None else buckets.as_meta())
        result["output"] = args.output
        result["after"] = measure(load(args.output), "after")
    else:
        tuned = load(args.model, lam=chosen)
        result["after"] = measure(tuned, "after") if buckets is None else None
    bar.done()
    if args.report:
        _tune_report(args.report, result)
    if args.json:
        print(json.dumps(result, indent=2))
        return 0
    print(f"model: {args.model}; {used}")
    print(f"{'λ':>8} {'perplexity':>11}" + (f" {'KSR@' + str(args.k):>8}" if ksr_curve else ""))
    for lam in sorted(set(ppl_curve) | set(ksr_curve)):
        ppl = f"{ppl_curve[lam]:11.2f}" if lam in ppl_curve else f"{perplexity_at(ev, lam):11.2f}"
        ksr = f" {100 * ksr_curve[lam]:7.2f}%" if lam in ksr_curve else ""
        print(f"{lam:8.4f} {ppl}{ksr}")
    ksr_note = f"; keystroke-optimal λ (k = {args.k}) = {ksr_lam:.4f}" if ksr_lam is not None else ""
    print(f"perplexity-optimal λ = {ppl_lam:.4f}{ksr_note}; chosen λ = {chosen:.4f} ({args.objective})")
    if buckets is not None:
        spans = [f"c(v)<{buckets.bounds[0]}"] + [f"{a}≤c(v)<{b}" for a, b in zip(buckets.bounds, buckets.bounds[1:])]
        spans.append(f"c(v)≥{buckets.bounds[-1]}" if buckets.bounds else "all")
        for span, lam, n in zip(spans, buckets.lambdas, buckets.events):
            print(f"  bucket {span:>22}: λ = {lam:.4f} ({n:,} held-out tokens)")
    after = result.get("after")
    line = f"before (λ = {model.stored_lam}): perplexity {before['perplexity']:.2f}, KSR@{args.k} {100 * before['ksr']:.2f}%"
    if after:
        line += f"; after: perplexity {after['perplexity']:.2f}, KSR@{args.k} {100 * after['ksr']:.2f}%"
    print(line)
    if args.output:
        print(f"wrote {args.output}")
    return 0


def _tune_orders(
    args: argparse.Namespace, bar: Progress, search: bool, model: Model, tune_msgs: list[str], used: str, measure: Any
) -> int:
    """``tune`` of a Jelinek-Mercer trigram file: λ per order by perplexity (EM), or one λ for
    both orders by keystrokes; per-order buckets are fitted and reported but a format 1.3
    file stores one λ per order, so the file gets the single λ per order."""
    import tempfile

    from .tune import keystroke_search, tune_orders, write_lambdas

    bar.stage(f"held-out events of {len(tune_msgs):,} messages, λ per order, perplexity curves")
    t = tune_orders(model, tune_msgs, buckets=args.buckets, min_events=args.min_bucket_events)
    ksr_lam: float | None = None
    ksr_curve: dict[float, float] = {}
    if search:
        bar.stage(f"searching one λ for both orders for KSR@{args.k}", unit="messages")
        ksr_lam, ksr_curve = keystroke_search(model, tune_msgs, k=args.k, progress=bar.update)
    chosen = [ksr_lam] * 2 if args.objective == "keystrokes" and ksr_lam is not None else list(t.lambdas)
    before = measure(model, "before")
    notes = []
    if t.buckets is not None:
        notes.append("λ buckets per order are reported, not stored: a trigram file (format 1.3) records one λ per order, "
                     "so the file gets the single per-order optimum")
    if args.objective == "keystrokes":
        notes.append("the keystroke objective searches one λ shared by both orders (what --lam does at query time)")
    result: dict[str, Any] = {
        "model": args.model,
        "estimator": model.estimator,
        "order": model.order,
        "objective": args.objective,
        "held_out_use": used,
        "stored_lambdas": t.stored,
        "perplexity_optimal_lambdas": t.lambdas,
        "keystroke_optimal_lambda": ksr_lam,
        "chosen_lambdas": chosen,
        "tune_perplexity": {"stored": t.stored_perplexity, "optimal": t.perplexity},
        "buckets": None if t.buckets is None else {
            **t.buckets.as_meta(), "events": t.buckets.events, "tune_perplexity": t.bucket_perplexity, "stored": False},
        "perplexity_curves": {str(m): [{"lambda": k, "perplexity": v} for k, v in c.items()] for m, c in t.curves.items()},
        "ksr_curve": [{"lambda": k, "ksr": v} for k, v in ksr_curve.items()],
        "k": args.k,
        "before": before,
        "notes": notes,
    }
    with tempfile.TemporaryDirectory(prefix="nextword-tune-") as tmp:
        target = args.output or os.path.join(tmp, "tuned.nwm")
        bar.stage(f"writing {args.output or 'the tuned model (temporary)'}")
        write_lambdas(model, target, chosen)
        if args.output:
            result["output"] = args.output
        tuned = load(target)
        result["after"] = measure(tuned, "after")
        tuned.close()
    bar.done()
    if args.report:
        _tune_report(args.report, result)
    if args.json:
        print(json.dumps(result, indent=2))
        return 0
    print(f"model: {args.model} (Jelinek-Mercer order 3); {used}")
    for m, curve in t.curves.items():
        others = ", ".join(f"λ{j} = {t.lambdas[j - 2]:.4f}" for j in t.curves if j != m)
        print(f"λ{m} ({others}): " + "  ".join(f"{lam:.4g}: {ppl:.2f}" for lam, ppl in curve.items()))
    if ksr_curve:
        print(f"one λ for both orders, KSR@{args.k}: " + "  ".join(f"{lam:.4g}: {100 * v:.2f}%" for lam, v in ksr_curve.items()))
    lams = lambda v: ", ".join(f"λ{m} = {x:.4f}" for m, x in enumerate(v, 2))  # noqa: E731
    ksr_note = f"; keystroke-optimal shared λ (k = {args.k}) = {ksr_lam:.4f}" if ksr_lam is not None else ""
    print(f"perplexity-optimal {lams(t.lambdas)} (tune perplexity {t.perplexity:.2f}, stored λ {t.stored_perplexity:.2f})"
          f"{ksr_note}; chosen {lams(chosen)} ({args.objective})")
    if t.buckets is not None:
        for m, (bounds, values, events) in enumerate(zip(t.buckets.bounds, t.buckets.lambdas, t.buckets.events), 2):
            spans = [f"c<{bounds[0]}"] + [f"{a}≤c<{b}" for a, b in zip(bounds, bounds[1:])] + ([f"c≥{bounds[-1]}"] if bounds else [])
            if not bounds:
                spans = ["all"]
            print(f"  λ{m} by context count: " + "; ".join(f"{sp}: {v:.4f} ({n:,})" for sp, v, n in zip(spans, values, events)))
        print(f"  tune perplexity with the buckets {t.bucket_perplexity:.2f}")
    for note in notes:
        print(f"note: {note}")
    after = result["after"]
    print(f"before ({lams(t.stored)}): perplexity {before['perplexity']:.2f}, KSR@{args.k} {100 * before['ksr']:.2f}%; "
          f"after: perplexity {after['perplexity']:.2f}, KSR@{args.k} {100 * after['ksr']:.2f}%")
    if args.output:
        print(f"wrote {args.output}")
    return 0


def _tune_report(out_dir: str, result: dict[str, Any]) -> None:
    from pathlib import Path

    from .report import PLOTS_SKIPPED, plots_available, save_figure, tune_figures
    from .store import atomic_write

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    lines = [f"# λ tuning of `{result['model']}`", "", result["held_out_use"], ""]
    if "chosen_lambdas" in result:  # λ per order (Jelinek-Mercer trigram)
        chosen = ", ".join(f"λ{m} = {x:.4f}" for m, x in enumerate(result["chosen_lambdas"], 2))
        lines += [f"Chosen {chosen} ({result['objective']}).", ""]
        for m, rows in result["perplexity_curves"].items():
            lines += ["", f"| λ{m} (other orders at their optimum) | perplexity |", "|---|---|"]
            lines += [f"| {r['lambda']:.4f} | {r['perplexity']:.2f} |" for r in rows]
        lines += [*(f"\nNote: {n}." for n in result["notes"])]
    else:
        lines += [f"Chosen λ = {result['chosen_lambda']:.4f} ({result['objective']}).", "", "| λ | perplexity |", "|---|---|"]
        lines += [f"| {r['lambda']:.4f} | {r['perplexity']:.2f} |" for r in result["perplexity_curve"]]
    if result["ksr_curve"]:
        shared = " (one λ for both orders)" if "chosen_lambdas" in result else ""
        lines += ["", f"| λ{shared} | KSR@{result['k']} |", "|---|---|"]
        lines += [f"| {r['lambda']:.4f} | {100 * r['ksr']:.2f}% |" for r in result["ksr_curve"]]
    if not plots_available():
        lines += ["", PLOTS_SKIPPED]
    else:
        for name, fig in tune_figures(result).items():
            save_figure(fig, out / name)
            lines += ["", f"![{Path(name).stem}]({name})"]
    atomic_write(out / "tune.md", [("\n".join(lines) + "\n").encode("utf-8")])


def _cmd_personal(args: argparse.Namespace) -> int:
    from .personal import JOURNAL_SUFFIX, PersonalLayer

    base = open_any(args.model)
    if args.action in ("suggest", "info") and not args.create:
        layer = PersonalLayer.load(base, args.layer)  # read only: a missing file is an error, never created
    else:
        layer = PersonalLayer.open(
            base,
            args.layer,
            create=args.action in ("learn", "block") or args.create,
            min_uses=args.min_uses,
            half_life_messages=args.half_life_messages,
            half_life_days=args.half_life_days,
        )
    items = args.items if args.items or args.action in ("clear", "info") else [line.rstrip("\n") for line in sys.stdin]
    out: dict[str, Any] = {"layer": args.layer, "action": args.action}
    if args.action == "learn":
        for text in items:
            layer.learn(text)
        out["learned"] = len(items)
    elif args.action in ("forget", "block"):
        for word in items:
            getattr(layer, args.action)(word)
        out["words"] = items
    elif args.action == "unblock":
        out["words"] = items
        out["not_blocked"] = [word for word in items if not layer.unblock(word)]
        for word in out["not_blocked"]:
            print(f"nextword: note: {word!r} was not blocked (nothing to unblock)", file=sys.stderr)
    elif args.action == "clear":
        layer.clear()
    elif args.action == "suggest":
        out["results"] = [
            {"text": t, "suggestions": [{"word": s.word, "prob": s.prob} for s in layer.suggest(t, args.k)]} for t in items
        ]
    journal = args.layer + JOURNAL_SUFFIX
    out.update(
        {
            "messages": layer.messages,
            "entries": layer.entries,
            "tokens": layer.tokens,
            "weight": layer.weight,
            "file_bytes": os.path.getsize(args.layer) + (os.path.getsize(journal) if os.path.exists(journal) else 0),
            "blocklist": sorted(layer.blocklist),
        }
    )
    layer.close()
    if args.json:
        print(json.dumps(out, ensure_ascii=False, indent=2))
    elif args.action == "suggest":
        for r in out["results"]:
            print(f"{json.dumps(r['text'], ensure_ascii=False)} -> {_strip(r['suggestions'])}")
    else:
        print(
            f"{args.layer}: {layer.messages:,} messages learned, {layer.entries:,} entries, weight {layer.weight:.3f}, "
            f"{out['file_bytes']:,} bytes; blocked: {', '.join(out['blocklist']) or 'none'}"
        )
    return 0


def _cmd_prune(args: argparse.Namespace) -> int:
    from .prune import parse_size, prune_model
    from .store import atomic_write, check_new_output

    if is_mix_file(args.model):
        return _prune_mix(args)
    model = load(args.model)
    if args.curve:
        return _prune_curve(args, model)
    if not args.output or not args.max_size:
        raise UsageError("prune needs -o/--output and --max-size (or --curve HELDOUT to measure sizes)")
    check_new_output(args.model, args.output, "pruned model")
    bar = Progress("prune")
    try:
        bar.stage(f"reading the counts of {args.model}")
        # a Jelinek-Mercer bigram by its pairs (and words); any other kind on its stored levels, words kept
        chunks, info = prune_model(model, parse_size(args.max_size), rule=args.rule, vocabulary=not args.keep_vocabulary,
                                   progress=lambda label: bar.stage(label))
        bar.stage(f"writing {args.output}")
        atomic_write(args.output, chunks)
    finally:
        bar.done()
    out = {"input_bytes": model.file_size, "output": args.output, "rule": args.rule, **info}
    if args.json:
        print(json.dumps(out))
    else:
        print(
            f"wrote {args.output}: {info['bytes']:,} bytes (was {model.file_size:,}); kept {info['kept']:,} "
            f"{'pairs' if model.estimator == 'jm' and model.order == 2 else 'n-grams'}, "
            f"removed {info['removed']:,}; kept {info['words_kept']:,} words, removed {info['words_removed']:,} ({args.rule} rule)"
        )
    return 0


def _prune_mix(args: argparse.Namespace) -> int:
    """Prune a mixture's parts to a budget shared by their sizes (``prune.prune_mixture``)."""
    from .prune import parse_size, prune_mixture

    if args.curve:
        raise UsageError("--curve measures one model file; prune a mixture with -o and --max-size")
    if not args.output or not args.max_size:
        raise UsageError("prune needs -o/--output and --max-size")
    bar = Progress("prune")
    try:
        info = prune_mixture(args.model, parse_size(args.max_size), args.output, rule=args.rule,
                             vocabulary=not args.keep_vocabulary, progress=lambda label: bar.stage(label))
    finally:
        bar.done()
    if args.json:
        print(json.dumps(info))
    else:
        shown = ", ".join(f"{p['path']} {p['bytes']:,} bytes" for p in info["parts"])
        print(f"wrote {args.output} and its parts: {shown}; {info['bytes']:,} bytes in all (weights kept; re-fit with nextword tune)")
    return 0


def _prune_curve(args: argparse.Namespace, model: Model) -> int:
    """Size against held-out KSR@k and perplexity for each budget and both rules (nothing written)."""
    import tempfile

    from . import report

    if args.plot and not report.plots_available():  # before the work, not after it
        raise UsageError(f"--plot {args.plot} needs matplotlib: pip install 'nextword[plot]'")

    from .evaluate import evaluate
    from .prune import RULES, parse_size, prune_model
    from .store import atomic_write

    held = [m for m in iter_messages(open_sources(args.curve)) if m.strip()]
    if not held:
        raise InvalidArgumentError("no held-out messages in " + ", ".join(args.curve))
    ksr_msgs = held[: args.messages]
    sizes = [parse_size(x) for x in args.sizes] if args.sizes else [int(model.file_size * f) for f in (1.0, 0.75, 0.5, 0.35, 0.25)]
    rows: list[dict[str, Any]] = []
    skipped: list[dict[str, Any]] = []
    bar = Progress("pruning curve")
    with tempfile.TemporaryDirectory(prefix="nextword-curve-") as tmp:
        for rule in RULES:
            for budget in sizes:
                bar.update(len(rows), len(RULES) * len(sizes), f"{rule} {budget:,} bytes")
                path = args.model
                if budget < model.file_size:
                    try:
                        chunks, _ = prune_model(model, budget, rule=rule, vocabulary=not args.keep_vocabulary)  # type: ignore[arg-type]
                    except InvalidArgumentError as e:  # below the smallest model of this vocabulary rule
                        skipped.append({"rule": rule, "budget": budget, "reason": str(e)})
                        continue
                    path = os.path.join(tmp, f"{rule}-{budget}.nwm")
                    atomic_write(path, chunks)
                m = load(path)
                overall, _ = evaluate(m, [("held", ksr_msgs)], (args.k,))
                rows.append({
                    "rule": rule, "budget": budget, "file_bytes": m.file_size, "words": m.n_words, "pairs": m.n_bigrams,
                    "perplexity": m.perplexity(held), "ksr": overall.per_k[args.k].ksr,
                })
                m.close()
    bar.done()
    out = {"model": args.model, "held_out": args.curve, "messages": len(held), "ksr_messages": len(ksr_msgs),
           "k": args.k, "vocabulary": not args.keep_vocabulary, "rows": rows, "skipped": skipped}
    if args.plot:
        from .report import plot_size_tradeoff

        points = [(r["file_bytes"], r["ksr"], "unpruned" if r["budget"] >= model.file_size else f"{r['rule']} rule")
                  for r in rows]
        out["plot"] = os.fspath(plot_size_tradeoff(points, args.plot, k=args.k))
    if args.json:
        print(json.dumps(out, indent=2))
        return 0
    print(f"model: {args.model}; perplexity on {len(held):,} held-out messages, KSR@{args.k} on {len(ksr_msgs):,}")
    print(f"{'rule':8} {'budget':>12} {'file bytes':>12} {'words':>8} {'pairs':>10} {'perplexity':>11} {'KSR@' + str(args.k):>8}")
    for r in rows:
        print(f"{r['rule']:8} {r['budget']:>12,} {r['file_bytes']:>12,} {r['words']:>8,} {r['pairs']:>10,} "
              f"{r['perplexity']:>11.2f} {100 * r['ksr']:>7.2f}%")
    for r in skipped:
        print(f"{r['rule']:8} {r['budget']:>12,}  skipped: {r['reason']}")
    if args.plot:
        print(f"wrote {out['plot']}")
    return 0


def _cmd_export(args: argparse.Namespace) -> int:
    from .export import write_arpa, write_arpa_mix

    if is_mix_file(args.model):
        if args.lam is not None:
            raise UsageError("--lam applies to a model file; a mixture's parts keep their own λ")
        mix = load_mix(args.model)
        written = write_arpa_mix(mix, args.output)
        names = ("unigrams", "bigrams", "trigrams")
        out_mix: dict[str, Any] = {"model": args.model, "output": args.output, "estimator": "mix", "order": mix.order,
                                   "weights": list(mix.weights), **{names[m]: k for m, k in enumerate(written)}}
        if args.json:
            print(json.dumps(out_mix))
        else:
            print(f"wrote {args.output}: {', '.join(f'{k:,} {names[m]}' for m, k in enumerate(written))} "
                  f"(a mixture of {len(mix.parts)} parts, static interpolation: exact for every listed n-gram)")
        return 0
    model = load(args.model)
    written = write_arpa(model, args.output, lam=args.lam)
    names = ("unigrams", "bigrams", "trigrams")
    out: dict[str, Any] = {"model": args.model, "output": args.output, "estimator": model.estimator, "order": model.order,
                           **{names[m]: k for m, k in enumerate(written)}}
    if args.json:
        print(json.dumps(out))
    else:
        counts = ", ".join(f"{k:,} {names[m]}" for m, k in enumerate(written))
        print(f"wrote {args.output}: {counts} ({'Kneser-Ney' if model.estimator == 'kn' else 'Jelinek-Mercer'} order {model.order})")
    return 0


def _cmd_serve(args: argparse.Namespace) -> int:
    from .serve import ServeLimits, default_socket_path, listen_tcp, listen_unix, parse_host_port, prepare_users_dir, run_server

    limits = ServeLimits(
        max_line_bytes=args.max_line_bytes,
        request_timeout=args.request_timeout,
        idle_timeout=args.idle_timeout,
        max_clients=args.max_clients,
        max_k=args.max_k,
        grace=args.grace,
    )
    if args.allow_non_loopback and not args.tcp:
        raise UsageError("--allow-non-loopback only applies to --tcp")
    model = open_any(args.model)
    users = None if args.users is None else prepare_users_dir(args.users)  # before listening: no socket left on error
    if args.tcp:
        host, port = parse_host_port(args.tcp)
        listener = listen_tcp(host, port, allow_non_loopback=args.allow_non_loopback)
    else:
        listener = listen_unix(args.socket or default_socket_path())

    def ready(address: dict[str, Any]) -> None:
        # one JSON line, flushed: scripts and tests read the real address (e.g. for port 0) from it
        print(json.dumps({"event": "ready", **address, "pid": os.getpid(), "model": args.model}), flush=True)

    report = run_server(
        model, listener, users_dir=users, limits=limits, on_ready=ready, max_open_users=args.max_open_users
    )
    try:
        print(json.dumps({"event": "stopped", **report}), flush=True)
    except OSError:
        pass  # whoever started us stopped reading: the stop itself succeeded
    return 0


def _cmd_mix(args: argparse.Namespace) -> int:
    from .mix import fit_weights, write_mix

    if len(args.parts) != len(set(os.path.realpath(p) for p in args.parts)):
        raise UsageError("a model is named twice among the parts")
    out: dict[str, Any] = {"output": args.output, "parts": args.parts}
    if args.weights is not None:
        weights = list(args.weights)
        fitted = None
    else:
        messages = [m for m in iter_messages(open_sources(args.heldout, fmt=args.format, field=args.field)) if m.strip()]
        if not messages:
            raise InputDataError("no held-out messages in " + ", ".join(args.heldout))
        models = [load(p) for p in args.parts]
        bar = Progress("mix")
        try:
            bar.stage(f"fitting weights on {len(messages):,} held-out messages")
            fit = fit_weights(models, messages)
            bar.stage("perplexity of each part alone")
            alone = [m.perplexity(messages) for m in models]
        finally:
            bar.done()
            for m in models:
                m.close()
        weights = fit.weights
        fitted = {"method": "em", "heldout": [os.path.basename(h) for h in args.heldout], "messages": len(messages), **fit.as_dict()}
        out.update({"heldout": args.heldout, "messages": len(messages), "fit": fit.as_dict(), "perplexity_alone": alone})
    write_mix(args.output, args.parts, weights, fitted=fitted)
    out["weights"] = weights
    if args.json:
        print(json.dumps(out, ensure_ascii=False))
        return 0
    shown = ", ".join(f"{w:.4f} {p}" for w, p in zip(weights, args.parts))
    print(f"wrote {args.output}: {shown}")
    if fitted is not None:
        alone_txt = ", ".join(f"{x:.2f}" for x in out["perplexity_alone"])
        print(f"held-out perplexity {fitted['perplexity']:.2f} mixed (each part alone: {alone_txt}); "
              f"{fitted['unknown_words']:,} of {fitted['known_words'] + fitted['unknown_words']:,} held-out words unknown to every part; "
              f"EM: {fitted['iterations']} iterations")
    return 0


def _cmd_live(args: argparse.Namespace) -> int:
    from .live import run_live

    if not (sys.stdin.isatty() and sys.stdout.isatty()):
        raise UsageError("live needs a terminal (stdin and stdout must be a TTY)")
    return run_live(open_any(args.model, lam=args.lam), k=args.k, lam=None, typo=_typo_channel(args))


_REPORT_FILES = {"eval": ("report.md", "ksr.png", "latency.png"), "tune": ("tune.md", "perplexity.png", "ksr.png")}


def _io_paths(args: argparse.Namespace) -> tuple[list[Labelled], list[Labelled], list[Labelled]]:
    """(inputs, output files, output directories) of a command, for the one rule on outputs:
    an output is never an input nor another output (``nextword.paths``)."""
    cmd = args.command
    ins: list[Labelled] = []
    outs: list[Labelled] = []
    dirs: list[Labelled] = []
    if cmd == "train":
        ins = [("corpus", x) for x in args.inputs]
        outs = [("model", args.output)]
    elif cmd == "split":
        ins = [("log", x) for x in args.logs]
        outs = [("training part", args.train_out), ("test part", args.test_out)]
        outs += [("tune part", args.tune_out)] if args.tune_out else []
    elif cmd == "tune":
        ins = [("model", args.model)] + [("held-out text", x) for x in args.heldout]
        outs = [("tuned model", args.output)] if args.output else []
    elif cmd == "prune":
        ins = [("model", args.model)] + [("held-out text", x) for x in args.curve or []]
        outs = [("pruned model", args.output)] if args.output else []
        outs += [("size plot", args.plot)] if args.plot else []
    elif cmd == "export":
        ins, outs = [("model", args.model)], [("ARPA file", args.output)]
    elif cmd == "eval":
        ins = [("model", args.model)] + [("log", x) for x in args.logs] + [("training text", x) for x in args.train_data or []]
    elif cmd == "personal":
        ins, outs = [("base model", args.model)], [("personal layer", args.layer)]
    elif cmd == "mix":
        ins = [("model", x) for x in args.parts] + [("held-out text", x) for x in args.heldout or []]
        outs = [("mixture", args.output)]
    if cmd in _REPORT_FILES and args.report:
        dirs = [("report directory", args.report)]
    return ins, outs, dirs


def _check_io(args: argparse.Namespace) -> list[Labelled]:
    """Refuse, before any work, outputs that would destroy an input or another output, or
    that cannot be written; returns every output file (for naming write errors)."""
    ins, outs, dirs = _io_paths(args)
    report: list[Labelled] = [(f"report file {name}", os.path.join(d, name)) for _, d in dirs for name in _REPORT_FILES[args.command]]
    check_outputs(ins, outs + report)
    for what, path in outs:
        if args.command != "personal" or not os.path.exists(path):  # an existing layer may be only read
            check_writable(path, what)
    for what, path in dirs:
        check_writable(path, what, directory=True)
    return outs + report


_FULL = {errno.ENOSPC, errno.EDQUOT, errno.EFBIG, errno.EROFS}


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``nextword`` console script; returns the exit status."""
    outputs: list[Labelled] = []
    try:
        args = _parser().parse_args(argv)
        outputs = _check_io(args)
        handler = {
            "train": _cmd_train,
            "suggest": _cmd_suggest,
            "info": _cmd_info,
            "eval": _cmd_eval,
            "split": _cmd_split,
            "tune": _cmd_tune,
            "personal": _cmd_personal,
            "export": _cmd_export,
            "prune": _cmd_prune,
            "live": _cmd_live,
            "mix": _cmd_mix,
            "serve": _cmd_serve,
        }[args.command]
        return handler(args)
    except UsageError as e:
        print(f"nextword: error: {e}", file=sys.stderr)
        return 2
    except InvalidArgumentError as e:
        print(f"nextword: error: {e}", file=sys.stderr)
        return 2
    except NextwordError as e:
        print(f"nextword: error: {e}", file=sys.stderr)
        return 1
    except BrokenPipeError:  # e.g. piped into head: not an error worth a message
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 1
    except OSError as e:
        if e.filename:
            where = f"{e.filename}: "  # the atomic writer names the output, never its temporary file
        elif e.errno in _FULL and outputs:  # e.g. a write() on a full disk carries no file name
            where = f"cannot write {' or '.join(os.fspath(p) for _, p in outputs)}: "
        else:
            where = ""
        print(f"nextword: error: {where}{e.strerror or e}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("nextword: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
