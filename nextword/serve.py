"""A local suggestion service: one shared model, per-user personal layers, line-delimited JSON.

Programs not written in Python (input-method engines in C or C++, desktop applications)
reach a model through this small service instead of embedding the interpreter. It
listens on a Unix socket (or on loopback TCP), reads one JSON object per line and
answers each with one JSON object per line; the protocol is specified in
``docs/PROTOCOL.md``.

Design, and why:

- **One model, loaded once.** A :class:`~nextword.Model` is read-only and memory-mapped,
  so every connection thread shares it without locking.
- **Personal layers per user,** one ``<user>.nwp`` file each under the users directory,
  created on the user's first change (``learn``/``block``). A
  :class:`~nextword.personal.PersonalLayer` saves itself atomically on every change and
  has its own lock, so concurrent requests for one user are safe. User names are
  checked strictly (never a path) before they reach the file system.
- **A bounded set of open layers** (``max_open_users``, least recently used closed
  first): a server meeting many users over its life would otherwise keep every layer in
  memory. A request holds its user's layer (a count of requests using it) until it has
  answered, and only a layer nobody holds is closed; a user is never opened twice at
  once, and a closing layer is finished before the same user is opened again, so no
  change is lost across an eviction. Since every change is already saved, closing costs
  no write. Changes for one user go one at a time through a per-user lock, so the layer
  state in each answer is the one that change made.
- **A thread per connection.** Suggest calls take tens of microseconds, so the simple
  model is enough; connections are capped (``max_clients``) so a flood cannot exhaust
  threads.
- **Nothing a client sends can stop the server or its own connection:** malformed JSON,
  wrong types, oversized lines (the rest of the line is discarded, the connection goes
  on), half-sent requests (a deadline closes them), abrupt disconnects — each is an
  error object on the same connection or a closed connection, never a crash.
- **Clean stop** on :meth:`Server.stop` (the CLI calls it on SIGTERM/SIGINT): stop
  accepting, let requests already received finish within a grace period, save every
  personal layer, remove the Unix socket file.
"""

from __future__ import annotations

import errno
import functools
import ipaddress
import json
import math
import os
import re
import select
import socket
import stat
import threading
import time
from collections import OrderedDict
from collections.abc import Callable, Iterator
from contextlib import contextmanager, nullcontext
from dataclasses import asdict, dataclass
from dataclasses import field as dataclass_field
from pathlib import Path
from typing import Any

from .errors import InvalidArgumentError, LayerNotFoundError, NextwordError
from .keyboard import DEFAULT_TYPO_RATE, Channel
from .mix import Predictor
from .personal import PersonalLayer

__all__ = [
    "DEFAULT_MAX_OPEN_USERS",
    "ERROR_CODES",
    "OPS",
    "PROTOCOL_VERSION",
    "ServeLimits",
    "Server",
    "default_socket_path",
    "encode_answer",
    "listen_tcp",
    "listen_unix",
    "parse_host_port",
    "prepare_users_dir",
    "valid_user",
]

PROTOCOL_VERSION = 1

#: Every error code a response can carry (documented in docs/PROTOCOL.md).
ERROR_CODES = (
    "bad_json",  # the line is not valid UTF-8 JSON
    "not_object",  # valid JSON, but not an object
    "unknown_op",  # "op" names no operation
    "bad_field",  # a field is missing, unknown, of the wrong type or out of range ("field" names it)
    "too_large",  # the line exceeded the server's max_line_bytes; the rest of it was discarded
    "timeout",  # a request was started but not finished (no newline) within request_timeout
    "users_disabled",  # a user was named but the server runs without a users directory
    "user_layer",  # the user's layer file could not be read or written
    "busy",  # too many connections: this one is closed after the error
    "internal",  # a bug: the request failed unexpectedly (the connection stays usable)
)

OPS = ("suggest", "learn", "forget", "block", "unblock", "info")

#: Personal layers kept open at once (a full layer is a few MiB in memory); the least
#: recently used one is closed (it is already saved) when one more is needed.
DEFAULT_MAX_OPEN_USERS = 256

_USER_RE = re.compile(r"[a-z0-9_][a-z0-9_.-]{0,63}")
_LAYER_SUFFIX = ".nwp"


def valid_user(name: object) -> bool:
    """Whether ``name`` is an acceptable user name: it becomes a file name, so it must never be a path.

    1-64 characters from ``a-z 0-9 _ . -``, not starting with ``.`` or ``-`` (so never
    ``..``, a hidden file or an option-like name). Lowercase only, so two names never
    share one file on a case-insensitive file system.
    """
    return isinstance(name, str) and _USER_RE.fullmatch(name) is not None


