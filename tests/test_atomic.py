"""Tests for brushes.atomic: writes are all-or-nothing, interrupted writes leave the old file."""

import os
import signal
import stat
import subprocess
import sys
import textwrap

import pytest

from brushes.atomic import atomic_write, stale_temporaries

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _folder_names(folder):
    return sorted(os.listdir(folder))


def test_writes_new_file(tmp_path):
    target = tmp_path / "a.bin"
    with atomic_write(target) as f:
        f.write(b"hello")
    assert target.read_bytes() == b"hello"
    assert _folder_names(tmp_path) == ["a.bin"]


def test_text_mode_replaces_existing(tmp_path):
    target = tmp_path / "a.txt"
    target.write_text("old")
    with atomic_write(target, mode="w") as f:
        f.write("new \u00e9")
    assert target.read_text(encoding="utf-8") == "new \u00e9"
    assert _folder_names(tmp_path) == ["a.txt"]


def test_nothing_visible_until_block_ends(tmp_path):
    target = tmp_path / "a.bin"
    target.write_bytes(b"old")
    with atomic_write(target) as f:
        f.write(b"new")
        f.flush()
        assert target.read_bytes() == b"old"
        # the temporary file lives in the target's folder (so the rename stays on one file system)
        assert len(stale_temporaries(target)) == 1
    assert target.read_bytes() == b"new"
    assert stale_temporaries(target) == []


@pytest.mark.parametrize("exc", [RuntimeError("boom"), KeyboardInterrupt()])
def test_exception_mid_write_keeps_old_file_and_removes_temporary(tmp_path, exc):
    target = tmp_path / "a.bin"
    target.write_bytes(b"old contents")
    with pytest.raises(type(exc)):
        with atomic_write(target) as f:
            f.write(b"half of the new")
            raise exc
    assert target.read_bytes() == b"old contents"
    assert _folder_names(tmp_path) == ["a.bin"]


def test_exception_mid_write_creates_nothing(tmp_path):
    target = tmp_path / "new.bin"
    with pytest.raises(ValueError):
        with atomic_write(target) as f:
            f.write(b"x")
            raise ValueError("stop")
    assert _folder_names(tmp_path) == []


def test_keeps_permission_bits_of_replaced_file(tmp_path):
    target = tmp_path / "a.bin"
    target.write_bytes(b"old")
    os.chmod(target, 0o640)
    with atomic_write(target) as f:
        f.write(b"new")
    assert stat.S_IMODE(os.stat(target).st_mode) == 0o640


def test_new_file_gets_umask_permissions(tmp_path):
    target = tmp_path / "a.bin"
    old = os.umask(0o022)
    try:
        with atomic_write(target) as f:
            f.write(b"new")
    finally:
        os.umask(old)
    # 0o666 & ~0o022, the mode open() would give (POSIX open(2) semantics)
    assert stat.S_IMODE(os.stat(target).st_mode) == 0o644


def test_bad_arguments(tmp_path):
    with pytest.raises(ValueError, match="mode"):
        with atomic_write(tmp_path / "a", mode="ab"):
            pass
    with pytest.raises(FileNotFoundError, match="path"):
        with atomic_write(tmp_path / "missing" / "a"):
            pass
    with pytest.raises(IsADirectoryError, match="path"):
        with atomic_write(tmp_path):
            pass
    assert _folder_names(tmp_path) == []


_CHILD = textwrap.dedent(
    """
    import signal, sys, time
    from brushes.atomic import atomic_write
    # A child of a non-interactive background job starts with SIGINT ignored (POSIX, common
    # practice of shells); a program that honours Ctrl-C restores the default, as `pliant` does.
    signal.signal(signal.SIGINT, signal.default_int_handler)
    with atomic_write(sys.argv[1]) as f:
        f.write(b"N" * 100_000)
        f.flush()
        print("ready", flush=True)
        time.sleep(60)
        f.write(b"end")
    """
)


def _start_child(target):
    env = dict(os.environ, PYTHONPATH=REPO + os.pathsep + os.environ.get("PYTHONPATH", ""))
    proc = subprocess.Popen(
        [sys.executable, "-c", _CHILD, str(target)],
        stdout=subprocess.PIPE,
        env=env,
    )
    line = proc.stdout.readline()
    assert line.strip() == b"ready", line
    return proc


@pytest.mark.skipif(os.name != "posix", reason="signals as used here are POSIX only")
def test_killed_writer_leaves_old_target_whole(tmp_path):
    target = tmp_path / "a.bin"
    target.write_bytes(b"old contents")
    proc = _start_child(target)
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=30)
    proc.stdout.close()
    assert proc.returncode == -signal.SIGKILL
    assert target.read_bytes() == b"old contents"
    # a hard kill cannot clean up: the half-written temporary is left, and is findable
    stale = stale_temporaries(target)
    assert len(stale) == 1 and os.path.getsize(stale[0]) == 100_000


@pytest.mark.skipif(os.name != "posix", reason="signals as used here are POSIX only")
def test_killed_writer_creates_no_target(tmp_path):
    target = tmp_path / "a.bin"
    proc = _start_child(target)
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=30)
    proc.stdout.close()
    assert not target.exists()


@pytest.mark.skipif(os.name != "posix", reason="signals as used here are POSIX only")
def test_interrupted_writer_cleans_up(tmp_path):
    target = tmp_path / "a.bin"
    target.write_bytes(b"old contents")
    proc = _start_child(target)
    proc.send_signal(signal.SIGINT)  # Python turns SIGINT into KeyboardInterrupt
    proc.wait(timeout=30)
    proc.stdout.close()
    assert proc.returncode != 0
    assert target.read_bytes() == b"old contents"
    assert _folder_names(tmp_path) == ["a.bin"]
