"""OFF files: vertex lines rewritten, every other byte kept.

Read through trimesh (``process=False``); writing rewrites only the vertex lines (keeping
anything after the third number, e.g. colours) and copies all other bytes.
"""
from __future__ import annotations

import os
import re
from dataclasses import dataclass

import numpy as np

from ._parsing import fan, run_splice, trimesh_load
from .document import MeshDoc, MeshError, MeshPart, Polygons

__all__ = ["load", "save", "export"]


@dataclass
class _OffSource:
    data: bytes
    starts: np.ndarray
    ends: np.ndarray
    tails: list


_THREE = re.compile(rb"\s*\S+\s+\S+\s+\S+")


def load(path, data: bytes) -> MeshDoc:
    """Read OFF bytes (``path`` names the file in errors)."""
    m = trimesh_load(path, data, "off")
    vertices = np.asarray(m.vertices, dtype=np.float64).copy()
    n = len(vertices)
    # walk the lines: header keyword, counts, n vertex lines, then the face lines (comments and
    # blank lines skipped); faces are read here to keep the file's face order
    starts, ends, tails = [], [], []
    counts, corners = [], []
    nfaces = 0
    pos = 0
    stage = 0  # 0: keyword, 1: counts, 2: vertices, 3: faces
    size = len(data)
    while pos < size and (stage < 3 or len(counts) < nfaces):
        nl = data.find(b"\n", pos)
        end = size if nl < 0 else nl
        line = data[pos:end]
        content = line.split(b"#", 1)[0].strip()
        if content:
            words = content.split()
            if stage == 0:
                stage = 1
                words = words[1:]  # "OFF n m k" may share the keyword's line
            if stage == 1 and words:
                nfaces = int(words[1])
                stage = 2 if n else 3
            elif stage == 2:
                e = end - 1 if line.endswith(b"\r") else end
                mt = _THREE.match(data, pos, e)
                if mt is None:
                    raise MeshError(f"{path}: malformed OFF vertex line")
                starts.append(pos)
                ends.append(e)
                tails.append(data[mt.end() : e].decode("latin-1"))
                if len(starts) == n:
                    stage = 3
            elif stage == 3:
                k = int(words[0])
                if k < 3 or len(words) < k + 1:
                    raise MeshError(f"{path}: malformed OFF face line")
                counts.append(k)
                corners.extend(int(w) for w in words[1 : k + 1])
        pos = end + 1
    if len(starts) != n or len(counts) != nfaces:
        raise MeshError(f"{path}: OFF file is shorter than its counts line says")
    corners = np.asarray(corners, np.int64)
    if len(corners) and (corners.min() < 0 or corners.max() >= n):
        raise MeshError(f"{path}: OFF face index out of range (file has {n} vertices)")
    faces = corners[fan(counts, corners)] if len(corners) else np.zeros((0, 3), np.int64)
    source = _OffSource(data, np.asarray(starts, np.int64), np.asarray(ends, np.int64), tails)
    name = os.path.splitext(os.path.basename(os.fspath(path)))[0]
    polys = Polygons(np.asarray(counts, np.int64), corners)
    unconverted = ("vertex colours",) if any(t.split("#")[0].strip() for t in tails) else ()
    return MeshDoc(vertices, faces, os.fspath(path), "off", None, "absent",
                   (MeshPart(name, 0, n),), source, polygons=polys, unconverted=unconverted)


def save(doc: MeshDoc, vertices) -> bytes:
    """The source file with only its vertex lines rewritten."""
    src: _OffSource = doc._source
    rows = vertices.tolist()

    def render(k, a, b, sep):
        s = sep.decode()
        text = s.join("%r %r %r%s" % (*rows[i], src.tails[i]) for i in range(a, b))
        return text.encode("latin-1")

    return run_splice(src.data, src.starts, src.ends, np.zeros(len(src.starts), np.int64), render)


def export(vertices, polys: Polygons) -> bytes:
    """A new OFF: positions and polygons (OFF holds nothing else pliant carries)."""
    vertices = np.asarray(vertices, np.float64)
    counts = polys.counts.tolist()
    corners = polys.corners.tolist()
    lines = ["OFF", f"{len(vertices)} {len(counts)} 0"]
    lines += ["%r %r %r" % tuple(row) for row in vertices.tolist()]
    start = 0
    for k in counts:
        lines.append(" ".join([str(k)] + [str(v) for v in corners[start:start + k]]))
        start += k
    return ("\n".join(lines) + "\n").encode("ascii")
