"""Conversions between mesh formats: keep what the target can hold, say what it cannot.

A conversion writes a new file from the source document's :class:`Polygons` (positions,
polygons, texture coordinates, normals, named groups and materials). What each target holds:

========  =========  ======================  =======  ====================  ====================
target    polygons   texture coords/normals  groups   materials             vertex order
========  =========  ======================  =======  ====================  ====================
OBJ       yes        yes (indexed)           ``g``    ``usemtl`` names      kept
USD       yes        yes (indexed primvars)  subsets  bound Material prims  kept
PLY       yes        per vertex              ``group`` face property        split at seams
glTF/GLB  triangles  per vertex              nodes    material names        split at seams
OFF       yes        no                      no       no                    kept
STL       triangles  no                      no       no                    facet corners
========  =========  ======================  =======  ====================  ====================

Per-vertex targets split a vertex only where its corners disagree (a texture seam or a hard
normal edge) and record the source vertex of each written vertex (PLY property
``source_vertex``, glTF attribute ``_SOURCE_VERTEX``), so a corrective shape made from the
converted file maps back to the source's vertices. :func:`convert` returns, besides the file
bytes, a :class:`Written` whose :meth:`Written.summary` is the one line the command prints.
"""
from __future__ import annotations

import os
from typing import NamedTuple

import numpy as np

from .document import MeshDoc, Polygons

__all__ = ["Written", "convert", "split_vertices", "CAPABILITIES"]

# what each target holds: polygons (else triangles), indexed uv/normals (else per vertex or none)
CAPABILITIES = {
    "obj": {"polygons": True, "attributes": "indexed", "groups": True, "materials": True},
    "usd": {"polygons": True, "attributes": "indexed", "groups": True, "materials": True},
    "ply": {"polygons": True, "attributes": "vertex", "groups": True, "materials": True},
    "glb": {"polygons": False, "attributes": "vertex", "groups": True, "materials": True},
    "gltf": {"polygons": False, "attributes": "vertex", "groups": True, "materials": True},
    "off": {"polygons": True, "attributes": None, "groups": False, "materials": False},
    "stl": {"polygons": False, "attributes": None, "groups": False, "materials": False},
}
_USD = ("usd", "usda", "usdc")


class Written(NamedTuple):
    """What a save did: ``converted`` (source and target format names) or None, the
    ``dropped`` items (plain words), and the vertex counts before and after any split."""

    converted: tuple | None = None
    dropped: tuple = ()
    vertices: tuple | None = None

    def summary(self) -> str:
        """One line: ``converted OBJ to GLB; vertices split ...; not kept: ...``."""
        if self.converted is None:
            return "same format: only positions (and stored normals) changed"
        source, target = self.converted
        parts = [f"wrote {target.upper()}" if source == "arrays"
                 else f"converted {source.upper()} to {target.upper()}"]
        if self.vertices and self.vertices[0] != self.vertices[1]:
            parts.append(f"vertices {self.vertices[0]} -> {self.vertices[1]} (split where texture "
                         "coordinates, normals or groups differ; each keeps its source vertex)")
        parts.append("not kept: " + ", ".join(self.dropped) if self.dropped else "nothing dropped")
        return "; ".join(parts)


def split_vertices(vertices, polys: Polygons, *, uv=True, normals=True):
    """One vertex per distinct (vertex, texture coordinate, normal) corner combination.

    vertices : (n, 3) float; polys : :class:`Polygons`; uv, normals : bool, whether to carry them.
    Returns (vertices (n', 3) float64, Polygons with per-vertex uv/normals, source (n',) int64),
    where ``source[i]`` is the input vertex that vertex i copies. Vertices that no polygon uses
    are kept once. The order follows the input vertices; the copies of one vertex are adjacent.
    """
    vertices = np.asarray(vertices, np.float64)
    n = len(vertices)
    carry_uv = uv and polys.uv is not None
    carry_n = normals and polys.normals is not None
    c = len(polys.corners)
    key = np.stack([polys.corners,
                    polys.uv_index if carry_uv else np.full(c, -1, np.int64),
                    polys.normal_index if carry_n else np.full(c, -1, np.int64)], axis=1)
    unused = np.setdiff1d(np.arange(n), polys.corners)
    key = np.concatenate([key, np.stack([unused, np.full(len(unused), -1),
                                         np.full(len(unused), -1)], axis=1)])
    rows, inverse = np.unique(key, axis=0, return_inverse=True)
    inverse = inverse.reshape(-1)
    source = rows[:, 0].astype(np.int64)
    out = Polygons(polys.counts.copy(), inverse[:c].astype(np.int64), groups=dict(polys.groups),
                   materials=polys.materials, material_index=polys.material_index)
    if carry_uv:
        uvs = np.zeros((len(rows), 2))
        has = rows[:, 1] >= 0
        uvs[has] = np.asarray(polys.uv, np.float64)[rows[has, 1]]
        out.uv, out.uv_index = uvs, out.corners
    if carry_n:
        ns = np.zeros((len(rows), 3))
        has = rows[:, 2] >= 0
        ns[has] = np.asarray(polys.normals, np.float64)[rows[has, 2]]
        out.normals, out.normal_index = ns, out.corners
    return vertices[source], out, source


