"""Atomic file writes: a temporary file in the target folder, fsynced, then renamed into place.

A reader of ``path`` sees either the old file or the complete new one, never a half-written
file: the bytes go to a temporary file beside the target, are flushed to disk, and only then
does :func:`os.replace` swap it in (an atomic rename on POSIX and Windows within one folder).

On any exception inside the ``with`` block (``KeyboardInterrupt`` included) the temporary file is
removed and an existing target is left untouched. A process killed outright (``SIGKILL``, power
loss) cannot clean up: the target is still whole, but a stray temporary file named
``.<name>.<random>.tmp`` may stay in the folder; :func:`stale_temporaries` lists such files.
"""

from __future__ import annotations

import contextlib
import os
import tempfile

__all__ = ["atomic_write", "stale_temporaries"]

_MODES = {"wb": "wb", "w": "w", "wt": "w"}
_SUFFIX = ".tmp"


def _fsync_folder(folder: str) -> None:
    """Flush the folder entry of a rename to disk (POSIX only; a no-op where unsupported)."""
    if os.name != "posix":
        return
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _new_file_mode(path: str) -> int:
    """Permission bits for the new file: those of the file it replaces, else 0o666 less umask."""
    try:
        return os.stat(path).st_mode & 0o7777
    except OSError:
        umask = os.umask(0)
        os.umask(umask)
        return 0o666 & ~umask


@contextlib.contextmanager
def atomic_write(path, *, mode: str = "wb", encoding: str | None = None, newline: str | None = None):
    """Open a temporary file beside ``path`` for writing; rename it onto ``path`` on success.

    Parameters
    ----------
    path : str or os.PathLike
        Target file. Its folder must exist.
    mode : {"wb", "w", "wt"}
        Binary (``"wb"``) or text (``"w"``/``"wt"``) writing.
    encoding, newline : str, optional
        Passed to :func:`open` in text mode (``encoding`` defaults to UTF-8).

    Yields
    ------
    file object
        Write to it; do not close it yourself.

    Example
    -------
    >>> with atomic_write("pose.obj") as f:   # doctest: +SKIP
    ...     f.write(data)
    """
    if mode not in _MODES:
        raise ValueError(f"mode: must be one of {sorted(_MODES)}, got {mode!r}")
    path = os.fspath(path)
    if not path:
        raise ValueError("path: must not be empty")
    target = os.path.abspath(path)
    folder, name = os.path.split(target)
    if not os.path.isdir(folder):
        raise FileNotFoundError(f"path: folder {folder!r} does not exist")
    if os.path.isdir(target):
        raise IsADirectoryError(f"path: {path!r} is a folder")
    open_mode = _MODES[mode]
    if open_mode == "w" and encoding is None:
        encoding = "utf-8"
    file_mode = _new_file_mode(target)

    fd, tmp = tempfile.mkstemp(prefix=f".{name}.", suffix=_SUFFIX, dir=folder)
    renamed = False
    owned = False  # True once a file object owns (and will close) ``fd``
    try:
        os.chmod(tmp, file_mode)
        if open_mode == "wb":
            f = os.fdopen(fd, "wb")
        else:
            f = os.fdopen(fd, "w", encoding=encoding, newline=newline)
        owned = True
        with f:
            yield f
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, target)
        renamed = True
        _fsync_folder(folder)
    finally:
        if not renamed:
            if not owned:  # the file object, once made, is closed by its ``with``
                os.close(fd)
            try:
                os.unlink(tmp)
            except FileNotFoundError:
                pass


def stale_temporaries(path) -> list[str]:
    """Temporary files left beside ``path`` by writers that were killed before renaming.

    Parameters
    ----------
    path : str or os.PathLike
        The target file whose folder is searched.

    Returns
    -------
    list of str
        Paths of files named ``.<name>.<random>.tmp`` in the target's folder, sorted.
    """
    target = os.path.abspath(os.fspath(path))
    folder, name = os.path.split(target)
    prefix = f".{name}."
    try:
        entries = os.listdir(folder)
    except OSError:
        return []
    return sorted(
        os.path.join(folder, e) for e in entries if e.startswith(prefix) and e.endswith(_SUFFIX)
    )
