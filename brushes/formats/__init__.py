"""Mesh files in and out (OBJ, PLY, STL, OFF, GLB/glTF), keeping each file's own structure.

Posing moves vertices and nothing else, so a posed file keeps its source's vertex order, face
corners, texture coordinates, groups and materials; only positions change, and normals are
recomputed where the file stores them. :func:`load_mesh` returns a :class:`MeshDoc` holding the
world-space positions, a fan-triangulated face list (for quality reports and viewing) and what
it needs to write the file back; :func:`save_mesh` writes it (atomically) with new positions.

One module per format (``obj``, ``ply``, ``stl``, ``off``, ``gltf``, ``usd``), each with
``load``, ``save`` and ``export`` and a docstring saying what it keeps; ``document`` holds
:class:`MeshDoc`, ``convert`` the conversions between formats, and ``_parsing`` the bulk byte
and line parsing the text formats share. This module picks the format from the file extension.
"""

from __future__ import annotations

import os
import struct

from brushes import checks
from brushes.atomic import atomic_write

from . import gltf, obj, off, ply, stl, usd
from ._parsing import one_line
from .convert import Written, convert
from .document import MeshDoc, MeshError, MeshPart, Polygons

__all__ = ["MeshError", "MeshDoc", "MeshPart", "Polygons", "Written", "load_mesh", "save_mesh",
           "FORMATS"]

FORMATS = ("obj", "ply", "stl", "off", "glb", "gltf", "usd", "usda", "usdc")
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
        if fmt in usd.EXTENSIONS:
            return usd.load(path, data)
        return _MODULES[fmt].load(path, data)
    except MeshError:
        raise
    except (ValueError, IndexError, KeyError, TypeError, struct.error, OverflowError) as exc:
        raise MeshError(f"{path}: not a readable {fmt.upper()} file ({one_line(exc)})") from None


def save_mesh(doc: MeshDoc, path, vertices=None) -> Written:
    """Write ``doc`` to ``path`` with ``vertices`` as the new positions; returns a :class:`Written`.

    In the source's own format (``.usd``, ``.usda`` and ``.usdc`` count as one) only positions
    and stored normals change; see each format module's docstring for what it keeps. In another
    format the file is converted (:mod:`brushes.formats.convert`): everything the target can
    hold is kept, and ``Written.dropped`` lists the rest. Files are written atomically
    (temporary file, then rename).

    Parameters
    ----------
    doc : MeshDoc
        From :func:`load_mesh` or :meth:`MeshDoc.from_arrays`.
    path : str or os.PathLike
        Target; its extension picks the format.
    vertices : (n, 3) float, optional
        New world-space positions in ``doc``'s vertex order (default ``doc.vertices``).

    Raises
    ------
    ValueError
        ``vertices`` of the wrong shape or not finite (``FieldError`` naming ``vertices``).
    MeshError
        The target cannot be written (for example a polygon too large for a PLY face list).
    """
    if not isinstance(doc, MeshDoc):
        raise checks.FieldError("doc", f"must be a MeshDoc, got {type(doc).__name__}")
    v = checks.points("vertices", doc.vertices if vertices is None else vertices, rows=len(doc.vertices))
    fmt = _format_of(path)
    same = doc.format is not None and (fmt == doc.format or (fmt in usd.EXTENSIONS
                                                             and doc.format in usd.EXTENSIONS))
    written = Written()
    if not same:
        files, written = convert(doc, v, path)
    elif fmt in usd.EXTENSIONS:
        usd.save(doc, v, path)
        return written
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
    return written
