import json
import os
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from viewer import journal as jr
from viewer.journal import (
    Journal, JournalError, JournalMismatch, find_journal, journal_path, read_events, read_journal,
    replay_events, rest_checksum,
)

REPO = Path(__file__).resolve().parents[1]
REST = np.arange(12.0).reshape(4, 3)


def grab(i):
    return {"kind": "grab", "center": [0.0, float(i), 0.0], "radius": 0.5, "move": [0.1 * i, 0.0, 0.0]}


@pytest.fixture
def mesh(tmp_path):
    path = tmp_path / "mascot.obj"
    path.write_text("# stand-in mesh file\n")
    return path


def test_round_trip_and_header(mesh):
    assert find_journal(mesh) is None
    j = Journal(mesh, REST)
    assert not os.path.exists(j.path)  # nothing is written before the first record
    for i in range(3):
        j.append(grab(i))
    j.close()
    assert find_journal(mesh) == str(mesh) + ".pliant-journal" == journal_path(mesh)
    lines = Path(j.path).read_text().splitlines()
    header = json.loads(lines[0])
    assert header["format"] == "pliant-journal" and header["mesh"] == str(mesh.resolve())
    assert header["vertices"] == 4
    # The checksum is a plain SHA-256 (hashlib) over "4x3:" and the little-endian float64 bytes.
    import hashlib
    assert header["rest_sha256"] == hashlib.sha256(b"4x3:" + REST.astype("<f8").tobytes()).hexdigest()
    assert read_journal(j.path, rest=REST) == [grab(0), grab(1), grab(2)]


def test_every_record_is_fsynced(mesh, monkeypatch):
    synced = []
    real = os.fsync
    monkeypatch.setattr(jr.os, "fsync", lambda fd: (synced.append(fd), real(fd))[1])
    j = Journal(mesh, REST)
    j.append(grab(0))
    n = len(synced)
    j.undo()
    j.redo()
    assert len(synced) == n + 2
    j.close()


def test_undo_redo_events_hand_checked(mesh):
    with Journal(mesh, REST) as j:
        j.append(grab(0))
        j.append(grab(1))
        j.undo()
        j.append(grab(2))  # drops grab(1)
        j.append(grab(3))
        j.undo()
        j.undo()
        j.redo()
    strokes, position = replay_events(read_events(j.path)[1])
    assert strokes == [grab(0), grab(2), grab(3)] and position == 2
    assert read_journal(j.path) == [grab(0), grab(2)]


def test_a_normal_close_is_recorded_and_recognised(mesh):
    from viewer.journal import ended_cleanly
    with Journal(mesh, REST) as j:
        j.append(grab(0))
        j.end()
    events = read_events(j.path)[1]
    assert [e["event"] for e in events] == ["stroke", "closed"] and ended_cleanly(events)
    assert read_journal(j.path) == [grab(0)]  # "closed" changes no stroke
    with Journal(mesh, REST, resume=True) as j:  # the next session goes on: not clean again
        j.append(grab(1))
    events = read_events(j.path)[1]
    assert not ended_cleanly(events) and read_journal(j.path) == [grab(0), grab(1)]
    empty = Journal(mesh.with_name("other.obj"), REST)
    empty.end()  # nothing recorded, so no file is made
    assert find_journal(mesh.with_name("other.obj")) is None


def test_torn_last_line_is_ignored_and_cut_before_resuming(mesh):
    with Journal(mesh, REST) as j:
        j.append(grab(0))
        j.append(grab(1))
    with open(j.path, "ab") as f:
        f.write(b'{"event":"stroke","stroke":{"kind":"gr')  # a write cut short by a crash
    assert read_journal(j.path) == [grab(0), grab(1)]
    with Journal(mesh, REST, resume=True) as j2:
        j2.append(grab(2))
    assert read_journal(j.path) == [grab(0), grab(1), grab(2)]


def test_damaged_middle_line_is_reported(mesh):
    with Journal(mesh, REST) as j:
        j.append(grab(0))
    with open(j.path, "ab") as f:
        f.write(b"not json\n")
        f.write(b'{"event":"undo"}\n')
    with pytest.raises(JournalError, match="line 3"):
        read_journal(j.path)


