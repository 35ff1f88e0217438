"""The ``nextword`` command: train, suggest, info, and a live typing mode.

Errors are one line on stderr naming the bad value: exit status 2 for usage mistakes
(unknown option, λ out of range), 1 for data problems (unreadable corpus, damaged model).
Every command that prints results can print JSON instead (``--json``).
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import time
from typing import Any, NoReturn, Sequence

from . import __version__
from .corpus import FORMATS
from .counts import DEFAULT_MAX_VOCAB, DEFAULT_MIN_COUNT
from .errors import InvalidArgumentError, NextwordError
from .model import DEFAULT_LAMBDA, Model, load, train

__all__ = ["main"]


class UsageError(Exception):
    """A command-line mistake: reported in one line, exit status 2."""


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> NoReturn:
        raise UsageError(message)


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


def _parser() -> _Parser:
    p = _Parser(prog="nextword", description="Train and query compact next-word suggestion models.")
    p.add_argument("--version", action="version", version=f"nextword {__version__}")
    sub = p.add_subparsers(dest="command", required=True, parser_class=_Parser)

    t = sub.add_parser("train", help="count a corpus and write a model file")
    t.add_argument("inputs", nargs="+", metavar="INPUT", help="text or JSON Lines files (.gz ok); - for stdin")
    t.add_argument("-o", "--output", required=True, help="model file to write (atomically)")
    t.add_argument("--lam", type=_lam, default=DEFAULT_LAMBDA, help=f"bigram weight λ (default {DEFAULT_LAMBDA})")
    t.add_argument("--min-count", type=_positive, default=DEFAULT_MIN_COUNT, help="drop rarer words (default %(default)s)")
    t.add_argument("--max-vocab", type=_positive, default=DEFAULT_MAX_VOCAB, help="keep this many words (default %(default)s)")
    t.add_argument("--format", choices=FORMATS, default="auto", help="input format (default: by file name)")
    t.add_argument("--field", default="text", help="JSON Lines field holding the message (default %(default)s)")
    t.add_argument("--json", action="store_true", help="print the training report as JSON")

    s = sub.add_parser("suggest", help="print suggestions for typed texts")
    s.add_argument("model")
    s.add_argument("texts", nargs="*", metavar="TEXT", help="text before the cursor; none = one per line on stdin")
    s.add_argument("-k", type=_positive, default=3, help="suggestions per text (default %(default)s)")
    s.add_argument("--lam", type=_lam, default=None, help="override the model's λ")
    s.add_argument("--time", action="store_true", help="time each query (median of repeated calls)")
    s.add_argument("--json", action="store_true", help="print JSON")

    i = sub.add_parser("info", help="describe a model file")
    i.add_argument("model")
    i.add_argument("--verify", action="store_true", help="read and check the whole file")
    i.add_argument("--json", action="store_true", help="print JSON")

    lv = sub.add_parser("live", help="type in the terminal and watch suggestions update on every key")
    lv.add_argument("model")
    lv.add_argument("-k", type=_positive, default=5, help="suggestions shown (default %(default)s)")
    lv.add_argument("--lam", type=_lam, default=None, help="override the model's λ")
    return p


def _cmd_train(args: argparse.Namespace) -> int:
    report = train(
        args.inputs,
        args.output,
        lam=args.lam,
        min_count=args.min_count,
        max_vocab=args.max_vocab,
        fmt=args.format,
        field=args.field,
    )
    data = {
        "path": report.path,
        "vocabulary": report.n_words,
        "bigrams": report.n_bigrams,
        "word_tokens": report.word_tokens,
        "messages": report.messages,
        "file_bytes": report.file_bytes,
        "bytes_per_bigram": report.file_bytes / max(report.n_bigrams, 1),
        "count_seconds": round(report.count_seconds, 4),
        "build_seconds": round(report.build_seconds, 4),
        "words_per_second": round(report.words_per_second),
    }
    if args.json:
        print(json.dumps(data, indent=2))
    else:
        print(
            f"wrote {report.path}: {report.n_words:,} words, {report.n_bigrams:,} bigrams, "
            f"{report.file_bytes:,} bytes ({data['bytes_per_bigram']:.2f} bytes/bigram); "
            f"counted {report.word_tokens:,} words in {report.count_seconds + report.build_seconds:.2f} s "
            f"({report.words_per_second:,.0f} words/s)"
        )
    return 0


def _time_query(model: Model, text: str, k: int, lam: float | None) -> float:
    """Median seconds of repeated calls (the first, cold call excluded)."""
    model.suggest(text, k, lam=lam)
    runs = []
    for _ in range(51):
        t0 = time.perf_counter()
        model.suggest(text, k, lam=lam)
        runs.append(time.perf_counter() - t0)
    return statistics.median(runs)


def _cmd_suggest(args: argparse.Namespace) -> int:
    t0 = time.perf_counter()
    model = load(args.model)
    load_s = time.perf_counter() - t0
    texts = args.texts if args.texts else [line.rstrip("\n") for line in sys.stdin]
    results: list[dict[str, Any]] = []
    for text in texts:
        sugg = model.suggest(text, args.k, lam=args.lam)
        item: dict[str, Any] = {"text": text, "suggestions": [{"word": s.word, "prob": s.prob} for s in sugg]}
        if args.time:
            item["microseconds"] = round(_time_query(model, text, args.k, args.lam) * 1e6, 1)
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
        words = "  ".join(f"{s['word']} ({s['prob']:.3f})" for s in r["suggestions"]) or "(no suggestion)"
        timing = f"   [{r['microseconds']:.0f} µs]" if args.time else ""
        print(f"{json.dumps(r['text'], ensure_ascii=False):<{width}} -> {words}{timing}")
    return 0


def _cmd_info(args: argparse.Namespace) -> int:
    model = load(args.model, verify=args.verify)
    data = model.info()
    data["verified"] = bool(args.verify)
    if args.json:
        print(json.dumps(data, indent=2, ensure_ascii=False))
        return 0
    corpus = data.pop("corpus")
    for key, value in data.items():
        if isinstance(value, float):
            value = f"{value:.3f}"
        print(f"{key:32} {value}")
    for key, value in corpus.items():
        print(f"{'corpus.' + key:32} {value}")
    return 0


def _cmd_live(args: argparse.Namespace) -> int:
    from ._live import run_live

    if not (sys.stdin.isatty() and sys.stdout.isatty()):
        raise UsageError("live needs a terminal (stdin and stdout must be a TTY)")
    return run_live(load(args.model), k=args.k, lam=args.lam)


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``nextword`` console script; returns the exit status."""
    try:
        args = _parser().parse_args(argv)
        handler = {"train": _cmd_train, "suggest": _cmd_suggest, "info": _cmd_info, "live": _cmd_live}[args.command]
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
        where = f"{e.filename}: " if e.filename else ""
        print(f"nextword: error: {where}{e.strerror or e}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("nextword: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
