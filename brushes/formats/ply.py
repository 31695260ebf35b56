"""PLY files: read through trimesh, written back byte for byte where the layout allows.

Read through trimesh (``process=False``: no merging or reordering). When the vertex element
comes first and has only scalar properties (the usual layout), writing patches ``x y z`` (and
``nx ny nz``, recomputed) in place and keeps every other byte; otherwise it falls back to
trimesh's exporter in the source's encoding, which keeps positions, faces and colours only.
(trimesh's binary PLY reader needs all faces of one size; other files raise MeshError.)
"""
from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np

from brushes import surface

from ._parsing import one_line, trimesh_export, trimesh_load
from .document import MeshDoc, MeshError, MeshPart

__all__ = ["load", "save"]


_PLY_TYPES = {
    "char": "i1", "int8": "i1", "uchar": "u1", "uint8": "u1", "short": "i2", "int16": "i2",
    "ushort": "u2", "uint16": "u2", "int": "i4", "int32": "i4", "uint": "u4", "uint32": "u4",
    "float": "f4", "float32": "f4", "double": "f8", "float64": "f8",
}


@dataclass
class _PlySource:
    data: bytes
    encoding: str  # "ascii", "binary_little_endian", "binary_big_endian"
    body: int  # byte offset of the element data
    vertex_dtype: np.dtype | None  # scalar-only vertex element first: patchable in place
    count: int


def _ply_header(data: bytes, path):
    end = data.find(b"end_header")
    if not data.startswith(b"ply") or end < 0:
        raise MeshError(f"{path}: not a PLY file (no 'ply' ... 'end_header' header)")
    nl = data.find(b"\n", end)
    body = len(data) if nl < 0 else nl + 1
    lines = data[:end].decode("latin-1").splitlines()
    encoding = None
    elements = []
    for line in lines:
        words = line.split()
        if not words:
            continue
        if words[0] == "format" and len(words) >= 2:
            encoding = words[1]
        elif words[0] == "element" and len(words) >= 3:
            elements.append([words[1], int(words[2]), []])
        elif words[0] == "property" and elements:
            elements[-1][2].append(words[1:])
    return encoding, body, elements


def load(path, data: bytes) -> MeshDoc:
    """Read PLY bytes (``path`` names the file in errors)."""
    m = trimesh_load(path, data, "ply")
    try:
        encoding, body, elements = _ply_header(data, path)
    except ValueError as exc:
        raise MeshError(f"{path}: malformed PLY header ({one_line(exc)})") from None
    vertices = np.asarray(m.vertices, dtype=np.float64).copy()
    dtype = None
    if elements and elements[0][0] == "vertex" and elements[0][1] == len(vertices):
        props = elements[0][2]
        if all(p[0] != "list" and p[0] in _PLY_TYPES and len(p) == 2 for p in props):
            names = [p[1] for p in props]
            if {"x", "y", "z"} <= set(names) and len(set(names)) == len(names):
                order = ">" if encoding == "binary_big_endian" else "<"
                dtype = np.dtype([(p[1], order + _PLY_TYPES[p[0]]) for p in props])
    uv = None
    visual = getattr(m, "visual", None)
    if visual is not None and getattr(visual, "kind", None) == "texture":
        u = getattr(visual, "uv", None)
        if u is not None and len(u) == len(vertices):
            uv = np.asarray(u, dtype=np.float64).copy()
    normals = "absent"
    if dtype is not None and {"nx", "ny", "nz"} <= set(dtype.names):
        normals = "recomputed"
    source = _PlySource(data, encoding or "", body, dtype, len(vertices))
    name = os.path.splitext(os.path.basename(os.fspath(path)))[0]
    faces = np.asarray(m.faces, dtype=np.int64).reshape(-1, 3)
    return MeshDoc(vertices, faces, os.fspath(path), "ply", uv, normals,
                   (MeshPart(name, 0, len(vertices)),), source)


def save(doc: MeshDoc, vertices) -> bytes:
    """The source file with new positions (and recomputed normals) patched in where possible."""
    src: _PlySource = doc._source
    dtype = src.vertex_dtype
    n = len(vertices)
    if dtype is None or src.encoding not in ("ascii", "binary_little_endian", "binary_big_endian"):
        return trimesh_export(vertices, doc.faces, "ply", encoding="ascii" if src.encoding == "ascii" else "binary")
    normals = None
    if doc.normals_on_save == "recomputed":
        normals = surface.vertex_normals(vertices, doc.faces)
        good = np.any(normals != 0, axis=1)  # vertices with no area keep their stored normal
    if src.encoding != "ascii":
        end = src.body + n * dtype.itemsize
        rec = np.frombuffer(src.data, dtype=dtype, count=n, offset=src.body).copy()
        for c, name in enumerate("xyz"):
            rec[name] = vertices[:, c]
        if normals is not None:
            for c, name in enumerate(("nx", "ny", "nz")):
                rec[name][good] = normals[good, c]
        return src.data[: src.body] + rec.tobytes() + src.data[end:]
    # ASCII: the vertex element is the first n lines after the header
    names = list(dtype.names)
    cols = {name: names.index(name) for name in ("x", "y", "z")}
    ncols = {}
    if normals is not None:
        ncols = {name: names.index(name) for name in ("nx", "ny", "nz")}
    text = src.data[src.body :]
    lines = text.split(b"\n", n)
    if len(lines) < n:
        return trimesh_export(vertices, doc.faces, "ply", encoding="ascii")
    rows = vertices.tolist()
    nrows = normals.tolist() if normals is not None else None
    out = []
    for i in range(n):
        line = lines[i]
        cr = line.endswith(b"\r")
        words = line.split()
        for c, name in enumerate("xyz"):
            words[cols[name]] = repr(rows[i][c]).encode()
        if nrows is not None and good[i]:
            for c, name in enumerate(("nx", "ny", "nz")):
                words[ncols[name]] = ("%.7g" % nrows[i][c]).encode()
        out.append(b" ".join(words) + (b"\r" if cr else b""))
    rest = lines[n:] if len(lines) > n else []
    return src.data[: src.body] + b"\n".join(out + rest)
