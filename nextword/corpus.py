"""Reading training and evaluation text: plain-text and JSON Lines files, gzip, stdin.

Keyboard teams hold their text in two shapes: plain message dumps (one message per
line) and typing logs exported as JSON Lines with a ``"text"`` field next to fields of
their own. Both may be gzip-compressed. This module turns any of them into a stream of
message strings, one at a time, so memory does not grow with the corpus, and reports
the exact file and line of anything it cannot read.
"""

from __future__ import annotations

import gzip
import io
import json
import os
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any, BinaryIO, Callable, Iterable, Iterator, Literal

from .errors import InputDataError, InvalidArgumentError

__all__ = ["Source", "open_sources", "iter_messages", "iter_records", "FORMATS"]

FORMATS = ("auto", "text", "jsonl")
Format = Literal["auto", "text", "jsonl"]
_JSONL_SUFFIXES = (".jsonl", ".ndjson", ".json")
_GZIP_MAGIC = b"\x1f\x8b"


@dataclass(frozen=True)
class Source:
    """One input: a file path, or ``"-"`` for standard input."""

    name: str
    fmt: Format = "auto"
    field: str = "text"

    def resolved_format(self, first_line: bytes) -> Literal["text", "jsonl"]:
        """Decide text vs JSON Lines: by the option, else the suffix, else the first line."""
        if self.fmt != "auto":
            return self.fmt
        name = self.name[:-3] if self.name.endswith(".gz") else self.name
        if name.lower().endswith(_JSONL_SUFFIXES):
            return "jsonl"
        if self.name == "-" and first_line.lstrip().startswith(b"{"):
            try:
                obj = json.loads(first_line)
            except ValueError:
                return "text"
            return "jsonl" if isinstance(obj, dict) and self.field in obj else "text"
        return "text"


def open_sources(
    inputs: str | os.PathLike[str] | Iterable[str | os.PathLike[str]],
    *,
    fmt: Format = "auto",
    field: str = "text",
) -> list[Source]:
    """Normalise the ``inputs`` argument of the public API to a list of :class:`Source`.

    A single path (``str`` or ``PathLike``) is one input; any other iterable is a list of
    paths. Missing files are reported here, before any work starts.
    """
    if fmt not in FORMATS:
        raise InvalidArgumentError(f"unknown input format {fmt!r}; expected one of {FORMATS}")
    if isinstance(inputs, (str, os.PathLike)):
        items = [inputs]
    else:
        items = list(inputs)
    if not items:
        raise InvalidArgumentError("no inputs given")
    out = []
    for item in items:
        name = os.fspath(item)
        if not isinstance(name, str):
            raise InvalidArgumentError(f"input path must be text, got {item!r}")
        if name != "-" and not Path(name).is_file():
            raise InputDataError(f"{name}: no such file")
        out.append(Source(name, fmt, field))
    return out


def _open_binary(name: str) -> tuple[Any, BinaryIO, int]:
    """Open a source for reading bytes; returns (stream, raw file, size for progress)."""
    if name == "-":
        raw: BinaryIO = sys.stdin.buffer
        size = 0
    else:
        try:
            raw = open(name, "rb")  # noqa: SIM115 - closed by the caller
        except OSError as e:
            raise InputDataError(f"{name}: cannot open: {e.strerror}") from None
        size = os.fstat(raw.fileno()).st_size
    peekable: Any = raw if hasattr(raw, "peek") else io.BufferedReader(raw)  # type: ignore[type-var]
    head = peekable.peek(2)[:2]
    if head == _GZIP_MAGIC:
        return gzip.GzipFile(fileobj=peekable, mode="rb"), raw, size
    return peekable, raw, size


def iter_messages(
    sources: list[Source],
    *,
    progress: Callable[[int, int], None] | None = None,
) -> Iterator[str]:
    """Yield each message of each source in order, decoded from UTF-8.

    ``progress(done_bytes, total_bytes)`` is called now and then with positions in the
    raw (possibly compressed) files, so a caller can show how far it has got.
    """
    for text, _ in iter_records(sources, progress=progress):
        yield text


def iter_records(
    sources: list[Source],
    *,
    progress: Callable[[int, int], None] | None = None,
) -> Iterator[tuple[str, bytes]]:
    """Like :func:`iter_messages`, with each message's original line (bytes, newline included)."""
    total = sum(os.path.getsize(s.name) for s in sources if s.name != "-")
    done_before = 0
    for src in sources:
        stream, raw, size = _open_binary(src.name)
        try:
            yield from _iter_one(src, stream, raw, done_before, total, progress)
        except gzip.BadGzipFile as e:
            raise InputDataError(f"{src.name}: damaged gzip data: {e}") from None
        except EOFError:
            raise InputDataError(f"{src.name}: gzip data ends early") from None
        finally:
            if raw is not sys.stdin.buffer:
                raw.close()
        done_before += size


def _iter_one(
    src: Source,
    stream: BinaryIO,
    raw: BinaryIO,
    done_before: int,
    total: int,
    progress: Callable[[int, int], None] | None,
) -> Iterator[tuple[str, bytes]]:
    fmt: str | None = None
    for lineno, line in enumerate(stream, 1):
        if fmt is None:
            fmt = src.resolved_format(line)
        if progress is not None and lineno % 8192 == 0 and raw is not sys.stdin.buffer:
            progress(done_before + raw.tell(), total)
        try:
            text = line.decode("utf-8")
        except UnicodeDecodeError as e:
            raise InputDataError(f"{src.name}:{lineno}: not UTF-8 ({e.reason} at byte {e.start})") from None
        if fmt == "text":
            yield text.rstrip("\r\n"), line
            continue
        if not text.strip():
            continue
        try:
            obj = json.loads(text)
        except ValueError as e:
            raise InputDataError(f"{src.name}:{lineno}: not valid JSON: {e}") from None
        if not isinstance(obj, dict):
            raise InputDataError(f"{src.name}:{lineno}: expected a JSON object, got {type(obj).__name__}")
        value = obj.get(src.field)
        if not isinstance(value, str):
            what = "missing" if value is None else f"a {type(value).__name__}, not a string"
            raise InputDataError(f"{src.name}:{lineno}: field {src.field!r} is {what}")
        yield value, line
    if progress is not None and raw is not sys.stdin.buffer:
        progress(done_before + raw.tell(), total)
