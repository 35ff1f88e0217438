"""``nextword live`` driven through a real pseudo-terminal, key by key."""

from __future__ import annotations

import os
import pty
import select
import subprocess
import sys
import time
from pathlib import Path

import pytest

import nextword
from nextword._live import accept

ROOT = Path(__file__).resolve().parent.parent


def test_accept_replaces_the_partial_word() -> None:
    assert accept("see you at the wor", "workshop") == "see you at the workshop "
    assert accept("see you at the ", "workshop") == "see you at the workshop "
    assert accept("I don'", "don't") == "I don't "


def _read_until(fd: int, needle: str, timeout: float = 10.0) -> str:
    buf = b""
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        r, _, _ = select.select([fd], [], [], 0.1)
        if r:
            try:
                chunk = os.read(fd, 4096)
            except OSError:
                break
            if not chunk:
                break
            buf += chunk
            if needle.encode() in buf:
                return buf.decode("utf-8", "replace")
    raise AssertionError(f"{needle!r} not shown; screen so far: {buf.decode('utf-8', 'replace')[-500:]!r}")


@pytest.mark.skipif(sys.platform == "win32", reason="needs a POSIX pseudo-terminal")
def test_live_mode_updates_on_every_key_and_accepts(tmp_path: Path) -> None:
    model = tmp_path / "m.nwm"
    nextword.train_texts(["see you at the workshop", "see you at the workshop", "see you soon"], model, min_count=1)
    master, slave = pty.openpty()
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.Popen(
        [sys.executable, "-m", "nextword", "live", str(model), "-k", "3"],
        stdin=slave, stdout=slave, stderr=slave, env=env, close_fds=True,
    )
    os.close(slave)
    try:
        _read_until(master, "Ctrl-D quits")
        for ch in "see you ":
            os.write(master, ch.encode())
        _read_until(master, "[1] at")  # after "you": at (2) beats soon (1)
        os.write(master, b"at the w")
        _read_until(master, "[1] workshop")
        os.write(master, b"\t")
        _read_until(master, "> see you at the workshop ")
        os.write(master, b"\x04")
        assert proc.wait(timeout=10) == 0
    finally:
        if proc.poll() is None:
            proc.kill()
        os.close(master)
