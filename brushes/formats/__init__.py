"""Mesh files in and out (OBJ, PLY, STL, OFF, GLB/glTF), keeping each file's own structure.

Posing moves vertices and nothing else, so a posed file keeps its source's vertex order, face
corners, texture coordinates, groups and materials; only positions change, and normals are
recomputed where the file stores them. :func:`load_mesh` returns a :class:`MeshDoc` holding the
world-space positions, a fan-triangulated face list (for quality reports and viewing) and what
it needs to write the file back; :func:`save_mesh` writes it (atomically) with new positions.

One module per format (``obj``, ``ply``, ``stl``, ``off``, ``gltf``), each with ``load`` and
``save`` and a docstring saying what it keeps; ``document`` holds :class:`MeshDoc`, and
``_parsing`` the bulk byte and line parsing the text formats share. This module picks the
format from the file extension.
"""

from __future__ import annotations

import os
import struct

from brushes import checks
from brushes.atomic import atomic_write

from . import gltf, obj, off, ply, stl
from ._parsing import one_line, trimesh_export
from .document import MeshDoc, MeshError, MeshPart

__all__ = ["MeshError", "MeshDoc", "MeshPart", "load_mesh", "save_mesh", "FORMATS"]

FORMATS = ("obj", "ply", "stl", "off", "glb", "gltf")
_MODULES = {"obj": obj, "ply": ply, "stl": stl, "off": off}


def _read_bytes(path) -> bytes:
    try:
        with open(path, "rb") as f:
            return f.read()
    except FileNotFoundError:
        raise MeshError(f"{path}: no such file") from None
    except IsADirectoryError:
        raise MeshError(f"{path}: is a folder, not a mesh file") from None
    except OSError as exc:
        raise MeshError(f"{path}: cannot read ({one_line(exc)})") from None


def _format_of(path) -> str:
    ext = os.path.splitext(os.fspath(path))[1].lower().lstrip(".")
    if ext not in FORMATS:
        raise MeshError(
            f"{path}: unknown mesh format {('.' + ext) if ext else '(no extension)'} "
            f"(expected one of {', '.join('.' + f for f in FORMATS)})"
        )
    return ext


def load_mesh(path) -> MeshDoc:
    """Read a mesh file (.obj, .ply, .stl, .off, .glb, .gltf).

    Parameters
    ----------
    path : str or os.PathLike

    Returns
    -------
    MeshDoc
        ``vertices`` (n, 3) float64 world positions and ``faces`` (m, 3) int64 triangles.

    Raises
    ------
    MeshError
        Missing, unreadable, empty or malformed files, and structures that cannot be posed
        (e.g. an instanced glTF mesh); the one-line message names the file.
    """
    fmt = _format_of(path)
    data = _read_bytes(path)
    if not data.strip():
        raise MeshError(f"{path}: file is empty")
    try:
        if fmt in ("glb", "gltf"):
            return gltf.load(path, data, fmt)
        return _MODULES[fmt].load(path, data)
    except MeshError:
        raise
    except (ValueError, IndexError, KeyError, TypeError, struct.error, OverflowError) as exc:
        raise MeshError(f"{path}: not a readable {fmt.upper()} file ({one_line(exc)})") from None


def save_mesh(doc: MeshDoc, path, vertices=None) -> None:
    """Write ``doc`` to ``path`` in its source's format, with ``vertices`` as the new positions.

    The file is written atomically (temporary file, then rename). Only positions (and stored
    normals) change; see each format module's docstring for what it keeps.

    Parameters
    ----------
    doc : MeshDoc
        From :func:`load_mesh` (or :meth:`MeshDoc.from_arrays`, written in any format).
    path : str or os.PathLike
        Target; its extension must be the source's format.
    vertices : (n, 3) float, optional
        New world-space positions in ``doc``'s vertex order (default ``doc.vertices``).

    Raises
    ------
    ValueError
        ``vertices`` of the wrong shape or not finite.
    MeshError
        ``path`` has another format than the source.
    """
    if not isinstance(doc, MeshDoc):
        raise checks.FieldError("doc", f"must be a MeshDoc, got {type(doc).__name__}")
    v = checks.points("vertices", doc.vertices if vertices is None else vertices, rows=len(doc.vertices))
    fmt = _format_of(path)
    if doc.format is None:
        if fmt == "obj":
            files = {os.fspath(path): obj.export_plain(doc, v)}
        elif fmt == "gltf":
            files = {os.fspath(path): gltf.export_plain(doc, v)}
        else:
            files = {os.fspath(path): trimesh_export(v, doc.faces, fmt)}
    elif fmt != doc.format:
        raise MeshError(
            f"{path}: cannot write a mesh read from {doc.format.upper()} as {fmt.upper()} "
            f"without losing its structure; save it with the .{doc.format} extension"
        )
    elif fmt in ("glb", "gltf"):
        files = gltf.save(doc, v, path, fmt)
    else:
        files = {os.fspath(path): _MODULES[fmt].save(doc, v)}
    # side files first, the main file last: a reader never sees a main file without its buffers
    main = os.fspath(path)
    for name, data in files.items():
        if name != main:
            with atomic_write(name) as f:
                f.write(data)
    with atomic_write(main) as f:
        f.write(files[main])
