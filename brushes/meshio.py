"""Mesh files in and out (OBJ, PLY, STL, OFF, GLB/glTF), keeping each file's own structure.

Posing moves vertices and nothing else, so a posed file keeps its source's vertex order, face
corners, texture coordinates, groups and materials; only positions change, and normals are
recomputed where the file stores them. :func:`load_mesh` returns a :class:`MeshDoc` holding the
world-space positions, a fan-triangulated face list (for quality reports and viewing) and what
it needs to write the file back; :func:`save_mesh` writes it (atomically) with new positions.

Per format:

OBJ
    Parsed and written by this module (numpy bulk parsing), never through a loader that splits
    vertices at texture seams: vertex ``i`` is the ``i``-th ``v`` line. Writing changes only the
    ``v`` lines (``v x y z`` plus whatever followed the third number on that line, such as
    ``r g b`` colours, a ``w`` or a comment); every other line is copied byte for byte.
    Negative (relative) indices and polygons are read; faces are fan-triangulated for
    :attr:`MeshDoc.faces` only. ``vn`` lines are recomputed when every ``vn`` is used by the
    corners of a single vertex ("per-vertex consistent", which includes hard edges that give a
    vertex several normals): each such normal becomes the normalised, area-weighted sum of the
    face normals of the corners that use it. When one ``vn`` is shared by several vertices (files
    that deduplicate equal normals), recomputing would need new ``vn`` lines and changed ``f``
    lines, so the ``vn`` lines are kept as they were and ``MeshDoc.normals_on_save`` says
    ``"kept"``.
PLY
    Read through trimesh (``process=False``: no merging or reordering). When the vertex element
    comes first and has only scalar properties (the usual layout), writing patches ``x y z`` (and
    ``nx ny nz``, recomputed) in place and keeps every other byte; otherwise it falls back to
    trimesh's exporter in the source's encoding, which keeps positions, faces and colours only.
    (trimesh's binary PLY reader needs all faces of one size; other files raise MeshError.)
STL
    STL stores each triangle's corners separately. Here the vertices are the distinct corner
    positions (merged by exact equality), numbered in order of first appearance while reading
    the facets in file order; ``faces`` are the facets in file order. Writing emits one facet
    per face in the same order with recomputed facet normals, binary or ASCII as the source was,
    keeping a binary file's 80-byte header and per-facet attribute bytes (an ASCII file with
    several solids is written back as one solid, named after the first). Reading the written
    file again gives the same vertex order, unless posing made two distinct vertices coincide.
OFF
    Read through trimesh (``process=False``); writing rewrites only the vertex lines (keeping
    anything after the third number, e.g. colours) and copies all other bytes.
GLB / glTF
    Parsed and written by this module (JSON and buffers). ``vertices`` are world positions: each
    mesh reached from the default scene is transformed by its node's world matrix, and its
    distinct POSITION accessors are concatenated in scene order; :attr:`MeshDoc.parts` records
    the slices. Writing maps each part back to its node's local space, stores float32 positions
    in the POSITION accessor's bytes (updating its ``min``/``max``) and recomputes NORMAL
    accessors; all other buffer bytes are kept, and the JSON keeps its content (its whitespace
    is re-made). A mesh used by several nodes (instancing) cannot be posed per instance, so it
    is refused with :class:`MeshError`; so are meshes needing geometry-compression extensions
    or sparse/quantized positions. A skinned mesh is taken in its bind space (its node's
    transform is ignored, as glTF 2.0 requires), assuming the file's skeleton is in bind pose.
    Saving a ``.gltf`` with external buffers writes the changed buffers beside the new file as
    ``<name>.bin`` (``<name>_<i>.bin`` when several), atomically.
"""

from __future__ import annotations

import base64
import json
import os
import re
import struct
import urllib.parse
import warnings
from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np

from .atomic import atomic_write

__all__ = ["MeshError", "MeshDoc", "MeshPart", "load_mesh", "save_mesh", "FORMATS"]

FORMATS = ("obj", "ply", "stl", "off", "glb", "gltf")


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
        v = _check_vertices(vertices, "vertices")
        f = np.asarray(faces)
        if f.size == 0:
            f = np.zeros((0, 3), np.int64)
        if f.ndim != 2 or f.shape[1] != 3 or not np.issubdtype(f.dtype, np.integer):
            raise ValueError(f"faces: must be an integer array of shape (m, 3), got {f.shape}")
        f = f.astype(np.int64)
        if len(f) and (f.min() < 0 or f.max() >= len(v)):
            raise ValueError(f"faces: indices must lie in [0, {len(v)}), got [{f.min()}, {f.max()}]")
        if uv is not None:
            uv = np.asarray(uv, dtype=np.float64)
            if uv.shape != (len(v), 2):
                raise ValueError(f"uv: must have shape ({len(v)}, 2), got {uv.shape}")
        return cls(v, f, None, None, uv, "absent", (MeshPart("mesh", 0, len(v)),))


# --------------------------------------------------------------------------- helpers


def _check_vertices(vertices, name: str, n: int | None = None) -> np.ndarray:
    v = np.asarray(vertices, dtype=np.float64)
    if v.ndim != 2 or v.shape[1] != 3:
        raise ValueError(f"{name}: must have shape (n, 3), got {v.shape}")
    if n is not None and len(v) != n:
        raise ValueError(f"{name}: must have shape ({n}, 3) to match the document, got {v.shape}")
    if not np.all(np.isfinite(v)):
        raise ValueError(f"{name}: must be finite (found NaN or infinity)")
    return v


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split()) or type(exc).__name__
    return text if len(text) <= 200 else text[:197] + "..."


def _area_normals(vertices, faces):
    """Face normals scaled by twice the triangle area: (m, 3) float64."""
    v = vertices
    return np.cross(v[faces[:, 1]] - v[faces[:, 0]], v[faces[:, 2]] - v[faces[:, 0]])