def test_checksum_mismatch(mesh):
    with Journal(mesh, REST) as j:
        j.append(grab(0))
    with pytest.raises(JournalMismatch, match="rest"):
        read_journal(j.path, rest=REST + 1e-9)
    with pytest.raises(JournalMismatch):
        Journal(mesh, REST * 2, resume=True)


def test_new_journal_replaces_an_old_one_and_clear_removes_it(mesh):
    with Journal(mesh, REST) as j:
        j.append(grab(0))
    with Journal(mesh, REST) as j:  # the user declined recovery
        j.append(grab(5))
        assert read_journal(j.path) == [grab(5)]
        j.clear(rest=REST * 2)
        assert find_journal(mesh) is None
        j.append(grab(6))  # a fresh journal for the saved positions
    assert read_journal(j.path, rest=REST * 2) == [grab(6)]


def test_numpy_values_are_written_as_json(mesh):
    with Journal(mesh, REST) as j:
        j.append({"kind": "grab", "center": np.zeros(3), "radius": np.float64(0.5), "move": np.ones(3)})
    assert read_journal(j.path) == [{"kind": "grab", "center": [0.0] * 3, "radius": 0.5, "move": [1.0] * 3}]


def test_bad_input(mesh, tmp_path):
    j = Journal(mesh, REST)
    with pytest.raises(JournalError, match="stroke"):
        j.append({"kind": "grab", "radius": float("nan")})
    with pytest.raises(JournalError, match="stroke"):
        j.append(["grab"])
    assert find_journal(mesh) is None  # nothing was written
    with pytest.raises(JournalError, match="resume"):
        Journal(mesh, REST, resume=True)
    with pytest.raises(ValueError, match="rest"):
        Journal(mesh, np.zeros((3, 2)))
    other = tmp_path / "other.pliant-journal"
    other.write_text('{"format":"something else"}\n')
    with pytest.raises(JournalError, match="not a pliant journal"):
        read_journal(other)
    other.write_text('{"format":"pliant-journal","version":1}\n{"event":"undo"}\n')
    with pytest.raises(JournalError, match="undoes"):
        read_journal(other)
    assert rest_checksum(REST) != rest_checksum(REST[:3])


CHILD = r"""
import sys
import numpy as np
from viewer.journal import Journal
mesh, big = sys.argv[1], int(sys.argv[2])
j = Journal(mesh, np.arange(12.0).reshape(4, 3))
i = 0
while True:
    j.append({"kind": "grab", "i": i, "pad": "x" * big})
    print(i, flush=True)
    i += 1
"""


def test_recovery_after_sigkill(mesh):
    # A writer killed outright mid-session: every stroke it reported finished must be read back,
    # in order, and nothing half-written may appear.  (The kill mostly lands inside fsync; a
    # record torn mid-write is covered by test_torn_last_line_is_ignored_and_cut_before_resuming.)
    for big in (0, 200_000):
        proc = subprocess.Popen(
            [sys.executable, "-c", CHILD, str(mesh), str(big)], cwd=REPO,
            stdout=subprocess.PIPE, text=True, env=dict(os.environ, PYTHONPATH=str(REPO)),
        )
        try:
            acknowledged = -1
            while acknowledged < 25:
                line = proc.stdout.readline()
                assert line, "the writer stopped early"
                acknowledged = int(line)
        finally:
            proc.send_signal(signal.SIGKILL)
            proc.wait(timeout=30)
            proc.stdout.close()
        assert proc.returncode == -signal.SIGKILL
        strokes = read_journal(journal_path(mesh), rest=REST)
        assert len(strokes) >= acknowledged + 1
        assert [s["i"] for s in strokes] == list(range(len(strokes)))
        assert all(len(s["pad"]) == big for s in strokes)
        with Journal(mesh, REST, resume=True) as j:  # the session can go on after recovery
            j.append(grab(0))
        assert read_journal(journal_path(mesh))[-1] == grab(0)
        os.remove(journal_path(mesh))
