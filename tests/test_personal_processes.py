"""Several processes on one personal layer file: no lost update, no resurrected word, crash safety.

The oracle is plain arithmetic over what the processes were told to learn (every learn
adds exactly 1 to each of its words' counts when nothing decays, "common practice"
for counting), and, where decay makes the numbers irrational, agreement bit for bit
between every process and a fresh reader of the files.
"""

from __future__ import annotations

import json
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

import nextword
from nextword.personal import JOURNAL_SUFFIX, LOCK_SUFFIX, PersonalLayer

ROOT = Path(__file__).resolve().parent.parent
ENV = dict(os.environ, PYTHONPATH=str(ROOT))


# A child learns N messages naming its own tag, then (optionally) waits until it sees the
# other child's messages too and prints its whole state: every process must converge.
LEARNER = r"""
import json, sys, time
import nextword, nextword.personal as personal
from nextword.personal import PersonalLayer
base_path, layer_path, tag, n, total, compact = sys.argv[1:7]
if compact != "0":
    personal._COMPACT_MIN = personal._COMPACT_MAX = int(compact)  # compact often: reloads race with appends
layer = PersonalLayer.open(nextword.load(base_path), layer_path)
for i in range(int(n)):
    layer.learn(f"the zorbing trip with {tag} and {tag}{i}")
deadline = time.monotonic() + 120
while layer.messages < int(total) and time.monotonic() < deadline:
    time.sleep(0.01)
    layer.refresh()
state = {
    "messages": layer.messages, "entries": layer.entries, "tokens": layer.tokens,
    "zorbing": layer.count("zorbing"), "tag": layer.count(tag),
    "ranking": layer.rank_keys("the", "", 8), "pair": layer.pair_count("with", tag),
}
layer.close()
print(json.dumps(state))
"""


def _learners(base: nextword.Model, path: Path, n: int, compact: int) -> list[dict]:
    procs = [
        subprocess.Popen(
            [sys.executable, "-c", LEARNER, base.path, str(path), tag, str(n), str(2 * n), str(compact)],
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=ENV,
        )
        for tag in ("ana", "ben")
    ]
    out = []
    for p in procs:
        stdout, stderr = p.communicate(timeout=300)
        assert p.returncode == 0, stderr
        out.append(json.loads(stdout))
    return out


def test_two_processes_learning_at_once_lose_nothing(base: nextword.Model, tmp_path: Path) -> None:
    path = tmp_path / "shared.nwp"
    PersonalLayer.open(base, path, create=True, strength=5.0).close()
    states = _learners(base, path, 300, 0)
    final = PersonalLayer.load(base, path)
    # 2 × 300 learns: every message counted once, every word's count exact
    assert final.messages == 600
    assert final.count("zorbing") == 600 and final.pair_count("the", "zorbing") == 600
    assert final.count("ana") == 300 and final.count("ben") == 300  # "ana17" is another word
    assert final.pair_count("with", "ana") == 300 and final.pair_count("with", "ben") == 300
    for i in (0, 123, 299):
        assert final.count(f"ana{i}") == 1 and final.count(f"ben{i}") == 1
    # each process converged to the same state as a fresh reader
    for s in states:
        assert s["messages"] == 600 and s["zorbing"] == 600 and s["entries"] == final.entries
        assert [tuple(x) for x in s["ranking"]] == final.rank_keys("the", "", 8)


def test_processes_converge_bit_for_bit_with_decay_and_compactions(base: nextword.Model, tmp_path: Path) -> None:
    path = tmp_path / "shared.nwp"
    PersonalLayer.open(base, path, create=True, strength=5.0, half_life_messages=40.0, max_entries=300).close()
    # compacting every ~2 KiB of journal: both processes reload snapshots many times
    a, b = _learners(base, path, 150, 2048)
    final = PersonalLayer.load(base, path)
    assert final.messages == 300
    assert final.entries <= 300  # the cap held throughout, evicting in the same order everywhere
    for s in (a, b):
        assert s["tokens"] == final.tokens and s["zorbing"] == final.count("zorbing")
        assert s["entries"] == final.entries
        assert [tuple(x) for x in s["ranking"]] == final.rank_keys("the", "", 8)
    assert a["pair"] == final.pair_count("with", "ana") and b["pair"] == final.pair_count("with", "ben")


def test_a_word_forgotten_in_one_process_never_comes_back_from_another(base: nextword.Model, tmp_path: Path) -> None:
    path = tmp_path / "shared.nwp"
    # two open layers on one file behave as two processes (flock locks per open file)
    app = PersonalLayer.open(base, path, create=True, strength=5.0)
    for _ in range(5):
        app.learn("ask Zanele about the zorbing trip")
    service = PersonalLayer.open(base, path)
    assert service.count("zanele") == 5
    service.forget("Zanele")
    app.learn("the trip is on Friday")  # app's next change must not write its old copy of zanele back
    app.learn("see you Friday")
    for reader in (app, service, PersonalLayer.load(base, path)):
        reader.refresh()
        assert reader.count("zanele") == 0 and reader.pair_count("ask", "zanele") == 0
        assert reader.messages == 7 and reader.count("friday") == 2
    # a forget in a separate real process, then a learn here
    subprocess.run(
        [sys.executable, "-c",
         "import sys, nextword; from nextword.personal import PersonalLayer; "
         "PersonalLayer.open(nextword.load(sys.argv[1]), sys.argv[2]).forget('friday')", base.path, str(path)],
        check=True, env=ENV,
    )
    app.learn("the zorbing trip")
    assert app.count("friday") == 0 and PersonalLayer.load(base, path).count("friday") == 0