def _accumulate(keys, weights, n):
    """Sum rows of ``weights`` (k, 3) into ``n`` bins by ``keys`` (k,)."""
    out = np.empty((n, 3))
    for c in range(3):
        out[:, c] = np.bincount(keys, weights=weights[:, c], minlength=n)[:n]
    return out


def _vertex_normals(vertices, faces, n):
    """Area-weighted unit vertex normals (n, 3); rows with no area are NaN."""
    fn = _area_normals(vertices, faces)
    acc = _accumulate(faces.ravel(), np.repeat(fn, 3, axis=0), n)
    norm = np.linalg.norm(acc, axis=1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(norm > 0, acc / np.where(norm > 0, norm, 1), np.nan)


def _fan(counts, corners):
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


def _split_lines(data: bytes):
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


def _gather(buf, starts, ends, lines):
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


class _Tokens(NamedTuple):
    starts: np.ndarray  # (t,) token start positions in the blob
    ends: np.ndarray  # (t,) token end positions (exclusive)
    first: np.ndarray  # (k,) index of each line's first token
    counts: np.ndarray  # (k,) tokens per line
    blob: np.ndarray  # blob with comments blanked


def _tokens(blob, offsets) -> _Tokens:
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
    return _Tokens(starts, ends, bounds[:-1], np.diff(bounds), blob)


def _parse_numbers(blob, expected, dtype, what):
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


def _run_splice(data: bytes, starts, ends, keys, render) -> bytes:
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


def _read_bytes(path) -> bytes:
    try:
        with open(path, "rb") as f:
            return f.read()
    except FileNotFoundError:
        raise MeshError(f"{path}: no such file") from None
    except IsADirectoryError:
        raise MeshError(f"{path}: is a folder, not a mesh file") from None
    except OSError as exc:
        raise MeshError(f"{path}: cannot read ({_one_line(exc)})") from None


def _format_of(path) -> str:
    ext = os.path.splitext(os.fspath(path))[1].lower().lstrip(".")
    if ext not in FORMATS:
        raise MeshError(
            f"{path}: unknown mesh format {('.' + ext) if ext else '(no extension)'} "
            f"(expected one of {', '.join('.' + f for f in FORMATS)})"
        )
    return ext


# --------------------------------------------------------------------------- OBJ


@dataclass
class _ObjSource:
    data: bytes
    v_starts: np.ndarray
    v_ends: np.ndarray
    tail_index: np.ndarray  # sorted vertex indices whose v line has text after z
    tails: list  # latin-1 strings, parallel to tail_index
    vn_starts: np.ndarray | None = None
    vn_ends: np.ndarray | None = None
    vn_old: np.ndarray | None = None  # (k, 3)
    tri_vn: np.ndarray | None = None  # (m, 3) normal index of each triangle corner


def _obj_lines(buf, starts, ends, path):
    """Classify OBJ lines: returns keyword start per line and masks for v, vt, vn, f."""
    kw = starts.copy()
    first = buf[starts]
    lead = (ends > starts) & ((first == 32) | (first == 9))
    for i in np.flatnonzero(lead).tolist():  # rare: lines indented with blanks
        j = int(starts[i])
        while j < ends[i] and buf[j] in (32, 9):
            j += 1
        kw[i] = j
    length = ends - kw
    b0, b1, b2 = buf[kw], buf[kw + 1], buf[kw + 2]

    def blank(b):
        return (b == 32) | (b == 9)

    is_v = (b0 == 118) & ((length == 1) | ((length > 1) & blank(b1)))
    is_vt = (b0 == 118) & (b1 == 116) & ((length == 2) | ((length > 2) & blank(b2)))
    is_vn = (b0 == 118) & (b1 == 110) & ((length == 2) | ((length > 2) & blank(b2)))
    is_f = (b0 == 102) & ((length == 1) | ((length > 1) & blank(b1)))
    data_lines = is_v | is_vt | is_vn | is_f
    cont = data_lines & (length > 0) & (buf[np.maximum(ends - 1, 0)] == 92)
    if cont.any():
        line = int(np.flatnonzero(cont)[0]) + 1
        raise MeshError(f"{path}: line {line}: line continuation ('\\') is not supported")
    return kw, is_v, is_vt, is_vn, is_f


def _obj_floats(buf, kw, ends, mask, skip, path, what, minimum):
    """Parse the numbers of the lines in ``mask`` (keyword of length ``skip`` dropped)."""
    idx = np.flatnonzero(mask)
    s, e = kw[idx] + skip, ends[idx]
    blob, off = _gather(buf, s, e, idx)
    tok = _tokens(blob, off)
    short = tok.counts < minimum
    if short.any():
        line = int(idx[np.flatnonzero(short)[0]]) + 1
        raise MeshError(f"{path}: line {line}: '{what}' needs at least {minimum} numbers")
    values = _parse_numbers(tok.blob, int(tok.counts.sum()), np.float64, f"{path}: '{what}' line")
    return idx, s, off, tok, values


def _first_columns(values, counts, k):
    """The first ``k`` numbers of each line: (lines, k)."""
    if len(counts) and np.all(counts == k):
        return values.reshape(-1, k)
    off = np.cumsum(counts) - counts
    return values[off[:, None] + np.arange(k)]


def _load_obj(path, data: bytes) -> MeshDoc:
    buf, starts, ends = _split_lines(data)
    kw, is_v, is_vt, is_vn, is_f = _obj_lines(buf, starts, ends, path)
    if not is_v.any():
        raise MeshError(f"{path}: no vertices ('v' lines) found; not an OBJ file or empty")

    # vertices
    vidx, vbody, voff, vtok, vvals = _obj_floats(buf, kw, ends, is_v, 1, path, "v", 3)
    vertices = _first_columns(vvals, vtok.counts, 3).astype(np.float64, copy=True)
    if not np.all(np.isfinite(vertices)):
        raise MeshError(f"{path}: a 'v' line holds NaN or infinity")
    nv = len(vertices)
    # text after the third number (colours, w, comments) is kept verbatim
    end3 = np.full(nv, -1, np.int64)
    has3 = vtok.counts >= 3
    end3[has3] = vtok.ends[vtok.first[has3] + 2]
    line_len = ends[vidx] - vbody
    after = end3 - voff  # position in the line body just after z
    has_tail = after < line_len
    # a tail made only of blanks is dropped
    tail_index = np.flatnonzero(has_tail)
    tails = []
    keep = []
    for i in tail_index.tolist():
        t = data[int(vbody[i] + after[i]) : int(ends[vidx[i]])]
        if t.strip():
            tails.append(t.decode("latin-1"))
            keep.append(i)
    tail_index = np.asarray(keep, np.int64)

    # faces: v[/vt[/vn]] per corner
    fidx = np.flatnonzero(is_f)
    faces = np.zeros((0, 3), np.int64)
    uv = None
    tri_vn = None
    vn_count = int(is_vn.sum())
    source = _ObjSource(data, starts[vidx], ends[vidx], tail_index, tails)
    normals = "absent" if vn_count == 0 else "kept"
    if len(fidx):
        s, e = kw[fidx] + 1, ends[fidx]
        blob, off = _gather(buf, s, e, fidx)
        tok = _tokens(blob, off)
        if np.any(tok.counts < 3):
            line = int(fidx[np.flatnonzero(tok.counts < 3)[0]]) + 1
            raise MeshError(f"{path}: line {line}: a face needs at least 3 corners")
        b = tok.blob
        ws = b <= 32
        slash = b == 47
        # component number of each byte within its token (0: v, 1: vt, 2: vn): slashes
        # counted since the last blank (int32 and bool arrays keep memory low on big files)
        cs = np.cumsum(slash, dtype=np.int32)
        comp = cs - np.maximum.accumulate(np.where(ws, cs, np.int32(0)))
        del cs
        digit = ~ws & ~slash
        ncorner = len(tok.starts)
        corner_line = np.repeat(np.arange(len(fidx)), tok.counts)

        def component(k, before_mask):
            inside = digit & (comp == k)
            # tokens that have this component: where a run of its digits begins
            begin = inside.copy()
            begin[1:] &= ~inside[:-1]
            owner = np.searchsorted(tok.starts, np.flatnonzero(begin), side="right") - 1
            present = np.zeros(ncorner, bool)
            present[owner] = True
            if len(owner) != int(present.sum()):
                raise MeshError(f"{path}: malformed face corner")
            sel = np.where(inside, b, np.uint8(32))
            vals = _parse_numbers(sel, int(present.sum()), np.int64, f"{path}: 'f' line")
            count_before = np.searchsorted(np.flatnonzero(before_mask), fidx)[corner_line[present]]
            return present, vals, count_before

        pres0, v_ref, v_before = component(0, is_v)
        if not pres0.all():
            raise MeshError(f"{path}: a face corner has no vertex index")
        corners = _resolve(v_ref, v_before, nv, path, "vertex")
        tri = _fan(tok.counts, corners)
        faces = corners[tri]

        nvt = int(is_vt.sum())
        if nvt:
            pres1, t_ref, t_before = component(1, is_vt)
            if pres1.all():
                t_corner = _resolve(t_ref, t_before, nvt, path, "texture")
                _, _, _, vttok, vtvals = _obj_floats(buf, kw, ends, is_vt, 2, path, "vt", 1)
                cols = np.zeros((nvt, 2))
                c1 = np.minimum(vttok.counts, 2)
                off1 = np.cumsum(vttok.counts) - vttok.counts
                cols[:, 0] = vtvals[off1]
                two = c1 == 2
                cols[two, 1] = vtvals[off1[two] + 1]
                cuv = cols[t_corner]
                per_vertex = np.zeros((nv, 2))
                per_vertex[corners] = cuv
                if np.array_equal(per_vertex[corners], cuv):
                    uv = per_vertex
        if vn_count:
            pres2, n_ref, n_before = component(2, is_vn)
            n_corner = np.full(ncorner, -1, np.int64)
            n_corner[pres2] = _resolve(n_ref, n_before, vn_count, path, "normal")
            used = n_corner >= 0
            owner = np.full(vn_count, -1, np.int64)
            owner[n_corner[used]] = corners[used]
            if np.array_equal(owner[n_corner[used]], corners[used]):
                tri_vn = n_corner[tri]
                nidx, _, _, ntok, nvals = _obj_floats(buf, kw, ends, is_vn, 2, path, "vn", 3)
                source.vn_starts = starts[nidx]
                source.vn_ends = ends[nidx]
                source.vn_old = _first_columns(nvals, ntok.counts, 3)
                source.tri_vn = tri_vn
                normals = "recomputed"
    groups = {}
    if len(fidx):
        groups = _obj_groups(data, buf, kw, starts, ends, fidx, corners, corner_line)
    if len(faces) == 0:
        faces = np.zeros((0, 3), np.int64)
    name = os.path.splitext(os.path.basename(os.fspath(path)))[0]
    return MeshDoc(
        vertices, faces.astype(np.int64), os.fspath(path), "obj", uv, normals,
        (MeshPart(name, 0, nv),), source, groups,
    )


def _obj_groups(data, buf, kw, starts, ends, fidx, corners, corner_line):
    """{group name: vertex indices} from the ``g`` lines: each face belongs to the groups named
    by the last ``g`` line before it (a ``g`` line may name several groups)."""
    length = ends - kw
    b1 = buf[np.minimum(kw + 1, len(buf) - 1)]
    is_g = (buf[kw] == 103) & ((length == 1) | ((length > 1) & ((b1 == 32) | (b1 == 9))))
    gidx = np.flatnonzero(is_g)
    if not len(gidx):
        return {}
    owner = np.searchsorted(gidx, fidx, side="right") - 1  # per face line: which g line, -1 none
    corner_owner = owner[corner_line]
    groups = {}
    for j, line in enumerate(gidx.tolist()):
        names = data[int(kw[line]) + 1:int(ends[line])].decode("utf-8", "replace").split()
        sel = corners[corner_owner == j]
        if not len(sel):
            continue
        for name in names:
            prev = groups.get(name)
            groups[name] = sel if prev is None else np.concatenate([prev, sel])
    return {k: np.unique(v).astype(np.int64) for k, v in groups.items()}


def _resolve(ref, before, count, path, what):
    """OBJ indices (1-based, or negative relative to the elements read so far) -> 0-based."""
    out = np.where(ref > 0, ref - 1, before + ref)
    bad = (ref == 0) | (out < 0) | (out >= count)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise MeshError(f"{path}: {what} index {int(ref[i])} out of range (file has {count})")
    return out


def _save_obj(doc: MeshDoc, vertices) -> bytes:
    src: _ObjSource = doc._source
    tail_at = np.full(len(vertices), -1, np.int64)
    tail_at[src.tail_index] = np.arange(len(src.tail_index))
    nstarts = [src.v_starts]
    nends = [src.v_ends]
    keys = [np.zeros(len(src.v_starts), np.int64)]
    normals = None
    if src.tri_vn is not None:
        nstarts.append(src.vn_starts)
        nends.append(src.vn_ends)
        keys.append(np.ones(len(src.vn_starts), np.int64))
        fn = _area_normals(vertices, doc.faces)
        used = (src.tri_vn >= 0).ravel()
        acc = _accumulate(src.tri_vn.ravel()[used], np.repeat(fn, 3, axis=0)[used], len(src.vn_old))
        norm = np.linalg.norm(acc, axis=1, keepdims=True)
        normals = np.where(norm > 0, acc / np.where(norm > 0, norm, 1), src.vn_old)
    starts = np.concatenate(nstarts)
    ends = np.concatenate(nends)
    key = np.concatenate(keys)
    index = np.concatenate([np.arange(len(s)) for s in nstarts])
    order = np.argsort(starts, kind="stable")
    starts, ends, key, index = starts[order], ends[order], key[order], index[order]

    def render(k, a, b, sep):
        i0, i1 = int(index[a]), int(index[b - 1]) + 1
        s = sep.decode()
        if k == 1:
            block = normals[i0:i1]
            text = (("vn %.7g %.7g %.7g" + s) * (i1 - i0)) % tuple(block.ravel().tolist())
            return text[: -len(s)].encode("latin-1")
        rows = vertices[i0:i1].tolist()
        t = tail_at[i0:i1]
        if np.all(t < 0):
            text = (("v %r %r %r" + s) * (i1 - i0)) % tuple(x for r in rows for x in r)
        else:
            tails = [src.tails[j] if j >= 0 else "" for j in t.tolist()]
            args = tuple(x for r, tl in zip(rows, tails) for x in (*r, tl))
            text = (("v %r %r %r%s" + s) * (i1 - i0)) % args
        return text[: -len(s)].encode("latin-1")

    return _run_splice(src.data, starts, ends, key, render)


def _export_obj_plain(doc: MeshDoc, vertices) -> bytes:
    """OBJ text for a document made from arrays: v, vt (if uv), f."""
    parts = ["# written by pliant\n"]
    parts.append(("v %r %r %r\n" * len(vertices)) % tuple(vertices.ravel().tolist()))
    f1 = doc.faces + 1
    if doc.uv is not None:
        parts.append(("vt %r %r\n" * len(doc.uv)) % tuple(doc.uv.ravel().tolist()))
        parts.append(("f %d/%d %d/%d %d/%d\n" * len(f1)) % tuple(np.repeat(f1.ravel(), 2).tolist()))
    else:
        parts.append(("f %d %d %d\n" * len(f1)) % tuple(f1.ravel().tolist()))
    return "".join(parts).encode("ascii")


# --------------------------------------------------------------------------- PLY / STL / OFF via trimesh


def _trimesh_load(path, data: bytes, kind: str):
    import io

    import trimesh

    try:
        m = trimesh.load(io.BytesIO(data), file_type=kind, process=False, force="mesh")
    except MeshError:
        raise
    except Exception as exc:  # trimesh raises many types on bad input
        raise MeshError(f"{path}: not a readable {kind.upper()} file ({_one_line(exc)})") from None
    if not isinstance(m, trimesh.Trimesh) or len(m.vertices) == 0:
        raise MeshError(f"{path}: no vertices found; not a {kind.upper()} file or empty")
    return m


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


def _load_ply(path, data: bytes) -> MeshDoc:
    m = _trimesh_load(path, data, "ply")
    try:
        encoding, body, elements = _ply_header(data, path)
    except ValueError as exc:
        raise MeshError(f"{path}: malformed PLY header ({_one_line(exc)})") from None
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


def _save_ply(doc: MeshDoc, vertices) -> bytes:
    src: _PlySource = doc._source
    dtype = src.vertex_dtype
    n = len(vertices)
    if dtype is None or src.encoding not in ("ascii", "binary_little_endian", "binary_big_endian"):
        return _trimesh_export(doc, vertices, "ply", encoding="ascii" if src.encoding == "ascii" else "binary")
    normals = None
    if doc.normals_on_save == "recomputed":
        normals = _vertex_normals(vertices, doc.faces, n)
    if src.encoding != "ascii":
        end = src.body + n * dtype.itemsize
        rec = np.frombuffer(src.data, dtype=dtype, count=n, offset=src.body).copy()
        for c, name in enumerate("xyz"):
            rec[name] = vertices[:, c]
        if normals is not None:
            for c, name in enumerate(("nx", "ny", "nz")):
                good = ~np.isnan(normals[:, c])
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
        return _trimesh_export(doc, vertices, "ply", encoding="ascii")
    rows = vertices.tolist()
    nrows = normals.tolist() if normals is not None else None
    out = []
    for i in range(n):
        line = lines[i]
        cr = line.endswith(b"\r")
        words = line.split()
        for c, name in enumerate("xyz"):
            words[cols[name]] = repr(rows[i][c]).encode()
        if nrows is not None and not np.isnan(nrows[i][0]):
            for c, name in enumerate(("nx", "ny", "nz")):
                words[ncols[name]] = ("%.7g" % nrows[i][c]).encode()
        out.append(b" ".join(words) + (b"\r" if cr else b""))
    rest = lines[n:] if len(lines) > n else []
    return src.data[: src.body] + b"\n".join(out + rest)


def _trimesh_export(doc: MeshDoc, vertices, kind, **kwargs) -> bytes:
    import trimesh

    m = trimesh.Trimesh(vertices=vertices, faces=doc.faces, process=False)
    out = m.export(file_type=kind, **kwargs)
    return out.encode("utf-8") if isinstance(out, str) else out


def _trimesh_gltf_embedded(doc: MeshDoc, vertices) -> bytes:
    import trimesh
    from trimesh.exchange.gltf import export_gltf

    m = trimesh.Trimesh(vertices=vertices, faces=doc.faces, process=False)
    files = export_gltf(trimesh.Scene(m), embed_buffers=True)
    return files["model.gltf"]


@dataclass
class _StlSource:
    binary: bool
    header: bytes
    attributes: np.ndarray | None  # (m,) uint16 per facet (binary)
    name: str


def _load_stl(path, data: bytes) -> MeshDoc:
    m = _trimesh_load(path, data, "stl")
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
                   (MeshPart(name, 0, len(vertices)),), _StlSource(binary, header, attributes, sname))


