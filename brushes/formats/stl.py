"""STL files: one facet per face, binary or ASCII as the source was.

STL stores each triangle's corners separately. Here the vertices are the distinct corner
positions (merged by exact equality), numbered in order of first appearance while reading
the facets in file order; ``faces`` are the facets in file order. Writing emits one facet
per face in the same order with recomputed facet normals, binary or ASCII as the source was,
keeping a binary file's 80-byte header and per-facet attribute bytes (an ASCII file with
several solids is written back as one solid, named after the first). Reading the written
file again gives the same vertex order, unless posing made two distinct vertices coincide.
"""
from __future__ import annotations

import os
import struct
from dataclasses import dataclass

import numpy as np

from brushes import surface

from ._parsing import trimesh_load
from .document import MeshDoc, MeshError, MeshPart, Polygons

__all__ = ["load", "save", "export"]


@dataclass
class _StlSource:
    binary: bool
    header: bytes
    attributes: np.ndarray | None  # (m,) uint16 per facet (binary)
    name: str


def load(path, data: bytes) -> MeshDoc:
    """Read STL bytes, binary or ASCII (``path`` names the file in errors)."""
    m = trimesh_load(path, data, "stl")
    corners = np.asarray(m.vertices, dtype=np.float64)[np.asarray(m.faces, dtype=np.int64)]
    corners = corners.reshape(-1, 3)
    # distinct positions, numbered by first appearance in facet order
    uniq, first, inverse = np.unique(corners, axis=0, return_index=True, return_inverse=True)
    inverse = inverse.reshape(-1)
    rank = np.empty(len(uniq), np.int64)
    order = np.argsort(first, kind="stable")
    rank[order] = np.arange(len(uniq))
    vertices = corners[first[order]].copy()
    faces = rank[inverse].reshape(-1, 3)
    count = struct.unpack("<I", data[80:84])[0] if len(data) >= 84 else -1
    binary = len(data) == 84 + 50 * count
    attributes = None
    header = data[:80] if binary else b""
    sname = ""
    if binary:
        if count != len(faces):
            raise MeshError(f"{path}: STL facet count {count} does not match {len(faces)} read")
        rec = np.frombuffer(data, dtype=np.dtype([("f", "<f4", (12,)), ("a", "<u2")]),
                            count=count, offset=84)
        attributes = rec["a"].copy()
    else:
        first_line = data.split(b"\n", 1)[0].decode("latin-1").strip()
        sname = first_line[5:].strip() if first_line.lower().startswith("solid") else ""
    name = os.path.splitext(os.path.basename(os.fspath(path)))[0]
    return MeshDoc(vertices, faces, os.fspath(path), "stl", None, "absent",
                   (MeshPart(name, 0, len(vertices)),), _StlSource(binary, header, attributes, sname),
                   polygons=Polygons.from_triangles(faces))


def _facet_normals(vertices, faces):
    """Unit facet normals (m, 3) float64; zero for a facet with no area."""
    n = surface.face_cross_products(vertices, faces)
    norm = np.linalg.norm(n, axis=1, keepdims=True)
    return np.where(norm > 0, n / np.where(norm > 0, norm, 1), 0.0)


def save(doc: MeshDoc, vertices) -> bytes:
    """One facet per face in the source's order and encoding, with recomputed facet normals."""
    src: _StlSource = doc._source
    tris = vertices[doc.faces]
    normals = _facet_normals(vertices, doc.faces)
    m = len(tris)
    if src.binary:
        rec = np.zeros(m, dtype=np.dtype([("n", "<f4", (3,)), ("v", "<f4", (3, 3)), ("a", "<u2")]))
        rec["n"] = normals
        rec["v"] = tris
        rec["a"] = src.attributes
        return src.header + struct.pack("<I", m) + rec.tobytes()
    block = np.concatenate([normals, tris.reshape(m, 9)], axis=1)
    facet = ("facet normal %.7g %.7g %.7g\n outer loop\n  vertex %r %r %r\n"
             "  vertex %r %r %r\n  vertex %r %r %r\n endloop\nendfacet\n")
    body = (facet * m) % tuple(block.ravel().tolist())
    return f"solid {src.name}\n{body}endsolid {src.name}\n".encode("latin-1")


def export(vertices, polys: Polygons) -> bytes:
    """A new binary STL: one facet per fan triangle of the polygons, with its unit normal."""
    faces = polys.corners[polys.fan_triangles()] if len(polys.corners) else np.zeros((0, 3), np.int64)
    vertices = np.asarray(vertices, np.float64)
    m = len(faces)
    rec = np.zeros(m, dtype=np.dtype([("n", "<f4", (3,)), ("v", "<f4", (3, 3)), ("a", "<u2")]))
    rec["n"] = _facet_normals(vertices, faces)
    rec["v"] = vertices[faces]
    header = b"pliant binary STL".ljust(80, b" ")
    return header + struct.pack("<I", m) + rec.tobytes()
