"""Append-only stroke journal and crash recovery (no OpenGL).

While a mesh is being edited, every finished stroke, undo and redo is appended as one JSON line
to ``<mesh file>.pliant-journal`` beside the mesh, then flushed and ``os.fsync``-ed, so a crash
loses at most the stroke in progress.  The file holds:

* line 1, the header: ``{"format": "pliant-journal", "version": 1, "mesh": <absolute path>,
  "vertices": n, "rest_sha256": <hex digest of the rest positions>}``;
* then events: ``{"event": "stroke", "stroke": {...}}``, ``{"event": "undo"}``,
  ``{"event": "redo"}``, and ``{"event": "closed"}`` when the viewer was closed normally with
  strokes not saved as a recipe (:meth:`Journal.end`; see :func:`ended_cleanly`).

A record is written with a single ``write`` and ends with a newline, and JSON text holds no
raw newline, so every newline-terminated line is a whole record; an unterminated last line is
the torn remains of a write cut short and is ignored (and cut off before appending resumes).
The journal is made atomically (temporary file, then rename) when the first record is written,
and :meth:`Journal.clear` removes it after a clean save: a journal on disk means unsaved work.

Recovery::

    path = find_journal(mesh_path)
    if path:
        strokes, position = replay_events(read_events(path, rest=rest)[1])
        for s in strokes: history.push(s)       # then history.goto(position)
        journal = Journal(mesh_path, rest, resume=True)
    else:
        journal = Journal(mesh_path, rest)
"""

from __future__ import annotations

import hashlib
import json
import os

import numpy as np

from brushes.atomic import atomic_write

__all__ = [
    "Journal", "JournalError", "JournalMismatch", "SUFFIX", "journal_path", "find_journal",
    "read_events", "replay_events", "read_journal", "rest_checksum", "ended_cleanly",
]

SUFFIX = ".pliant-journal"
FORMAT = "pliant-journal"
VERSION = 1
EVENTS = ("stroke", "undo", "redo", "closed")


class JournalError(ValueError):
    """A journal that cannot be read or written as asked."""


class JournalMismatch(JournalError):
    """A journal recorded for other rest positions than the mesh's."""


def journal_path(mesh_path):
    """The journal's path for a mesh file: ``<mesh file>.pliant-journal``."""
    return os.fspath(mesh_path) + SUFFIX


def find_journal(mesh_path):
    """The path of the mesh's journal if one exists (unsaved work), else None."""
    path = journal_path(mesh_path)
    return path if os.path.isfile(path) else None


def rest_checksum(points):
    """SHA-256 hex digest of the shape and little-endian float64 bytes of (n, 3) ``points``."""
    p = np.ascontiguousarray(points, dtype="<f8")
    if p.ndim != 2 or p.shape[1] != 3:
        raise ValueError(f"rest: must have shape (n, 3), got {p.shape}")
    h = hashlib.sha256(f"{p.shape[0]}x3:".encode())
    h.update(p.tobytes())
    return h.hexdigest()


def _plain(value):
    """JSON fallback for numpy values inside stroke dicts."""
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, np.generic):
        return value.item()
    raise TypeError(f"{type(value).__name__} is not JSON serializable")


def _encode(record, what):
    try:
        text = json.dumps(record, default=_plain, allow_nan=False, separators=(",", ":"))
    except (TypeError, ValueError) as exc:
        raise JournalError(f"{what}: cannot be written as JSON ({exc})") from None
    return (text + "\n").encode("utf-8")


def _complete_lines(data):
    """Split bytes into complete lines; returns (lines, length of the complete part)."""
    end = data.rfind(b"\n") + 1
    return data[:end].splitlines(), end


def read_events(path, *, rest=None):
    """Read a journal: ``(header dict, list of event dicts)``.

    A torn (unterminated) last line is ignored.  With ``rest`` ((n, 3) float64), the header's
    checksum must match it, else :class:`JournalMismatch`.  A damaged complete line raises
    :class:`JournalError` naming its line number.
    """
    path = os.fspath(path)
    with open(path, "rb") as f:
        data = f.read()
    lines, _ = _complete_lines(data)
    if not lines:
        raise JournalError(f"journal: {path!r} has no complete header line")
    records = []
    for number, line in enumerate(lines, start=1):
        try:
            record = json.loads(line)
        except ValueError:
            raise JournalError(f"journal: line {number} of {path!r} is damaged") from None
        if not isinstance(record, dict):
            raise JournalError(f"journal: line {number} of {path!r} is not a record")
        if number > 1 and (record.get("event") not in EVENTS
                           or (record["event"] == "stroke" and not isinstance(record.get("stroke"), dict))):
            raise JournalError(f"journal: line {number} of {path!r} is not a stroke, undo, redo or closed event")
        records.append(record)
    header = records[0]
    if header.get("format") != FORMAT:
        raise JournalError(f"journal: {path!r} is not a pliant journal")
    if header.get("version") != VERSION:
        raise JournalError(f"journal: {path!r} has version {header.get('version')!r}, expected {VERSION}")
    if rest is not None and header.get("rest_sha256") != rest_checksum(rest):
        raise JournalMismatch(f"rest: the positions differ from those {path!r} was recorded on")
    return header, records[1:]