def _facet_normals(tris):
    n = np.cross(tris[:, 1] - tris[:, 0], tris[:, 2] - tris[:, 0])
    norm = np.linalg.norm(n, axis=1, keepdims=True)
    return np.where(norm > 0, n / np.where(norm > 0, norm, 1), 0.0)


def _save_stl(doc: MeshDoc, vertices) -> bytes:
    src: _StlSource = doc._source
    tris = vertices[doc.faces]
    normals = _facet_normals(tris)
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


@dataclass
class _OffSource:
    data: bytes
    starts: np.ndarray
    ends: np.ndarray
    tails: list


_THREE = re.compile(rb"\s*\S+\s+\S+\s+\S+")


def _load_off(path, data: bytes) -> MeshDoc:
    m = _trimesh_load(path, data, "off")
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
    faces = corners[_fan(counts, corners)] if len(corners) else np.zeros((0, 3), np.int64)
    source = _OffSource(data, np.asarray(starts, np.int64), np.asarray(ends, np.int64), tails)
    name = os.path.splitext(os.path.basename(os.fspath(path)))[0]
    return MeshDoc(vertices, faces, os.fspath(path), "off", None, "absent",
                   (MeshPart(name, 0, n),), source)


def _save_off(doc: MeshDoc, vertices) -> bytes:
    src: _OffSource = doc._source
    rows = vertices.tolist()

    def render(k, a, b, sep):
        s = sep.decode()
        text = s.join("%r %r %r%s" % (*rows[i], src.tails[i]) for i in range(a, b))
        return text.encode("latin-1")

    return _run_splice(src.data, src.starts, src.ends, np.zeros(len(src.starts), np.int64), render)