@dataclass(frozen=True)
class ServeLimits:
    """Limits that protect the server from clients; reported by the ``info`` operation.

    ``max_line_bytes``: longest request line (without its newline). ``request_timeout``:
    seconds a started request may take to arrive completely (also bounds writing an
    answer to a client that does not read). ``idle_timeout``: seconds a connection may
    stay silent between requests (0 = forever: an input method keeps one connection
    open). ``max_clients``: simultaneous connections. ``max_k``: largest ``k``.
    ``grace``: seconds a stop waits for requests already received.
    """

    max_line_bytes: int = 64 * 1024
    request_timeout: float = 10.0
    idle_timeout: float = 0.0
    max_clients: int = 64
    max_k: int = 50
    grace: float = 5.0

    def __post_init__(self) -> None:
        for name in ("max_line_bytes", "max_clients", "max_k"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise InvalidArgumentError(f"{name} must be an integer >= 1, got {value!r}")
        if self.max_line_bytes < 256:
            raise InvalidArgumentError(f"max_line_bytes must be at least 256, got {self.max_line_bytes}")
        for name in ("request_timeout", "grace"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 < value < 1e6:
                raise InvalidArgumentError(f"{name} must be a number of seconds > 0, got {value!r}")
        t = self.idle_timeout
        if isinstance(t, bool) or not isinstance(t, (int, float)) or not 0 <= t < 1e9:
            raise InvalidArgumentError(f"idle_timeout must be a number of seconds >= 0 (0 = none), got {t!r}")


class RequestError(Exception):
    """A request the server refuses; becomes ``{"ok": false, "error": {...}}`` on the wire."""

    def __init__(self, code: str, message: str, field: str | None = None) -> None:
        super().__init__(message)
        assert code in ERROR_CODES
        self.code = code
        self.message = message
        self.field = field

    def as_dict(self) -> dict[str, Any]:
        err: dict[str, Any] = {"code": self.code, "message": self.message}
        if self.field is not None:
            err["field"] = self.field
        return err


def _show(value: object, limit: int = 60) -> str:
    """A bad value for an error message: JSON spelling, shortened so errors stay one line."""
    try:
        text = json.dumps(value, ensure_ascii=False)
    except (TypeError, ValueError):
        text = repr(value)
    text = _printable(text)
    return text if len(text) <= limit else text[: limit - 1] + "…"


def _printable(text: str) -> str:
    """``text`` with every lone surrogate spelled as ``\\udXXX``, so it can always be sent as UTF-8."""
    return text.encode("utf-8", "backslashreplace").decode("utf-8")


def _surrogate_at(text: str) -> int | None:
    """Index of the first lone surrogate in ``text`` (JSON escapes such as ``"\\ud800"`` make them), else None."""
    try:
        text.encode("utf-8")
    except UnicodeEncodeError as e:
        return e.start
    return None


def _not_unicode(field: str, text: str, at: int) -> RequestError:
    return RequestError(
        "bad_field",
        f"{_printable(field)} is not valid Unicode: lone surrogate \\u{ord(text[at]):04x} at character {at}",
        _printable(field),
    )


def _no_constants(name: str) -> Any:
    raise ValueError(f"{name} is not valid JSON")


def error_response(rid: Any, err: RequestError) -> dict[str, Any]:
    return {"id": rid, "ok": False, "error": err.as_dict()}


def default_socket_path() -> str:
    """``$XDG_RUNTIME_DIR/nextword.sock`` (a per-user private directory) if set, else ``./nextword.sock``."""
    runtime = os.environ.get("XDG_RUNTIME_DIR")
    if runtime and os.path.isdir(runtime):
        return os.path.join(runtime, "nextword.sock")
    return os.path.join(os.curdir, "nextword.sock")


def listen_unix(path: str | os.PathLike[str]) -> socket.socket:
    """A listening Unix socket at ``path``, readable and writable by the owner only.

    A stale socket file (nobody accepts on it) is replaced; a live one (``OSError``
    EADDRINUSE), or any other kind of file (``FileExistsError``), is left alone. A path
    too long for a socket address raises :class:`~nextword.InvalidArgumentError`.
    """
    name = os.fspath(path)
    if len(os.fsencode(name)) > 100:
        raise InvalidArgumentError(f"socket path is too long for a Unix socket ({len(os.fsencode(name))} bytes, at most 100): {name}")
    try:
        st = os.lstat(name)
    except FileNotFoundError:
        pass
    else:
        if not stat.S_ISSOCK(st.st_mode):
            raise FileExistsError(errno.EEXIST, "exists and is not a socket; refusing to replace it", name)
        probe = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        try:
            probe.settimeout(1.0)
            probe.connect(name)
        except (ConnectionRefusedError, FileNotFoundError):
            os.unlink(name)  # stale: left behind by a server that was killed
        except OSError:
            pass  # cannot tell; bind below reports the address in use
        else:
            raise OSError(errno.EADDRINUSE, "another server is already listening on this socket", name)
        finally:
            probe.close()
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    old = os.umask(0o177)  # the socket file is created 0600: personal data goes through it
    try:
        sock.bind(name)
    except OSError:
        sock.close()
        raise
    finally:
        os.umask(old)
    sock.listen(128)
    return sock


def parse_host_port(text: str) -> tuple[str, int]:
    """``HOST:PORT`` or ``[IPv6]:PORT`` → (host, port); port 0 means any free port."""
    m = re.fullmatch(r"\[([^\]]+)\]:(\d{1,5})|([^:\[\]]+):(\d{1,5})", text)
    if not m:
        raise InvalidArgumentError(f"expected HOST:PORT (e.g. 127.0.0.1:7070 or [::1]:0), got {text!r}")
    host = m.group(1) or m.group(3)
    port = int(m.group(2) or m.group(4))
    if port > 65535:
        raise InvalidArgumentError(f"port must be 0-65535, got {port}")
    return host, port


def listen_tcp(host: str, port: int, *, allow_non_loopback: bool = False) -> socket.socket:
    """A listening TCP socket; refuses any address that is not loopback unless explicitly allowed.

    The protocol has no authentication or encryption: on a non-loopback address anyone
    who can reach the port can read suggestions and change a user's layer.
    """
    try:
        infos = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM, flags=socket.AI_PASSIVE)
    except socket.gaierror as e:
        raise InvalidArgumentError(f"cannot resolve host {host!r}: {e.strerror}") from None
    if not allow_non_loopback:
        for info in infos:
            addr = ipaddress.ip_address(str(info[4][0]).split("%", 1)[0])
            if not addr.is_loopback:
                raise InvalidArgumentError(
                    f"host {host!r} is not a loopback address ({addr}); the protocol has no authentication, "
                    "pass --allow-non-loopback to listen there anyway"
                )
    family, socktype, proto, _, sockaddr = infos[0]
    sock = socket.socket(family, socktype, proto)
    try:
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        sock.bind(sockaddr)
        sock.listen(128)
    except OSError as e:
        sock.close()
        raise OSError(e.errno, f"cannot listen on {host}:{port}: {e.strerror or e}") from None
    return sock


def prepare_users_dir(path: str | os.PathLike[str]) -> Path:
    """The users directory, ready for layer files: created if missing, owner-only (0700).

    It holds everyone's personal data, so every directory created here (missing parents
    too) gets mode 0700 exactly, whatever the umask; an existing directory is left as it
    is. A path that exists and is not a directory raises ``NotADirectoryError``, one that
    cannot be created or written ``OSError``, both naming the path.
    """
    d = Path(path)
    name = os.fspath(d)
    if d.exists() and not d.is_dir():
        raise NotADirectoryError(
            errno.ENOTDIR, "the users directory exists and is not a directory (--users needs a directory)", name
        )
    missing = []
    p = d.absolute()
    while not p.exists() and p != p.parent:
        missing.append(p)
        p = p.parent
    for m in reversed(missing):
        try:
            m.mkdir(mode=0o700)
        except FileExistsError:
            pass  # created meanwhile by someone else: leave its mode alone
        except OSError as e:
            raise OSError(e.errno, f"cannot create the users directory: {e.strerror or e}", name) from None
        else:
            os.chmod(m, 0o700)  # mkdir's mode is masked by the umask
    if not d.is_dir():
        raise NotADirectoryError(errno.ENOTDIR, "the users directory is not a directory", name)
    if not os.access(d, os.W_OK | os.X_OK):
        raise PermissionError(errno.EACCES, "the users directory is not writable", name)
    return d


class Server:
    """Serves one model (and the users' personal layers) on a listening socket.

    ``serve_forever()`` blocks until :meth:`stop` is called (from any thread or a signal
    handler), then finishes the requests already received (bounded by ``limits.grace``),
    saves every open personal layer, closes the socket and removes a Unix socket's file.
    """

    def __init__(
        self,
        model: Predictor,
        listener: socket.socket,
        *,
        users_dir: str | os.PathLike[str] | None = None,
        limits: ServeLimits | None = None,
        max_open_users: int = DEFAULT_MAX_OPEN_USERS,
    ) -> None:
        if isinstance(max_open_users, bool) or not isinstance(max_open_users, int) or max_open_users < 1:
            raise InvalidArgumentError(f"max_open_users must be an integer >= 1, got {max_open_users!r}")
        self.max_open_users = max_open_users
        self.model = model
        self.limits = limits or ServeLimits()
        self.users_dir = None if users_dir is None else prepare_users_dir(users_dir)
        self._listener = listener
        self._unix_path: str | None = None
        if listener.family == socket.AF_UNIX:
            name = listener.getsockname()
            self._unix_path = name if isinstance(name, str) and name else None
        self._wake_r, self._wake_w = os.pipe()
        os.set_blocking(self._wake_w, False)
        self._stopping = threading.Event()
        self._stopped = threading.Event()
        # open layers, least recently used first; users being opened or closed right now
        self._layers: OrderedDict[str, _OpenLayer] = OrderedDict()
        self._pending: set[str] = set()
        self._broken: set[str] = set()  # open layers whose last operation failed
        self._layers_cond = threading.Condition(threading.Lock())
        self.layers_closed = 0  # layers closed to stay within max_open_users
        self._conns: dict[threading.Thread, socket.socket] = {}
        self._conns_lock = threading.Lock()
        self.requests = 0  # answered requests, for the stop report (approximate under threads)
        self.model_info = {k: v for k, v in model.info().items() if k != "corpus"}

    # -- addresses ---------------------------------------------------------------------------

    def address(self) -> dict[str, Any]:
        """Where clients connect: ``{"socket": path}`` or ``{"tcp": "host:port", "host": ..., "port": ...}``."""
        if self._listener.family == socket.AF_UNIX:
            return {"socket": self._unix_path}
        host, port = self._listener.getsockname()[:2]
        shown = f"[{host}]:{port}" if ":" in host else f"{host}:{port}"
        return {"tcp": shown, "host": host, "port": port}

    # -- life cycle --------------------------------------------------------------------------

    def stop(self) -> None:
        """Ask the server to stop; safe from any thread and from a signal handler."""
        self._stopping.set()
        try:
            os.write(self._wake_w, b"x")
        except (BlockingIOError, OSError):
            pass  # the pipe is already readable (or closed): everyone has been woken

    def serve_forever(self, on_ready: Callable[[dict[str, Any]], None] | None = None) -> dict[str, Any]:
        """Accept connections until :meth:`stop`; then shut down cleanly. Returns a small report."""
        poller = select.poll()
        poller.register(self._listener, select.POLLIN)
        poller.register(self._wake_r, select.POLLIN)
        if on_ready is not None:
            on_ready(self.address())
        try:
            while not self._stopping.is_set():
                events = poller.poll()
                if self._stopping.is_set():
                    break
                if not any(fd == self._listener.fileno() for fd, _ in events):
                    continue
                try:
                    conn, _ = self._listener.accept()
                except OSError as e:
                    if e.errno in (errno.EMFILE, errno.ENFILE, errno.ENOBUFS, errno.ENOMEM):
                        time.sleep(0.05)  # out of descriptors: let connections finish
                    continue
                self._start_connection(conn)
        finally:
            report = self._shutdown()
        return report

    def _start_connection(self, conn: socket.socket) -> None:
        with self._conns_lock:
            busy = len(self._conns) >= self.limits.max_clients
            if not busy:
                t = threading.Thread(target=self._connection, args=(conn,), name="nextword-conn", daemon=True)
                self._conns[t] = conn
        if busy:
            err = RequestError("busy", f"too many connections (max_clients = {self.limits.max_clients}); try again later")
            try:
                conn.settimeout(1.0)
                conn.sendall(_encode(error_response(None, err)))
            except OSError:
                pass
            conn.close()
            return
        t.start()

    def _shutdown(self) -> dict[str, Any]:
        self._stopping.set()
        self.stop()
        try:
            self._listener.close()
        finally:
            if self._unix_path:
                try:
                    os.unlink(self._unix_path)
                except FileNotFoundError:
                    pass
        deadline = time.monotonic() + self.limits.grace
        with self._conns_lock:
            threads = list(self._conns)
        for t in threads:
            t.join(max(0.0, deadline - time.monotonic()))
        unfinished = sum(t.is_alive() for t in threads)
        saved = self.flush()
        self._close_layers()
        if not unfinished:  # a thread still polling would see a closed (or reused) descriptor
            os.close(self._wake_r)
            os.close(self._wake_w)
        self._stopped.set()
        return {"requests": self.requests, "layers_saved": saved, "connections_cut": unfinished}

    def flush(self) -> int:
        """Save every open personal layer (under its own lock); returns how many were saved."""
        with self._layers_cond:
            layers = [entry.layer for entry in self._layers.values()]
        for layer in layers:
            assert layer.path is not None
            layer.save(layer.path)
        return len(layers)

    def open_users(self) -> list[str]:
        """Users whose layers are open now, least recently used first."""
        with self._layers_cond:
            return list(self._layers)

    def _close_layers(self) -> None:
        with self._layers_cond:
            entries = list(self._layers.values())
            self._layers.clear()
        for entry in entries:
            entry.layer.close()

    # -- one connection ------------------------------------------------------------------------

    def _connection(self, conn: socket.socket) -> None:
        lim = self.limits
        try:
            conn.settimeout(lim.request_timeout)  # bounds sendall to a client that does not read
            poller = select.poll()
            poller.register(conn, select.POLLIN)
            poller.register(self._wake_r, select.POLLIN)
            buf = bytearray()
            discarding = False  # inside an oversized line: drop bytes up to the next newline
            started: float | None = None  # when the current unfinished line began
            last = time.monotonic()
            while True:
                out = bytearray()
                while True:
                    nl = buf.find(b"\n")
                    if nl < 0:
                        break
                    line = bytes(buf[:nl])
                    del buf[: nl + 1]
                    if discarding:
                        discarding = False
                        continue
                    if len(line) > lim.max_line_bytes:
                        out += _encode(error_response(None, self._too_large()))
                        continue
                    answer = self.handle_line(line)
                    if answer is not None:
                        out += encode_answer(answer)
                if len(buf) > lim.max_line_bytes:
                    out += _encode(error_response(None, self._too_large()))
                    buf.clear()
                    discarding = True
                if out:
                    conn.sendall(out)
                    last = time.monotonic()
                partial = bool(buf) or discarding
                if not partial:
                    started = None
                elif started is None:
                    started = time.monotonic()
                if self._stopping.is_set():
                    return  # requests received so far are answered; a half-sent one is dropped
                now = time.monotonic()
                if partial:
                    assert started is not None
                    wait = started + lim.request_timeout - now
                elif lim.idle_timeout > 0:
                    wait = last + lim.idle_timeout - now
                else:
                    wait = None
                if wait is not None and wait <= 0:
                    if partial:
                        err = RequestError(
                            "timeout", f"request not completed within {lim.request_timeout:g} s (no newline); closing"
                        )
                        conn.sendall(_encode(error_response(None, err)))
                    return
                events = poller.poll(None if wait is None else max(1, int(wait * 1000) + 1))
                if self._stopping.is_set():
                    return
                if not events:
                    continue
                data = conn.recv(65536)
                if not data:
                    return  # the client closed (possibly mid-request): nothing to answer
                if discarding:
                    nl = data.find(b"\n")
                    if nl < 0:
                        continue
                    data = data[nl + 1 :]
                    discarding = False
                    started = None
                if not buf:
                    started = None
                buf += data
                last = time.monotonic()
        except OSError:
            pass  # reset, broken pipe or a client too slow to read its answers: drop the connection
        finally:
            conn.close()
            with self._conns_lock:
                self._conns.pop(threading.current_thread(), None)

    def _too_large(self) -> RequestError:
        return RequestError(
            "too_large",
            f"request line longer than {self.limits.max_line_bytes} bytes; the rest of the line is discarded",
        )

    # -- requests ------------------------------------------------------------------------------

    def handle_line(self, line: bytes) -> dict[str, Any] | None:
        """The answer to one request line (without its newline); ``None`` for a blank line."""
        rid: Any = None
        try:
            try:
                text = line.decode("utf-8")
            except UnicodeDecodeError as e:
                raise RequestError("bad_json", f"request is not valid UTF-8 (byte 0x{line[e.start]:02x} at offset {e.start})") from None
            if not text.strip():
                return None
            try:
                req = json.loads(text, parse_constant=_no_constants)
            except json.JSONDecodeError as e:
                raise RequestError("bad_json", f"malformed JSON at column {e.colno}: {e.msg}") from None
            except (ValueError, RecursionError) as e:
                msg = str(e) if isinstance(e, ValueError) else "nested too deeply"
                raise RequestError("bad_json", f"malformed JSON: {msg}") from None
            if not isinstance(req, dict):
                raise RequestError("not_object", f"a request must be a JSON object, got {_json_type(req)}")
            rid = req.get("id")
            if not (rid is None or isinstance(rid, (str, int, float))):
                bad = rid
                rid = None
                raise RequestError("bad_field", f"id must be a string, a number or null, got {_json_type(bad)}", "id")
            if isinstance(rid, float) and not math.isfinite(rid):  # e.g. 1e999: an answer cannot echo it
                bad, rid = rid, None
                raise RequestError("bad_field", f"id must be a finite number, got {bad!r} (a number too large for a double)", "id")
            if isinstance(rid, str) and (at := _surrogate_at(rid)) is not None:
                bad, rid = rid, None
                raise _not_unicode("id", bad, at)
            op = req.get("op")
            if op is None:
                raise RequestError("bad_field", "missing field op (one of " + ", ".join(OPS) + ")", "op")
            if not isinstance(op, str):
                raise RequestError("bad_field", f"op must be a string, got {_show(op)}", "op")
            if (at := _surrogate_at(op)) is not None:
                raise _not_unicode("op", op, at)
            handler = _HANDLERS.get(op)
            if handler is None:
                raise RequestError("unknown_op", f"unknown op {_show(op)}; known: {', '.join(OPS)}")
            fields, fn = handler
            for key, value in req.items():
                if key not in fields and key not in ("id", "op"):
                    raise RequestError("bad_field", f"unknown field {_show(key)} for op {op}", _printable(key))
                if isinstance(value, str) and (at := _surrogate_at(value)) is not None:
                    raise _not_unicode(key, value, at)  # it could be neither learned, saved nor answered
            result = fn(self, req)
        except RequestError as e:
            self.requests += 1
            return error_response(rid, e)
        except Exception as e:  # a bug must not take the connection down; report it instead
            self.requests += 1
            return error_response(rid, RequestError("internal", _printable(f"{type(e).__name__}: {e}")))
        self.requests += 1
        return {"id": rid, "ok": True, **result}

    # field readers: each names the field and the bad value

    def _user(self, req: dict[str, Any], *, required: bool) -> str | None:
        if "user" not in req or req["user"] is None:
            if required:
                raise RequestError("bad_field", "missing field user", "user")
            return None
        name = req["user"]
        if not valid_user(name):
            raise RequestError(
                "bad_field",
                f"user must be 1-64 characters from a-z 0-9 _ . - (not starting with . or -), got {_show(name)}",
                "user",
            )
        if self.users_dir is None:
            raise RequestError("users_disabled", "this server keeps no personal layers (started without a users directory)", "user")
        return name

    @contextmanager
    def _using(self, user: str, *, create: bool, changing: bool = False) -> Iterator[PersonalLayer | None]:
        """The user's layer, held open for the ``with`` block (``None``: no layer and not ``create``).

        ``changing``: also hold the user's change lock, so a change and the layer state
        answered for it are one step (another request's change cannot come between them).
        """
        entry = self._acquire(user, create=create)
        layer = None if entry is None else entry.layer
        try:
            with entry.change_lock if entry is not None and changing else nullcontext():
                yield layer
        except RequestError:
            raise
        except Exception as e:
            if layer is None:
                raise  # not the layer's failure: reported as internal
            # the layer itself failed (its counts may be half-changed): this user gets a clear
            # error now, and the next request reads the file again instead of failing forever
            self._set_broken(user)
            raise RequestError(
                "user_layer",
                _printable(f"user {user}: the personal layer failed ({type(e).__name__}: {e}); it is read again from its file next time"),
            ) from None
        finally:
            if layer is not None:
                self._release(user)

    def _set_broken(self, user: str) -> None:
        with self._layers_cond:
            entry = self._layers.get(user)
            if entry is not None:
                entry.broken = True
                self._broken.add(user)

    def _acquire(self, user: str, *, create: bool) -> _OpenLayer | None:
        assert self.users_dir is not None
        cond = self._layers_cond
        with cond:
            while True:
                entry = self._layers.get(user)
                if entry is not None:
                    entry.holders += 1
                    self._layers.move_to_end(user)
                    return entry
                if user not in self._pending:
                    break
                cond.wait()  # another request is opening this user's layer, or closing it
            self._pending.add(user)
        try:  # outside the lock: reading one user's file holds up nobody else
            layer = self._open_layer(user, create=create)
        except BaseException:
            with cond:
                self._pending.discard(user)
                cond.notify_all()
            raise
        with cond:
            self._pending.discard(user)
            entry = None if layer is None else _OpenLayer(layer, holders=1)
            if entry is not None:
                self._layers[user] = entry
            victims = self._evictable()
            cond.notify_all()
        self._close(victims)
        return entry

    def _release(self, user: str) -> None:
        with self._layers_cond:
            entry = self._layers.get(user)
            if entry is not None:
                entry.holders -= 1
            victims = self._evictable()
        self._close(victims)

    def _evictable(self) -> list[tuple[str, PersonalLayer]]:
        """Take the least recently used unheld layers out while over the cap (caller holds the lock)."""
        victims: list[tuple[str, PersonalLayer]] = []
        over = len(self._layers) - self.max_open_users
        if over <= 0 and not self._broken:
            return victims  # the common case: nothing to scan
        for user, entry in list(self._layers.items()):
            if over <= 0 and not self._broken:
                break
            if entry.holders == 0 and (over > 0 or entry.broken):
                del self._layers[user]
                self._broken.discard(user)
                over -= 1
                self._pending.add(user)  # reopened only once this close is finished
                victims.append((user, entry.layer))
        return victims

    def _close(self, victims: list[tuple[str, PersonalLayer]]) -> None:
        for user, layer in victims:
            try:
                layer.close()  # every change was saved when it was made; this detaches from the file
            except Exception:
                pass  # a failed save was answered with user_layer when it happened; the file keeps the last good state
            finally:
                with self._layers_cond:
                    self._pending.discard(user)
                    self.layers_closed += 1
                    self._layers_cond.notify_all()

    def _open_layer(self, user: str, *, create: bool) -> PersonalLayer | None:
        """The user's layer read from its file, else (``create``) a new saved one, else ``None``."""
        assert self.users_dir is not None
        path = self.users_dir / (user + _LAYER_SUFFIX)
        try:
            st = os.stat(path)
        except FileNotFoundError:
            pass
        except OSError as e:
            raise RequestError("user_layer", f"user {user}: cannot read the layer file: {e.strerror or e}") from None
        else:
            if not stat.S_ISREG(st.st_mode):  # e.g. a FIFO, whose open would wait forever
                raise RequestError("user_layer", f"user {user}: {path} is not a regular file; it is left alone")
        try:
            return PersonalLayer.open(self.model, path, create=create)
        except LayerNotFoundError:
            return None
        except NextwordError as e:  # damaged, foreign or unreadable
            raise RequestError("user_layer", _printable(f"user {user}: {e}")) from None
        except OSError as e:
            raise RequestError("user_layer", f"user {user}: cannot create the layer file: {e.strerror or e}") from None
        except Exception as e:  # e.g. the file is busy (locked by another process): this user only, not a server bug
            raise RequestError("user_layer", _printable(f"user {user}: cannot open the layer ({type(e).__name__}: {e})")) from None


@dataclass
class _OpenLayer:
    layer: PersonalLayer
    holders: int  # requests using the layer now: it is never closed under them
    broken: bool = False  # an operation failed: closed as soon as nobody holds it, then read again
    change_lock: threading.Lock = dataclass_field(default_factory=threading.Lock)  # one change (and its answer) at a time


def _json_type(value: object) -> str:
    return {dict: "an object", list: "an array", str: "a string", bool: "a boolean", type(None): "null"}.get(
        type(value), "a number"
    )


def _encode(obj: dict[str, Any]) -> bytes:
    return (json.dumps(obj, ensure_ascii=False, separators=(",", ":"), allow_nan=False) + "\n").encode("utf-8")


def encode_answer(answer: dict[str, Any]) -> bytes:
    """One answer line, always valid JSON: an answer that cannot be encoded becomes an ``internal`` error.

    Every request line must get exactly one answer; an exception here would instead end
    the connection and lose the answers pipelined behind it.
    """
    try:
        return _encode(answer)
    except (ValueError, TypeError) as e:  # a non-finite number, a lone surrogate (UnicodeEncodeError)
        rid = answer.get("id")
        try:
            _encode({"id": rid})
        except (ValueError, TypeError):
            rid = None
        err = RequestError("internal", _printable(f"the answer could not be encoded as JSON: {type(e).__name__}: {e}"))
        return _encode(error_response(rid, err))


def _text(req: dict[str, Any], field: str) -> str:
    if field not in req:
        raise RequestError("bad_field", f"missing field {field}", field)
    value = req[field]
    if not isinstance(value, str):
        raise RequestError("bad_field", f"{field} must be a string, got {_show(value)}", field)
    return value


def _word(req: dict[str, Any]) -> str:
    word = _text(req, "word")
    if not word.strip() or any(c.isspace() for c in word.strip()):
        raise RequestError("bad_field", f"word must be one word (no spaces, not empty), got {_show(word)}", "word")
    return word.strip()


@functools.lru_cache(maxsize=16)
def _channel(rate: float) -> Channel:
    """One typing channel per requested rate (building one computes its key tables)."""
    return Channel.from_rate(rate)


def _typos(req: dict[str, Any]) -> Channel | None:
    """The request's ``typos`` field: absent or false = exact prefixes, true = the default
    channel, a number = a channel expecting letter slips at that rate (QWERTY)."""
    value = req.get("typos", False)
    if value is False:
        return None
    if value is True:
        return _channel(DEFAULT_TYPO_RATE)
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or not 0 < value < 0.5:
        raise RequestError("bad_field", f"typos must be true, false or a slip rate in (0, 0.5), got {_show(value)}", "typos")
    return _channel(float(value))


def _op_suggest(server: Server, req: dict[str, Any]) -> dict[str, Any]:
    text = _text(req, "text")
    k = req.get("k", 3)
    if isinstance(k, bool) or not isinstance(k, int) or not 1 <= k <= server.limits.max_k:
        raise RequestError("bad_field", f"k must be an integer from 1 to {server.limits.max_k}, got {_show(k)}", "k")
    typo = _typos(req)
    # the typo keyword only when asked for: the plain call stays exactly what it was
    extra: dict[str, Any] = {} if typo is None else {"typo": typo}
    user = server._user(req, required=False)
    if user is None:
        found = server.model.suggest(text, k, **extra)
    else:
        with server._using(user, create=False) as layer:
            found = server.model.suggest(text, k, **extra) if layer is None else layer.suggest(text, k, **extra)
        if not all(math.isfinite(s.prob) for s in found):
            raise RequestError("user_layer", f"user {user}: the layer's counts give no finite probability (damaged layer file?)")
    return {"suggestions": [{"word": s.word, "prob": s.prob} for s in found]}


def _layer_state(user: str, layer: PersonalLayer | None) -> dict[str, Any]:
    if layer is None:
        return {"user": user, "messages": 0, "entries": 0, "weight": 0.0, "blocked": []}
    if not math.isfinite(layer.weight):
        raise RequestError("user_layer", f"user {user}: the layer's counts are not finite (damaged layer file?)")
    return {
        "user": user,
        "messages": layer.messages,
        "entries": layer.entries,
        "weight": layer.weight,
        "blocked": sorted(layer.blocklist),
    }


def _changing(server: Server, user: str, create: bool, change: Callable[[PersonalLayer], object]) -> dict[str, Any]:
    with server._using(user, create=create, changing=True) as layer:
        if layer is not None:
            try:
                change(layer)
            except OSError as e:  # the change is applied in memory but could not be saved
                raise RequestError("user_layer", f"user {user}: cannot save the layer file: {e.strerror or e}") from None
        return _layer_state(user, layer)


def _op_learn(server: Server, req: dict[str, Any]) -> dict[str, Any]:
    text = _text(req, "text")
    user = server._user(req, required=True)
    assert user is not None
    return _changing(server, user, True, lambda layer: layer.learn(text))


def _op_forget(server: Server, req: dict[str, Any]) -> dict[str, Any]:
    user = server._user(req, required=True)
    assert user is not None
    everything = req.get("all", False)
    if not isinstance(everything, bool):
        raise RequestError("bad_field", f"all must be true or false, got {_show(everything)}", "all")
    if everything == ("word" in req):
        raise RequestError("bad_field", "forget needs exactly one of word or all: true", "word")
    if everything:
        return _changing(server, user, False, lambda layer: layer.clear())
    word = _word(req)
    return _changing(server, user, False, lambda layer: layer.forget(word))


def _op_block(server: Server, req: dict[str, Any]) -> dict[str, Any]:
    word = _word(req)
    user = server._user(req, required=True)
    assert user is not None
    return _changing(server, user, True, lambda layer: layer.block(word))


def _op_unblock(server: Server, req: dict[str, Any]) -> dict[str, Any]:
    word = _word(req)
    user = server._user(req, required=True)
    assert user is not None
    return _changing(server, user, False, lambda layer: layer.unblock(word))


def _op_info(server: Server, req: dict[str, Any]) -> dict[str, Any]:
    from . import __version__

    out: dict[str, Any] = {
        "protocol": PROTOCOL_VERSION,
        "version": __version__,
        "model": server.model_info,
        "limits": asdict(server.limits),
        "users": server.users_dir is not None,
    }
    user = server._user(req, required=False)
    if user is not None:
        with server._using(user, create=False) as layer:
            out["user"] = _layer_state(user, layer)
    return out


_HANDLERS: dict[str, tuple[frozenset[str], Callable[[Server, dict[str, Any]], dict[str, Any]]]] = {
    "suggest": (frozenset({"text", "k", "user", "typos"}), _op_suggest),
    "learn": (frozenset({"user", "text"}), _op_learn),
    "forget": (frozenset({"user", "word", "all"}), _op_forget),
    "block": (frozenset({"user", "word"}), _op_block),
    "unblock": (frozenset({"user", "word"}), _op_unblock),
    "info": (frozenset({"user"}), _op_info),
}


def run_server(
    model: Predictor,
    listener: socket.socket,
    *,
    users_dir: str | os.PathLike[str] | None,
    limits: ServeLimits,
    on_ready: Callable[[dict[str, Any]], None],
    max_open_users: int = DEFAULT_MAX_OPEN_USERS,
) -> dict[str, Any]:
    """Serve until SIGTERM or SIGINT (main thread only), then stop cleanly; returns the stop report."""
    import signal

    server = Server(model, listener, users_dir=users_dir, limits=limits, max_open_users=max_open_users)

    def _on_signal(signum: int, frame: object) -> None:
        server.stop()

    old = {sig: signal.signal(sig, _on_signal) for sig in (signal.SIGTERM, signal.SIGINT)}
    try:
        return server.serve_forever(on_ready)
    finally:
        for sig, handler in old.items():
            signal.signal(sig, handler)

