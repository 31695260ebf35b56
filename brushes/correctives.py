"""Corrective shapes (morph targets): per-vertex offsets from a rest mesh to a posed one.

Two outputs, chosen by the file extension given to :func:`write_delta`:

``.npz``
    pliant's own small layout (numpy ``savez``, written atomically):

    ========== ============ =====================================================
    key        dtype        meaning
    ========== ============ =====================================================
    format     str          ``"pliant-corrective"``
    version    int64        ``1``
    deltas     float32      (n, 3) posed minus rest positions
    count      int64        n, the rest mesh's vertex count
    checksum   str          hex SHA-256 of the rest positions as (n, 3) float64,
                            little-endian, C order
    ========== ============ =====================================================

    :func:`apply_delta` adds the deltas to a rest mesh after checking its vertex count and
    checksum, so offsets are never applied to a different mesh or vertex order.
``.glb`` / ``.gltf``
    A glTF 2.0 file holding the rest mesh (POSITION, triangle indices and TEXCOORD_0 when the
    rest has per-vertex texture coordinates) with the posed shape as one morph target: target
    POSITION holds the offsets, ``mesh.extras.targetNames`` names it and ``mesh.weights`` gives
    its default weight. The target is stored sparse (only the moved vertices' indices and
    offsets) when that is smaller than one offset per vertex, and as an accessor with no data
    (all zeros, as glTF 2.0 defines it) when nothing moved. Every POSITION accessor has
    ``min``/``max``. A ``.gltf`` embeds its buffer as a base64 data URI, so the output is a
    single file written atomically.
``.usd`` / ``.usda`` / ``.usdc`` (OpenUSD)
    UsdSkel ``BlendShape`` prims bound to the rest meshes, see
    :func:`brushes.formats.usd.write_blend_shapes`.
"""

from __future__ import annotations

import hashlib
import io
import os

import numpy as np

from . import checks
from .atomic import atomic_write
from .formats import MeshDoc
from .formats import gltf as gltf_format

__all__ = ["write_delta", "apply_delta", "rest_checksum", "FORMAT_TAG", "FORMAT_VERSION"]

FORMAT_TAG = "pliant-corrective"
FORMAT_VERSION = 1


def rest_checksum(rest_vertices) -> str:
    """Hex SHA-256 of rest positions as (n, 3) float64, little-endian, C order.

    Parameters
    ----------
    rest_vertices : (n, 3) float
    """
    v = checks.points("rest_vertices", rest_vertices)
    return hashlib.sha256(np.ascontiguousarray(v, dtype="<f8").tobytes()).hexdigest()


def write_delta(path, rest: MeshDoc, posed_vertices, *, name: str = "corrective",
                weight: float = 0.0) -> None:
    """Write the corrective shape taking ``rest`` to ``posed_vertices``.

    Parameters
    ----------
    path : str or os.PathLike
        ``.npz``, ``.glb``, ``.gltf``, ``.usd``, ``.usda`` or ``.usdc``.
    rest : MeshDoc
        The rest mesh (its ``vertices``, ``faces`` and ``uv`` are used).
    posed_vertices : (n, 3) float
        Posed positions in the rest's vertex order.
    name : str, keyword-only
        Morph target name (glTF ``mesh.extras.targetNames``; stored in the npz as well).
    weight : float, keyword-only
        Default morph weight written to glTF ``mesh.weights`` (0 shows the rest shape).

    Raises
    ------
    ValueError
        Vertex counts differ, positions are not finite, or the extension is unknown.
    """
    if not isinstance(rest, MeshDoc):
        raise checks.FieldError("rest", f"must be a MeshDoc, got {type(rest).__name__}")
    r = checks.points("rest", rest.vertices)
    p = checks.points("posed_vertices", posed_vertices, rows=len(r))
    if not isinstance(name, str) or not name:
        raise checks.FieldError("name", f"must be a non-empty string, got {name!r}")
    weight = checks.number("weight", weight)
    ext = os.path.splitext(os.fspath(path))[1].lower()
    deltas = (p - r).astype(np.float32)
    if ext == ".npz":
        buf = io.BytesIO()
        np.savez(
            buf,
            format=np.array(FORMAT_TAG),
            version=np.array(FORMAT_VERSION, np.int64),
            deltas=deltas,
            count=np.array(len(r), np.int64),
            checksum=np.array(rest_checksum(r)),
            name=np.array(name),
        )
        data = buf.getvalue()
    elif ext in (".glb", ".gltf"):
        data = _gltf_bytes(r, rest.faces, rest.uv, deltas, name, weight, glb=ext == ".glb")
    elif ext in (".usd", ".usda", ".usdc"):
        from .formats import usd

        usd.write_blend_shapes(path, rest, p, name=name, weight=weight)
        return
    else:
        raise checks.FieldError("path", "extension must be .npz, .glb, .gltf, .usd, .usda or "
                                f".usdc, got {ext or 'none'!r}")
    with atomic_write(path) as f:
        f.write(data)