def replay_events(events):
    """Resolve stroke/undo/redo events: ``(strokes, position)``, the whole stroke list (redo
    tail included) and how many of them are applied."""
    strokes, position = [], 0
    for i, e in enumerate(events):
        kind = e.get("event")
        if kind == "stroke":
            del strokes[position:]
            strokes.append(e["stroke"])
            position += 1
        elif kind == "undo":
            if position == 0:
                raise JournalError(f"events: event {i} undoes past the first stroke")
            position -= 1
        elif kind == "redo":
            if position == len(strokes):
                raise JournalError(f"events: event {i} redoes past the last stroke")
            position += 1
        elif kind == "closed":
            pass
        else:
            raise JournalError(f"events: event {i} has unknown kind {kind!r}")
    return strokes, position


def ended_cleanly(events):
    """True when the last event is ``closed``: the session was closed normally (its strokes were
    kept because they were not saved as a recipe), not interrupted."""
    return bool(events) and events[-1].get("event") == "closed"


def read_journal(path, *, rest=None):
    """The applied strokes recorded in a journal, oldest first (undo/redo resolved)."""
    strokes, position = replay_events(read_events(path, rest=rest)[1])
    return strokes[:position]


def _fsync_folder(folder):
    if os.name != "posix":
        return
    fd = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


class Journal:
    """Writer of one mesh's journal.

    mesh_path : the mesh file (str or path-like).  rest : (n, 3) float64 rest positions, for
    the header checksum.  resume : keyword-only; False (default) starts a new journal, replacing
    any old one when the first record is written (ask the user about recovery first); True
    appends to the existing journal, which must match ``rest`` (torn tail cut off).

    Every record is flushed and fsynced before the call returns.
    """

    def __init__(self, mesh_path, rest, *, resume=False):
        self.mesh_path = os.path.abspath(os.fspath(mesh_path))
        self.path = journal_path(self.mesh_path)
        self._checksum = rest_checksum(rest)
        self._n = int(np.shape(rest)[0])
        self._file = None
        if resume:
            if not os.path.isfile(self.path):
                raise JournalError(f"resume: no journal at {self.path!r}")
            read_events(self.path, rest=rest)  # validates header, checksum and every line
            self._open_existing()

    def _open_existing(self):
        f = open(self.path, "r+b")
        try:
            data = f.read()
            _, end = _complete_lines(data)
            if end < len(data):  # cut off a torn last record before appending
                f.truncate(end)
                f.flush()
                os.fsync(f.fileno())
            f.seek(0, os.SEEK_END)
        except BaseException:
            f.close()
            raise
        self._file = f

    def _header(self):
        return {"format": FORMAT, "version": VERSION, "mesh": self.mesh_path,
                "vertices": self._n, "rest_sha256": self._checksum}

    def _write(self, record, what):
        line = _encode(record, what)  # encode first: a bad stroke writes nothing
        if self._file is None:
            with atomic_write(self.path, mode="wb") as f:
                f.write(_encode(self._header(), "header"))
            self._file = open(self.path, "ab")
        self._file.write(line)
        self._file.flush()
        os.fsync(self._file.fileno())

    def append(self, stroke):
        """Record a finished stroke (a JSON-ready dict; numpy values are converted)."""
        if not isinstance(stroke, dict):
            raise JournalError(f"stroke: must be a dict, got {type(stroke).__name__}")
        self._write({"event": "stroke", "stroke": stroke}, "stroke")

    def undo(self):
        """Record an undo."""
        self._write({"event": "undo"}, "undo")

    def redo(self):
        """Record a redo."""
        self._write({"event": "redo"}, "redo")

    def clear(self, *, rest=None):
        """Remove the journal after a clean save.  With ``rest`` ((n, 3) float64, e.g. the saved
        positions when the mesh file was overwritten), later records start a journal for it."""
        self.close()
        if rest is not None:
            self._checksum = rest_checksum(rest)
            self._n = int(np.shape(rest)[0])
        try:
            os.remove(self.path)
        except FileNotFoundError:
            return
        _fsync_folder(os.path.dirname(self.path))

    def end(self):
        """Record that the session closed normally (only when this journal holds records),
        then close."""
        if self._file is not None:
            self._write({"event": "closed"}, "closed")
        self.close()

    def close(self):
        if self._file is not None:
            self._file.close()
            self._file = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