def _target_of(path) -> str:
    ext = os.path.splitext(os.fspath(path))[1].lower().lstrip(".")
    return "usd" if ext in _USD else ext


def convert(doc: MeshDoc, vertices, path):
    """Bytes of ``path`` (its extension picks the format) written from ``doc`` posed at
    ``vertices``, and the :class:`Written` record. Returns ({path: bytes}, Written).

    vertices : (n, 3) float64 in ``doc``'s vertex order (world space).
    """
    from . import gltf, obj, off, ply, stl

    fmt = os.path.splitext(os.fspath(path))[1].lower().lstrip(".")
    target = _target_of(path)
    caps = CAPABILITIES[target]
    polys = doc.polygons if doc.polygons is not None else Polygons.from_triangles(doc.faces)
    dropped = []
    attrs = caps["attributes"]
    if attrs is None:
        if polys.uv is not None:
            dropped.append("texture coordinates")
        if polys.normals is not None:
            dropped.append("normals")
    if polys.groups and not caps["groups"]:
        dropped.append("groups (" + ", ".join(polys.groups) + ")")
    elif polys.groups and target in ("ply", "glb", "gltf"):
        multi = _multi_membership(polys)
        if multi:
            dropped.append(f"membership of {multi} polygons in more than one group "
                           "(each keeps its first)")
    if polys.materials and not caps["materials"]:
        dropped.append("materials (" + ", ".join(polys.materials) + ")")
    if not caps["polygons"] and np.any(polys.counts > 3):
        dropped.append(f"polygons ({len(polys.counts)} polygons written as "
                       f"{int(np.maximum(polys.counts - 2, 0).sum())} triangles)")
    if doc.format in ("glb", "gltf") and len(doc.parts) > 1 and target in ("obj", "ply", "off", "stl"):
        dropped.append("node hierarchy and transforms (meshes written in world space)")
    lost_materials = polys.materials and not caps["materials"]
    dropped.extend(u for u in doc.unconverted
                   if not (lost_materials and u.startswith("material definitions")))
    name = os.path.splitext(os.path.basename(os.fspath(path)))[0] or "mesh"
    n_before = len(vertices)
    out_vertices, source = vertices, None
    if attrs == "vertex":
        out_vertices, polys, source = split_vertices(vertices, polys)
        if doc.source_vertex is not None:
            source = doc.source_vertex[source]  # a split of a split still names the first source
        elif np.array_equal(source, np.arange(n_before)):
            source = None
    elif attrs is None:
        polys = Polygons(polys.counts, polys.corners)
    if target == "obj":
        data = obj.export(out_vertices, polys)
    elif target == "ply":
        data = ply.export(out_vertices, polys, source_vertex=source)
    elif target in ("glb", "gltf"):
        if source is None and (len(polys.groups) > 1
                               or len(np.unique(polys.corners)) < len(out_vertices)):
            source = np.arange(len(out_vertices))  # nodes hold their own vertices: keep the map
        data, n_written = gltf.export(out_vertices, polys, glb=target == "glb",
                                      source_vertex=source, name=name)
    elif target == "off":
        data = off.export(out_vertices, polys)
    elif target == "stl":
        data = stl.export(out_vertices, polys)
    else:
        from . import usd

        data = usd.export(out_vertices, polys, path=path, name=name)
    if target not in ("glb", "gltf"):
        n_written = len(out_vertices)
    written = Written((doc.format or "arrays", fmt), tuple(dropped), (n_before, n_written))
    return {os.fspath(path): data}, written


def _multi_membership(polys) -> int:
    seen = np.zeros(len(polys.counts), np.int64)
    for members in polys.groups.values():
        seen[np.asarray(members, np.int64)] += 1
    return int(np.count_nonzero(seen > 1))