def apply_delta(rest_vertices, path) -> np.ndarray:
    """Add the corrective shape stored at ``path`` (``.npz``) to ``rest_vertices``.

    Parameters
    ----------
    rest_vertices : (n, 3) float
        Must be the same rest positions the file was made from.
    path : str or os.PathLike

    Returns
    -------
    (n, 3) float64
        ``rest_vertices + deltas``.

    Raises
    ------
    ValueError
        Not a pliant corrective file, or a different vertex count or checksum.
    """
    r = checks.points("rest_vertices", rest_vertices)
    try:
        with np.load(path, allow_pickle=False) as z:
            fields = {k: z[k] for k in z.files}
    except FileNotFoundError:
        raise checks.FieldError("path", f"{path}: no such file") from None
    except (OSError, ValueError, EOFError) as exc:
        raise checks.FieldError("path", f"{path}: not a corrective .npz file ({exc})") from None
    if str(fields.get("format", "")) != FORMAT_TAG:
        raise checks.FieldError("path", f"{path}: not a pliant corrective file (format tag missing)")
    version = int(fields.get("version", -1))
    if version != FORMAT_VERSION:
        raise checks.FieldError("path", f"{path}: corrective format version {version} is not supported")
    count = int(fields["count"])
    deltas = np.asarray(fields["deltas"])
    if deltas.shape != (count, 3):
        raise checks.FieldError("path", f"{path}: deltas have shape {deltas.shape}, expected ({count}, 3)")
    if len(r) != count:
        raise checks.FieldError(
            "rest_vertices", f"has {len(r)} vertices but {path} was made for {count}"
        )
    if rest_checksum(r) != str(fields["checksum"]):
        raise checks.FieldError(
            "rest_vertices", f"checksum differs from the rest mesh {path} was made from "
            "(different positions or vertex order)"
        )
    return r + deltas.astype(np.float64)


# --------------------------------------------------------------------------- glTF writer

_ARRAY_BUFFER = 34962
_ELEMENT_ARRAY_BUFFER = 34963
_FLOAT = 5126
_UINT16 = 5123
_UINT32 = 5125


def _gltf_bytes(rest, faces, uv, deltas, name, weight, *, glb):
    """glTF 2.0 JSON (+ GLB container) for one mesh with one morph target."""
    pos = rest.astype(np.float32)
    buf = gltf_format.BufferBuilder()

    attributes = {"POSITION": buf.add(pos, "VEC3", _FLOAT, target=_ARRAY_BUFFER, bounds=True)}
    if uv is not None:
        uv = np.asarray(uv, np.float64)
        uv = np.stack([uv[:, 0], 1.0 - uv[:, 1]], axis=1)  # glTF's texture origin is top left
        attributes["TEXCOORD_0"] = buf.add(uv.astype(np.float32), "VEC2", _FLOAT, target=_ARRAY_BUFFER)
    target = {"POSITION": _target_accessor(deltas, buf)}
    primitive = {"attributes": attributes, "targets": [target]}
    faces = np.asarray(faces, np.int64).reshape(-1, 3)
    if len(faces):
        if len(pos) <= 65535:
            idx = faces.astype(np.uint16).ravel()
            ctype = _UINT16
        else:
            idx = faces.astype(np.uint32).ravel()
            ctype = _UINT32
        primitive["indices"] = buf.add(idx, "SCALAR", ctype, target=_ELEMENT_ARRAY_BUFFER)
        primitive["mode"] = 4
    else:
        primitive["mode"] = 0  # points
    binary = buf.binary()
    gltf = {
        "asset": {"version": "2.0", "generator": "pliant corrective shape"},
        "scene": 0,
        "scenes": [{"nodes": [0]}],
        "nodes": [{"name": name, "mesh": 0}],
        "meshes": [{"name": name, "primitives": [primitive], "weights": [weight],
                    "extras": {"targetNames": [name]}}],
        "accessors": buf.accessors,
        "bufferViews": buf.views,
        "buffers": [{"byteLength": len(binary)}],
    }
    return gltf_format.container(gltf, binary, glb=glb)


def _target_accessor(deltas, buf):
    """The morph target's POSITION accessor: dense, sparse (moved vertices only) when that is
    smaller, or no data at all (zeros) when nothing moved. Returns its index."""
    n = len(deltas)
    moved = np.flatnonzero(np.any(deltas != 0, axis=1))
    k = len(moved)
    index_size = 2 if n <= 65535 else 4
    if k == 0:
        buf.accessors.append({"componentType": _FLOAT, "count": n, "type": "VEC3",
                              "min": [0.0, 0.0, 0.0], "max": [0.0, 0.0, 0.0]})
        return len(buf.accessors) - 1
    if k * (index_size + 12) >= n * 12:
        return buf.add(deltas, "VEC3", _FLOAT, target=_ARRAY_BUFFER, bounds=True)
    values = deltas[moved]
    idx = moved.astype(np.uint16 if index_size == 2 else np.uint32)
    i_acc = buf.add(idx, "SCALAR", _UINT16 if index_size == 2 else _UINT32)
    v_acc = buf.add(values, "VEC3", _FLOAT)
    # the two helper accessors become the sparse parts of one accessor (their views stay)
    accessors = buf.accessors
    i_view, v_view = accessors[i_acc]["bufferView"], accessors[v_acc]["bufferView"]
    del accessors[v_acc], accessors[i_acc]
    lo = np.minimum(values.min(axis=0), 0.0) if k < n else values.min(axis=0)
    hi = np.maximum(values.max(axis=0), 0.0) if k < n else values.max(axis=0)
    accessors.append({"componentType": _FLOAT, "count": n, "type": "VEC3",
                      "min": [float(x) for x in lo], "max": [float(x) for x in hi],
                      "sparse": {"count": k,
                                 "indices": {"bufferView": i_view,
                                             "componentType": _UINT16 if index_size == 2 else _UINT32},
                                 "values": {"bufferView": v_view}}})
    return len(accessors) - 1