# --------------------------------------------------------------------------- glTF / GLB

_GLB_MAGIC = 0x46546C67
_CHUNK_JSON = 0x4E4F534A
_CHUNK_BIN = 0x004E4942
_COMPONENT = {5120: "i1", 5121: "u1", 5122: "i2", 5123: "u2", 5125: "u4", 5126: "f4"}
_NCOMP = {"SCALAR": 1, "VEC2": 2, "VEC3": 3, "VEC4": 4, "MAT2": 4, "MAT3": 9, "MAT4": 16}
_REFUSED_EXTENSIONS = ("KHR_draco_mesh_compression", "EXT_meshopt_compression",
                       "KHR_mesh_quantization")


@dataclass
class _GltfPart:
    accessor: int
    normal: int | None  # NORMAL accessor to recompute, if any
    matrix: np.ndarray  # (4, 4) node world matrix
    start: int
    stop: int
    faces: np.ndarray  # (t, 3) local indices


@dataclass
class _GltfSource:
    gltf: dict
    buffers: list  # bytes per buffer
    glb: bool
    folder: str
    parts: list


def _parse_glb(data: bytes, path):
    if len(data) < 20:
        raise MeshError(f"{path}: too short to be a GLB file")
    magic, version, length = struct.unpack_from("<III", data, 0)
    if magic != _GLB_MAGIC:
        raise MeshError(f"{path}: not a GLB file (bad magic bytes)")
    if version != 2:
        raise MeshError(f"{path}: GLB version {version} is not supported (need 2)")
    if length > len(data):
        raise MeshError(f"{path}: GLB file is truncated ({len(data)} of {length} bytes)")
    pos = 12
    jtext, binchunk = None, None
    while pos + 8 <= length:
        clen, ctype = struct.unpack_from("<II", data, pos)
        chunk = data[pos + 8 : pos + 8 + clen]
        if len(chunk) != clen:
            raise MeshError(f"{path}: GLB chunk runs past the end of the file")
        if ctype == _CHUNK_JSON and jtext is None:
            jtext = chunk
        elif ctype == _CHUNK_BIN and binchunk is None:
            binchunk = chunk
        pos += 8 + clen
    if jtext is None:
        raise MeshError(f"{path}: GLB file has no JSON chunk")
    return jtext, binchunk


