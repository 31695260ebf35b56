"""Shared byte and line parsing for the text formats (private to brushes.formats).

Bulk numpy parsing: a file's lines become (start, end) byte ranges, the ranges of one kind are
gathered into one blob and tokenised or parsed at once, and a file is rewritten by splicing new
text into chosen line ranges while every other byte is copied.
"""
from __future__ import annotations

import warnings
from typing import NamedTuple

import numpy as np

from .document import MeshError


def one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split()) or type(exc).__name__
    return text if len(text) <= 200 else text[:197] + "..."


def fan(counts, corners):
    """Fan-triangulate polygons. counts (k,) corners per polygon, corners (sum counts,) values.

    Returns (t, 3) corner positions (indices into ``corners``) of the triangles.
    """
    counts = np.asarray(counts, np.int64)
    off = np.cumsum(counts) - counts
    ntri = np.maximum(counts - 2, 0)
    total = int(ntri.sum())
    poly = np.repeat(np.arange(len(counts)), ntri)
    j = np.arange(total) - np.repeat(np.cumsum(ntri) - ntri, ntri) + 1
    base = off[poly]
    return np.stack([base, base + j, base + j + 1], axis=1)


def split_lines(data: bytes):
    """Line ranges of ``data``: (buf padded by 4 bytes, starts, ends); ends exclude CR/LF."""
    buf = np.frombuffer(data + b"\n\n\n\n", np.uint8)
    size = len(data)
    nl = np.flatnonzero(buf[:size] == 10)
    starts = np.concatenate(([0], nl + 1)).astype(np.int64)
    ends = np.concatenate((nl, [size])).astype(np.int64)
    if size and data.endswith(b"\n"):
        starts, ends = starts[:-1], ends[:-1]
    cr = (ends > starts) & (buf[np.maximum(ends - 1, 0)] == 13)
    return buf, starts, ends - cr


def gather(buf, starts, ends, lines):
    """Concatenate the byte ranges ``buf[starts[i]:ends[i]]`` separated by blanks.

    ``lines`` (k,) are the ranges' line numbers: runs of consecutive lines are copied as one
    slice, and the bytes between two ranges of a run (line break, next keyword) are blanked.
    Returns (blob uint8, offsets (k,) of each range in the blob).
    """
    n = len(starts)
    offsets = np.zeros(n, np.int64)
    if n == 0:
        return np.zeros(0, np.uint8), offsets
    brk = np.flatnonzero(np.diff(lines) != 1) + 1
    run_a = np.concatenate(([0], brk)).tolist()
    run_b = np.concatenate((brk, [n])).tolist()
    pieces = []
    base = 0
    blank = np.full(1, 32, np.uint8)
    for a, b in zip(run_a, run_b):
        seg = buf[starts[a] : ends[b - 1]]
        offsets[a:b] = starts[a:b] - starts[a] + base
        pieces.append(seg)
        pieces.append(blank)
        base += len(seg) + 1
    blob = np.concatenate(pieces)
    gap_from = offsets[:-1] + (ends[:-1] - starts[:-1])
    gap_len = offsets[1:] - gap_from
    if len(gap_len):
        pos = np.repeat(gap_from - np.cumsum(gap_len) + gap_len, gap_len) + np.arange(int(gap_len.sum()))
        blob[pos] = 32
    return blob, offsets


class Tokens(NamedTuple):
    starts: np.ndarray  # (t,) token start positions in the blob
    ends: np.ndarray  # (t,) token end positions (exclusive)
    first: np.ndarray  # (k,) index of each line's first token
    counts: np.ndarray  # (k,) tokens per line
    blob: np.ndarray  # blob with comments blanked


def tokens(blob, offsets) -> Tokens:
    """Whitespace-separated tokens of each range of a blob, with ``#`` comments blanked."""
    hs = blob == 35
    if hs.any():
        c = np.cumsum(hs, dtype=np.int64)
        lineid = np.searchsorted(offsets, np.arange(len(blob)), side="right") - 1
        before = c[offsets] - hs[offsets]
        blob = blob.copy()
        blob[(c - before[lineid]) > 0] = 32
    ws = blob <= 32
    prev = np.empty_like(ws)
    nxt = np.empty_like(ws)
    if len(ws):
        prev[0] = True
        prev[1:] = ws[:-1]
        nxt[-1] = True
        nxt[:-1] = ws[1:]
    starts = np.flatnonzero(~ws & prev)
    ends = np.flatnonzero(~ws & nxt) + 1
    bounds = np.searchsorted(starts, np.concatenate((offsets, [len(blob)])))
    return Tokens(starts, ends, bounds[:-1], np.diff(bounds), blob)


def parse_numbers(blob, expected, dtype, what):
    """Parse whitespace-separated numbers of a blob; the count must equal ``expected``."""
    if expected == 0:
        return np.zeros(0, dtype)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        try:
            values = np.fromstring(blob.tobytes(), dtype=dtype, sep=" ")
        except (ValueError, DeprecationWarning):
            values = None
    if values is None or values.size != expected:
        raise MeshError(f"{what}: malformed number")
    return values


def run_splice(data: bytes, starts, ends, keys, render) -> bytes:
    """Replace the line ranges ``data[starts[i]:ends[i]]`` (sorted, disjoint) with new text.

    Consecutive replaced lines that share a key and are separated by exactly one line break
    form a run; ``render(key, i0, i1, sep)`` returns the bytes of lines ``i0..i1-1`` joined by
    ``sep``. Everything outside the ranges is copied unchanged.
    """
    n = len(starts)
    if n == 0:
        return data
    sep = b"\r\n" if data[ends[0] : ends[0] + 2] == b"\r\n" else b"\n"
    gap = starts[1:] - ends[:-1]
    buf = np.frombuffer(data + b"\0\0", np.uint8)
    joined = gap == len(sep)
    for k, ch in enumerate(sep):
        joined &= buf[ends[:-1] + k] == ch
    joined &= keys[1:] == keys[:-1]
    breaks = np.concatenate(([0], np.flatnonzero(~joined) + 1, [n]))
    pieces = []
    prev = 0
    for a, b in zip(breaks[:-1].tolist(), breaks[1:].tolist()):
        pieces.append(data[prev : starts[a]])
        pieces.append(render(int(keys[a]), a, b, sep))
        prev = int(ends[b - 1])
    pieces.append(data[prev:])
    return b"".join(pieces)


def trimesh_load(path, data: bytes, kind: str):
    import io

    import trimesh

    try:
        m = trimesh.load(io.BytesIO(data), file_type=kind, process=False, force="mesh")
    except MeshError:
        raise
    except Exception as exc:  # trimesh raises many types on bad input
        raise MeshError(f"{path}: not a readable {kind.upper()} file ({one_line(exc)})") from None
    if not isinstance(m, trimesh.Trimesh) or len(m.vertices) == 0:
        raise MeshError(f"{path}: no vertices found; not a {kind.upper()} file or empty")
    return m
