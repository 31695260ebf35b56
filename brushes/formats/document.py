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

__all__ = ["MeshError", "MeshDoc", "MeshPart"]


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
        follow each ``g`` line) and a glTF's meshes (by mesh or node name).
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
        return cls(v, f, None, None, uv, "absent", (MeshPart("mesh", 0, len(v)),))