def _node_matrix(node):
    if "matrix" in node:
        return np.asarray(node["matrix"], dtype=np.float64).reshape(4, 4).T  # column-major
    t = np.asarray(node.get("translation", (0, 0, 0)), dtype=np.float64)
    x, y, z, w = np.asarray(node.get("rotation", (0, 0, 0, 1)), dtype=np.float64)
    s = np.asarray(node.get("scale", (1, 1, 1)), dtype=np.float64)
    r = np.array([
        [1 - 2 * (y * y + z * z), 2 * (x * y - z * w), 2 * (x * z + y * w)],
        [2 * (x * y + z * w), 1 - 2 * (x * x + z * z), 2 * (y * z - x * w)],
        [2 * (x * z - y * w), 2 * (y * z + x * w), 1 - 2 * (x * x + y * y)],
    ])
    m = np.eye(4)
    m[:3, :3] = r * s[None, :]
    m[:3, 3] = t
    return m


def _accessor_array(gltf, buffers, index, path, *, writable_buffers=None):
    """A (count, ncomp) view of an accessor's data (writable into ``writable_buffers``)."""
    try:
        acc = gltf["accessors"][index]
    except (KeyError, IndexError, TypeError):
        raise MeshError(f"{path}: accessor {index} does not exist") from None
    if "sparse" in acc:
        raise MeshError(f"{path}: accessor {index} is sparse, which pliant does not read")
    if "bufferView" not in acc:
        raise MeshError(f"{path}: accessor {index} has no bufferView")
    ctype = _COMPONENT.get(acc.get("componentType"))
    ncomp = _NCOMP.get(acc.get("type"))
    if ctype is None or ncomp is None:
        raise MeshError(f"{path}: accessor {index} has an unknown type")
    view = gltf["bufferViews"][acc["bufferView"]]
    b = view["buffer"]
    buf = (writable_buffers or buffers)[b]
    dt = np.dtype("<" + ctype)
    elem = dt.itemsize * ncomp
    stride = view.get("byteStride") or elem
    offset = view.get("byteOffset", 0) + acc.get("byteOffset", 0)
    count = int(acc["count"])
    need = offset + (count - 1) * stride + elem if count else offset
    if need > view.get("byteOffset", 0) + view["byteLength"] or need > len(buf):
        raise MeshError(f"{path}: accessor {index} runs past the end of its buffer")
    return np.ndarray((count, ncomp), dtype=dt, buffer=buf, offset=offset,
                      strides=(stride, dt.itemsize)), acc