def test_suggest_picks_up_another_processes_words(base: nextword.Model, tmp_path: Path) -> None:
    path = tmp_path / "shared.nwp"
    reader = PersonalLayer.open(base, path, create=True, strength=1.0, min_uses=1)
    assert "Quarrington" not in [s.word for s in reader.suggest("see you at Qu", 3)]
    writer = PersonalLayer.open(base, path)
    writer.learn("see you at Quarrington")
    assert "Quarrington" in [s.word for s in reader.suggest("see you at Qu", 3)]  # no explicit refresh


KILLED = r"""
import sys, nextword, nextword.personal as personal
from nextword.personal import PersonalLayer
personal._COMPACT_MIN = personal._COMPACT_MAX = 4096  # compactions (temp files) happen often
layer = PersonalLayer.open(nextword.load(sys.argv[1]), sys.argv[2])
i = 0
while True:
    layer.learn(f"message number {i} from {sys.argv[3]} about the zorbing trip")
    i += 1
    print(i, flush=True)
"""


def test_kill_minus_nine_of_two_writers_loses_at_most_the_records_in_flight(base: nextword.Model, tmp_path: Path) -> None:
    path = tmp_path / "me.nwp"
    PersonalLayer.open(base, path, create=True).close()
    rng = random.Random(5)
    acked_total = 0
    for _ in range(4):
        procs = [
            subprocess.Popen([sys.executable, "-c", KILLED, base.path, str(path), tag], stdout=subprocess.PIPE,
                             text=True, env=ENV)
            for tag in ("ana", "ben")
        ]
        acked = [0, 0]
        deadline = time.monotonic() + rng.uniform(0.8, 1.6)
        while time.monotonic() < deadline:
            for j, p in enumerate(procs):
                assert p.stdout is not None
                line = p.stdout.readline()
                if line:
                    acked[j] = int(line)
        for p in procs:
            os.kill(p.pid, signal.SIGKILL)
        late = 0
        for p in procs:
            p.wait()
            assert p.stdout is not None
            late += sum(1 for _ in p.stdout)  # acknowledged but not read before the kill
        acked_total += sum(acked)
        layer = PersonalLayer.load(base, path)  # always loads
        assert acked_total <= layer.messages <= acked_total + late + 2
        acked_total = layer.messages
    # the next opener cleans up whatever a killed compaction left
    PersonalLayer.open(base, path).close()
    assert [p.name for p in tmp_path.iterdir() if p.name.endswith(".tmp")] == []
    assert acked_total > 0


def test_layer_files_are_private(base: nextword.Model, tmp_path: Path) -> None:
    old = os.umask(0o022)
    try:
        path = tmp_path / "me.nwp"
        with PersonalLayer.open(base, path, create=True) as layer:
            layer.learn("the zorbing trip")
            layer.save(path)  # compaction rewrites both files
            layer.learn("more")
            layer.save(tmp_path / "copy.nwp")
        for p in (path, Path(str(path) + JOURNAL_SUFFIX), Path(str(path) + LOCK_SUFFIX), tmp_path / "copy.nwp"):
            assert p.stat().st_mode & 0o777 == 0o600, p
        nextword.train_texts(["a model file stays readable by all"], tmp_path / "m.nwm", min_count=1)
        assert (tmp_path / "m.nwm").stat().st_mode & 0o777 == 0o644
    finally:
        os.umask(old)


def test_orphan_temp_files_are_removed_on_open_but_not_a_live_writers(base: nextword.Model, tmp_path: Path) -> None:
    import threading

    path = tmp_path / "me.nwp"
    PersonalLayer.open(base, path, create=True).close()
    orphans = [tmp_path / ".me.nwp.ab12cd_9.tmp", tmp_path / ".me.nwp.journal.x1y2z3w4.tmp"]
    unrelated = [tmp_path / ".me.nwp.x.ab12cd_9.tmp", tmp_path / ".other.nwp.ab12cd_9.tmp", tmp_path / "me.nwp.bak"]
    for p in orphans + unrelated:
        p.write_bytes(b"half a file")
    PersonalLayer.open(base, path).close()
    assert not any(p.exists() for p in orphans)
    assert all(p.exists() for p in unrelated)  # another layer's or the user's files are never touched

    # a writer in another process holds the layer's lock while its temp file exists
    holder = subprocess.Popen(
        [sys.executable, "-c",
         "import fcntl, os, sys; fd = os.open(sys.argv[1], os.O_RDWR); fcntl.flock(fd, fcntl.LOCK_EX); "
         "open(sys.argv[2], 'wb').write(b'in progress'); print('ready', flush=True); sys.stdin.readline(); "
         "os.unlink(sys.argv[2])",
         str(path) + LOCK_SUFFIX, str(tmp_path / ".me.nwp.live0001.tmp")],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True,
    )
    assert holder.stdout is not None and holder.stdin is not None
    assert holder.stdout.readline().strip() == "ready"
    opened: list[PersonalLayer] = []
    t = threading.Thread(target=lambda: opened.append(PersonalLayer.open(base, path)))
    t.start()
    t.join(0.5)
    assert (tmp_path / ".me.nwp.live0001.tmp").exists()  # the live writer's file survives
    holder.stdin.write("done\n")
    holder.stdin.flush()
    holder.wait(timeout=30)
    t.join(30)
    assert opened and opened[0].messages == 0
    opened[0].close()
