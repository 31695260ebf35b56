"""The mesh document: positions, triangles and what a format needs to write its file back.

:class:`MeshDoc` is what :func:`brushes.formats.load_mesh` returns and
:func:`brushes.formats.save_mesh` writes. Each format module keeps its own private record of the
source file in ``MeshDoc._source``; the fields here are the same for every format.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np

from brushes import checks

__all__ = ["MeshError", "MeshDoc", "MeshPart", "Polygons"]


class MeshError(ValueError):
    """A mesh file is missing, unreadable, malformed or has a structure that cannot be posed."""


class MeshPart(NamedTuple):
    """A named slice ``vertices[start:stop]`` of a document (one per glTF node mesh)."""

    name: str
    start: int
    stop: int
    node: int | None = None
    mesh: int | None = None


@dataclass(eq=False)
class Polygons:
    """A mesh's polygons with what a conversion to another format carries.

    Attributes
    ----------
    counts : (p,) int64
        Corners of each polygon (3 or more), in file order.
    corners : (c,) int64
        Vertex index of each corner, polygon after polygon (c = counts.sum()).
    uv, uv_index : (k, 2) float64 and (c,) int64, or None
        Texture coordinates and the row each corner uses (an OBJ's ``vt`` indices, or the
        vertex index itself when the file stores one per vertex).
    normals, normal_index : (l, 3) float64 and (c,) int64, or None
        Normals and the row each corner uses.
    groups : dict of str -> (q,) int64
        Named polygon groups (OBJ ``g``, glTF node or mesh names, USD prim names and
        GeomSubsets, PLY ``group`` face property); a polygon may be in several or none.
    materials : tuple of str
        Material names.
    material_index : (p,) int64 or None
        Row of ``materials`` per polygon, -1 for none.
    """

    counts: np.ndarray
    corners: np.ndarray
    uv: np.ndarray | None = None
    uv_index: np.ndarray | None = None
    normals: np.ndarray | None = None
    normal_index: np.ndarray | None = None
    groups: dict = field(default_factory=dict)
    materials: tuple = ()
    material_index: np.ndarray | None = None

    @classmethod
    def from_triangles(cls, faces, **kwargs) -> "Polygons":
        """Polygons that are the (m, 3) triangles ``faces``."""
        f = np.asarray(faces, np.int64).reshape(-1, 3)
        return cls(np.full(len(f), 3, np.int64), f.reshape(-1), **kwargs)

    @property
    def triangle_polygon(self) -> np.ndarray:
        """(t,) int64: the polygon each fan triangle of :func:`fan_triangles` comes from."""
        return np.repeat(np.arange(len(self.counts)), np.maximum(self.counts - 2, 0))

    def fan_triangles(self) -> np.ndarray:
        """(t, 3) int64 corner positions (indices into ``corners``) of the fan triangles."""
        counts = np.asarray(self.counts, np.int64)
        off = np.cumsum(counts) - counts
        ntri = np.maximum(counts - 2, 0)
        poly = np.repeat(np.arange(len(counts)), ntri)
        j = np.arange(int(ntri.sum())) - np.repeat(np.cumsum(ntri) - ntri, ntri) + 1
        base = off[poly]
        return np.stack([base, base + j, base + j + 1], axis=1)

    def vertex_groups(self) -> dict:
        """{name: sorted vertex indices of the polygons in the group}."""
        if not self.groups:
            return {}
        start = np.cumsum(self.counts) - self.counts
        out = {}
        for name, polys in self.groups.items():
            polys = np.asarray(polys, np.int64)
            idx = np.repeat(start[polys], self.counts[polys]) + (
                np.arange(int(self.counts[polys].sum()))
                - np.repeat(np.cumsum(self.counts[polys]) - self.counts[polys], self.counts[polys]))
            out[name] = np.unique(self.corners[idx]).astype(np.int64)
        return out


@dataclass(eq=False)
class MeshDoc:
    """A mesh as read from a file, with what is needed to write that file back.

    Attributes
    ----------
    vertices : (n, 3) float64
        World-space positions, in the file's own vertex order.
    faces : (m, 3) int64
        Triangles (polygons fan-triangulated), indices into ``vertices``.
    path : str or None
        The file read (None for a document made with :meth:`from_arrays`).
    format : str or None
        One of :data:`FORMATS` (None for :meth:`from_arrays`).
    uv : (n, 2) float64 or None
        Per-vertex texture coordinates when the file has exactly one per vertex, else None
        (an OBJ with texture seams keeps its ``vt`` lines on save but has ``uv`` None).
    normals_on_save : str
        ``"absent"`` (file has no normals), ``"recomputed"`` or ``"kept"`` (left as stored).
    parts : tuple of MeshPart
        Named vertex slices; one part for single-mesh formats.
    groups : dict of str -> (k,) int64
        Named vertex groups, for masks: an OBJ's ``g`` groups (the vertices of the faces that
        follow each ``g`` line), a glTF's meshes (by mesh or node name), a USD stage's mesh
        prim names and GeomSubsets.
    polygons : Polygons or None
        The polygons with texture coordinates, normals, groups and materials, as a conversion
        to another format carries them (None for documents made from arrays).
    unconverted : tuple of str
        Things in the source file that no conversion carries (``"vertex colours"``, ...),
        for the list of what a conversion drops.
    source_vertex : (n,) int64 or None
        For a file pliant wrote by converting another one with vertices split at texture
        seams: the source vertex each vertex came from (so corrective shapes map back).
    """

    vertices: np.ndarray
    faces: np.ndarray
    path: str | None
    format: str | None
    uv: np.ndarray | None = None
    normals_on_save: str = "absent"
    parts: tuple = ()
    _source: object = field(default=None, repr=False)
    groups: dict = field(default_factory=dict)
    polygons: Polygons | None = None
    unconverted: tuple = ()
    source_vertex: np.ndarray | None = None

    @property
    def polygon_count(self) -> int:
        """Polygons in the file (triangles for formats that store only triangles)."""
        return len(self.faces) if self.polygons is None else len(self.polygons.counts)

    @classmethod
    def from_arrays(cls, vertices, faces, *, uv=None) -> "MeshDoc":
        """A document with no source file; :func:`save_mesh` writes it in any format.

        Parameters
        ----------
        vertices : (n, 3) float
        faces : (m, 3) int
        uv : (n, 2) float, optional
        """
        v = checks.points("vertices", vertices)
        f = np.asarray(faces)
        if f.size == 0:
            f = np.zeros((0, 3), np.int64)
        f = checks.faces("faces", f, len(v))
        if uv is not None:
            uv = np.asarray(uv, dtype=np.float64)
            if uv.shape != (len(v), 2):
                raise checks.FieldError("uv", f"must have shape ({len(v)}, 2), got {uv.shape}")
        polys = Polygons.from_triangles(f, uv=uv, uv_index=None if uv is None else f.reshape(-1))
        return cls(v, f, None, None, uv, "absent", (MeshPart("mesh", 0, len(v)),),
                   polygons=polys)