def _primitive_faces(gltf, buffers, prim, count, path):
    mode = prim.get("mode", 4)
    if "indices" in prim:
        idx, acc = _accessor_array(gltf, buffers, prim["indices"], path)
        if idx.dtype.kind != "u" or idx.shape[1] != 1:
            raise MeshError(f"{path}: accessor {prim['indices']} is not a valid index accessor")
        idx = idx[:, 0].astype(np.int64)
    else:
        idx = np.arange(count, dtype=np.int64)
    if len(idx) and idx.max() >= count:
        raise MeshError(f"{path}: a primitive's index exceeds its vertex count")
    if mode == 4:
        return idx[: len(idx) // 3 * 3].reshape(-1, 3)
    if mode == 5 and len(idx) >= 3:  # strip: flip every other triangle to keep winding
        k = np.arange(len(idx) - 2)
        a, b, c = idx[k], idx[k + 1], idx[k + 2]
        odd = k % 2 == 1
        return np.stack([a, np.where(odd, c, b), np.where(odd, b, c)], axis=1)
    if mode == 6 and len(idx) >= 3:
        k = np.arange(1, len(idx) - 1)
        return np.stack([np.full(len(k), idx[0]), idx[k], idx[k + 1]], axis=1)
    return np.zeros((0, 3), np.int64)


def _load_buffers(gltf, binchunk, path, folder):
    buffers = []
    for i, b in enumerate(gltf.get("buffers", [])):
        uri = b.get("uri")
        if uri is None:
            if binchunk is None:
                raise MeshError(f"{path}: buffer {i} has no uri and there is no GLB binary chunk")
            data = binchunk
        elif uri.startswith("data:"):
            try:
                data = base64.b64decode(uri.split(",", 1)[1], validate=False)
            except (IndexError, ValueError) as exc:
                raise MeshError(f"{path}: buffer {i} has a bad data URI ({_one_line(exc)})") from None
        else:
            ref = os.path.join(folder, urllib.parse.unquote(uri))
            try:
                with open(ref, "rb") as f:
                    data = f.read()
            except OSError as exc:
                raise MeshError(f"{path}: cannot read buffer file {uri!r} ({_one_line(exc)})") from None
        if len(data) < b.get("byteLength", 0):
            raise MeshError(f"{path}: buffer {i} is shorter than its byteLength")
        buffers.append(data)
    return buffers


def _load_gltf(path, data: bytes, fmt: str) -> MeshDoc:
    folder = os.path.dirname(os.path.abspath(os.fspath(path)))
    if fmt == "glb":
        jtext, binchunk = _parse_glb(data, path)
    else:
        jtext, binchunk = data, None
    try:
        gltf = json.loads(jtext.decode("utf-8"))
    except (UnicodeDecodeError, ValueError) as exc:
        raise MeshError(f"{path}: not valid glTF JSON ({_one_line(exc)})") from None
    if not isinstance(gltf, dict) or "asset" not in gltf:
        raise MeshError(f"{path}: not a glTF document (no 'asset')")
    if not str(gltf["asset"].get("version", "")).startswith("2."):
        raise MeshError(f"{path}: glTF version {gltf['asset'].get('version')!r} is not supported (need 2.x)")
    for ext in gltf.get("extensionsRequired", []):
        if ext in _REFUSED_EXTENSIONS:
            raise MeshError(f"{path}: uses {ext}, which pliant cannot edit")
    try:
        return _gltf_doc(path, gltf, _load_buffers(gltf, binchunk, path, folder), fmt, folder)
    except MeshError:
        raise
    except (KeyError, IndexError, TypeError, ValueError) as exc:
        raise MeshError(f"{path}: malformed glTF ({type(exc).__name__}: {_one_line(exc)})") from None


def _gltf_doc(path, gltf, buffers, fmt, folder) -> MeshDoc:
    nodes = gltf.get("nodes", [])
    scenes = gltf.get("scenes", [])
    if scenes:
        roots = scenes[gltf.get("scene", 0)].get("nodes", [])
    else:
        children = {c for n in nodes for c in n.get("children", [])}
        roots = [i for i in range(len(nodes)) if i not in children]
    users: dict[int, list[int]] = {}
    visits = []
    stack = [(r, np.eye(4)) for r in reversed(roots)]
    seen = set()
    while stack:
        i, parent = stack.pop()
        if i in seen:
            raise MeshError(f"{path}: node {i} is reached twice in the scene")
        seen.add(i)
        node = nodes[i]
        world = parent @ _node_matrix(node)
        if "mesh" in node:
            users.setdefault(node["mesh"], []).append(i)
            visits.append((i, node["mesh"], np.eye(4) if "skin" in node else world))
        for c in reversed(node.get("children", [])):
            stack.append((c, world))
    for mesh, who in users.items():
        if len(who) > 1:
            raise MeshError(
                f"{path}: mesh {mesh} is instanced by nodes {', '.join(map(str, who))}; "
                "instanced meshes cannot be posed per instance"
            )
    all_v, all_f, all_uv = [], [], []
    parts, records = [], []
    owner: dict[int, int] = {}
    start = 0
    uv_ok = True
    for node_i, mesh_i, world in visits:
        if abs(np.linalg.det(world[:3, :3])) < 1e-300:
            raise MeshError(f"{path}: node {node_i} has a singular transform (zero scale)")
        mesh = gltf["meshes"][mesh_i]
        by_acc: dict[int, _GltfPart] = {}
        for prim in mesh.get("primitives", []):
            ai = prim.get("attributes", {}).get("POSITION")
            if ai is None:
                continue
            if owner.setdefault(ai, mesh_i) != mesh_i:
                raise MeshError(f"{path}: POSITION accessor {ai} is shared by meshes "
                                f"{owner[ai]} and {mesh_i}; such sharing cannot be posed")
            pos, acc = _accessor_array(gltf, buffers, ai, path)
            if pos.dtype != np.float32 or pos.shape[1] != 3:
                raise MeshError(f"{path}: POSITION accessor {ai} is not float VEC3")
            faces = _primitive_faces(gltf, buffers, prim, len(pos), path)
            nrm = prim["attributes"].get("NORMAL")
            part = by_acc.get(ai)
            if part is None:
                local = pos.astype(np.float64)
                w = local @ world[:3, :3].T + world[:3, 3]
                part = _GltfPart(ai, nrm, world, start, start + len(pos), faces)
                by_acc[ai] = part
                all_v.append(w)
                tc = prim["attributes"].get("TEXCOORD_0")
                if tc is not None and uv_ok:
                    t, _ = _accessor_array(gltf, buffers, tc, path)
                    if t.dtype == np.float32 and t.shape[1] == 2:
                        all_uv.append(t.astype(np.float64))
                    else:
                        uv_ok = False
                else:
                    uv_ok = False
                start += len(pos)
            else:
                part.faces = np.concatenate([part.faces, faces])
                if part.normal != nrm:
                    part.normal = None  # primitives disagree on the normal accessor: keep as is
        for part in by_acc.values():
            all_f.append(part.faces + part.start)
            records.append(part)
            name = gltf["nodes"][node_i].get("name") or mesh.get("name") or f"node{node_i}"
            parts.append(MeshPart(name, part.start, part.stop, node_i, mesh_i))
    if not all_v or start == 0:
        raise MeshError(f"{path}: no mesh vertices found in the scene")
    vertices = np.concatenate(all_v)
    faces = np.concatenate(all_f).astype(np.int64) if all_f else np.zeros((0, 3), np.int64)
    uv = np.concatenate(all_uv) if uv_ok and all_uv else None
    normals = "recomputed" if any(p.normal is not None for p in records) else "absent"
    source = _GltfSource(gltf, buffers, fmt == "glb", folder, records)
    groups = {}
    for part in parts:
        groups.setdefault(part.name, []).append(np.arange(part.start, part.stop, dtype=np.int64))
    groups = {k: np.concatenate(v) for k, v in groups.items()}
    return MeshDoc(vertices, faces, os.fspath(path), fmt, uv, normals, tuple(parts), source, groups)


def _float_list(a):
    return [float(x) for x in a]


def _save_gltf(doc: MeshDoc, vertices, path, fmt) -> dict:
    """Returns {file path: bytes} to write (the glTF/GLB file and any changed .bin files)."""
    src: _GltfSource = doc._source
    gltf = json.loads(json.dumps(src.gltf))
    buffers = [bytearray(b) for b in src.buffers]
    changed = set()
    for part in src.parts:
        inv = np.linalg.inv(part.matrix)
        world = vertices[part.start : part.stop]
        local = world @ inv[:3, :3].T + inv[:3, 3]
        view, acc = _accessor_array(gltf, src.buffers, part.accessor, doc.path,
                                    writable_buffers=buffers)
        view[:] = local.astype(np.float32)
        stored = view.astype(np.float64)
        gltf["accessors"][part.accessor]["min"] = _float_list(stored.min(axis=0))
        gltf["accessors"][part.accessor]["max"] = _float_list(stored.max(axis=0))
        changed.add(gltf["bufferViews"][acc["bufferView"]]["buffer"])
        if part.normal is not None:
            nview, nacc = _accessor_array(gltf, src.buffers, part.normal, doc.path,
                                          writable_buffers=buffers)
            if nview.dtype == np.float32 and nview.shape == (len(local), 3):
                n = _vertex_normals(stored, part.faces, len(local))
                good = ~np.isnan(n[:, 0])
                nview[good] = n[good].astype(np.float32)
                nstored = nview.astype(np.float64)
                if "min" in nacc:
                    gltf["accessors"][part.normal]["min"] = _float_list(nstored.min(axis=0))
                if "max" in nacc:
                    gltf["accessors"][part.normal]["max"] = _float_list(nstored.max(axis=0))
                changed.add(gltf["bufferViews"][nacc["bufferView"]]["buffer"])
    out_folder = os.path.dirname(os.path.abspath(os.fspath(path)))
    stem = os.path.splitext(os.path.basename(os.fspath(path)))[0]
    files = {}
    ext_buffers = [i for i, b in enumerate(gltf.get("buffers", []))
                   if b.get("uri") and not b["uri"].startswith("data:")]
    for i, b in enumerate(gltf.get("buffers", [])):
        uri = b.get("uri")
        if uri is None:
            continue
        if uri.startswith("data:"):
            if i in changed:
                mime = uri[5:].split(";", 1)[0] or "application/octet-stream"
                b["uri"] = f"data:{mime};base64," + base64.b64encode(bytes(buffers[i])).decode("ascii")
        elif i in changed:
            name = f"{stem}.bin" if len(ext_buffers) == 1 else f"{stem}_{i}.bin"
            files[os.path.join(out_folder, name)] = bytes(buffers[i])
            b["uri"] = urllib.parse.quote(name)
    if out_folder != src.folder:  # keep unchanged external files reachable from the new place
        for key in ("buffers", "images"):
            for i, item in enumerate(gltf.get(key, [])):
                uri = item.get("uri")
                if not uri or uri.startswith("data:") or (key == "buffers" and i in changed):
                    continue
                if urllib.parse.urlparse(uri).scheme:
                    continue
                target = os.path.join(src.folder, urllib.parse.unquote(uri))
                item["uri"] = urllib.parse.quote(os.path.relpath(target, out_folder).replace(os.sep, "/"))
    if fmt == "glb":
        jbytes = json.dumps(gltf, separators=(",", ":"), ensure_ascii=False).encode("utf-8")
        jbytes += b" " * (-len(jbytes) % 4)
        chunks = struct.pack("<II", len(jbytes), _CHUNK_JSON) + jbytes
        if gltf.get("buffers") and gltf["buffers"][0].get("uri") is None:
            bin0 = bytes(buffers[0])
            bin0 += b"\0" * (-len(bin0) % 4)
            chunks += struct.pack("<II", len(bin0), _CHUNK_BIN) + bin0
        files[os.fspath(path)] = struct.pack("<III", _GLB_MAGIC, 2, 12 + len(chunks)) + chunks
    else:
        text = json.dumps(gltf, indent=2, ensure_ascii=False) + "\n"
        files[os.fspath(path)] = text.encode("utf-8")
    return files


# --------------------------------------------------------------------------- public API


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
    loaders = {"obj": _load_obj, "ply": _load_ply, "stl": _load_stl, "off": _load_off}
    try:
        if fmt in ("glb", "gltf"):
            return _load_gltf(path, data, fmt)
        return loaders[fmt](path, data)
    except MeshError:
        raise
    except (ValueError, IndexError, KeyError, TypeError, struct.error, OverflowError) as exc:
        raise MeshError(f"{path}: not a readable {fmt.upper()} file ({_one_line(exc)})") from None


def save_mesh(doc: MeshDoc, path, vertices=None) -> None:
    """Write ``doc`` to ``path`` in its source's format, with ``vertices`` as the new positions.

    The file is written atomically (temporary file, then rename). Only positions (and stored
    normals) change; see the module docstring for what each format keeps.

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
        raise ValueError(f"doc: must be a MeshDoc, got {type(doc).__name__}")
    v = _check_vertices(doc.vertices if vertices is None else vertices, "vertices", len(doc.vertices))
    fmt = _format_of(path)
    if doc.format is None:
        if fmt == "obj":
            files = {os.fspath(path): _export_obj_plain(doc, v)}
        elif fmt == "gltf":
            files = {os.fspath(path): _trimesh_gltf_embedded(doc, v)}
        else:
            files = {os.fspath(path): _trimesh_export(doc, v, fmt)}
    elif fmt != doc.format:
        raise MeshError(
            f"{path}: cannot write a mesh read from {doc.format.upper()} as {fmt.upper()} "
            "without losing its structure; save it with the .{doc.format} extension"
        )
    elif fmt == "obj":
        files = {os.fspath(path): _save_obj(doc, v)}
    elif fmt == "ply":
        files = {os.fspath(path): _save_ply(doc, v)}
    elif fmt == "stl":
        files = {os.fspath(path): _save_stl(doc, v)}
    elif fmt == "off":
        files = {os.fspath(path): _save_off(doc, v)}
    else:
        files = _save_gltf(doc, v, path, fmt)
    # side files first, the main file last: a reader never sees a main file without its buffers
    main = os.fspath(path)
    for name, data in files.items():
        if name != main:
            with atomic_write(name) as f:
                f.write(data)
    with atomic_write(main) as f:
        f.write(files[main])
