"""PLY files: parsed and written by pliant, every face encoding, ASCII and binary.

Reading takes every element the format allows: ``face`` lists of any and mixed sizes,
``tristrips`` (strips separated by -1; each strip's triangles alternate their winding, and
triangles that repeat a vertex are skipped, common practice), in ASCII, binary little- and
big-endian. Texture coordinates are read per vertex (``s t``, ``u v``, ``texture_u texture_v``
or ``texture_s texture_t``) or per face corner (a face ``texcoord`` list); normals from
``nx ny nz``. Named groups and materials are pliant's own convention, which this module also
writes on conversion: an integer face property ``group`` or ``material`` whose values are named
by header lines ``comment pliant group <value> <name>`` / ``comment pliant material <value>
<name>``.

Writing a posed file patches ``x y z`` (and ``nx ny nz``, recomputed) of the vertex element in
place and keeps every other byte, wherever the vertex element sits, as long as it has scalar
properties only (the usual layout); otherwise the file is written anew from its polygons.
"""
from __future__ import annotations

import os
import struct
from dataclasses import dataclass, field

import numpy as np

from brushes import surface

from .document import MeshDoc, MeshError, MeshPart, Polygons

__all__ = ["load", "save", "export"]

_TYPES = {
    "char": "i1", "int8": "i1", "uchar": "u1", "uint8": "u1", "short": "i2", "int16": "i2",
    "ushort": "u2", "uint16": "u2", "int": "i4", "int32": "i4", "uint": "u4", "uint32": "u4",
    "float": "f4", "float32": "f4", "double": "f8", "float64": "f8",
}
_UV_NAMES = (("s", "t"), ("u", "v"), ("texture_u", "texture_v"), ("texture_s", "texture_t"))
_COLOUR_NAMES = {"red", "green", "blue", "alpha", "r", "g", "b", "diffuse_red", "diffuse_green",
                 "diffuse_blue"}
SOURCE_PROPERTY = "source_vertex"


@dataclass
class _Property:
    name: str
    type: str  # numpy type code without byte order ("f4")
    count_type: str | None = None  # list properties: the type of the count


@dataclass
class _Element:
    name: str
    count: int
    props: list = field(default_factory=list)
    start: int = 0  # binary: byte offset; ascii: first line index of the body
    stop: int = 0


@dataclass
class _PlySource:
    data: bytes
    encoding: str  # "ascii", "binary_little_endian", "binary_big_endian"
    body: int  # byte offset of the element data
    vertex: _Element | None  # scalar-only vertex element: patchable in place
    vertex_dtype: np.dtype | None


def _header(data: bytes, path):
    end = data.find(b"end_header")
    if not data.startswith(b"ply") or end < 0:
        raise MeshError(f"{path}: not a PLY file (no 'ply' ... 'end_header' header)")
    nl = data.find(b"\n", end)
    body = len(data) if nl < 0 else nl + 1
    encoding = None
    elements, comments = [], []
    for number, line in enumerate(data[:end].decode("latin-1").splitlines(), start=1):
        words = line.split()
        if not words:
            continue
        if words[0] == "format" and len(words) >= 2:
            encoding = words[1]
        elif words[0] == "comment":
            comments.append(words[1:])
        elif words[0] == "element":
            if len(words) < 3 or not words[2].isdigit():
                raise MeshError(f"{path}: header line {number}: 'element' needs a name and a count")
            elements.append(_Element(words[1], int(words[2])))
        elif words[0] == "property":
            if not elements:
                raise MeshError(f"{path}: header line {number}: 'property' before any 'element'")
            if len(words) >= 5 and words[1] == "list":
                if words[2] not in _TYPES or words[3] not in _TYPES:
                    raise MeshError(f"{path}: header line {number}: unknown list type")
                elements[-1].props.append(_Property(words[4], _TYPES[words[3]], _TYPES[words[2]]))
            elif len(words) >= 3 and words[1] in _TYPES:
                elements[-1].props.append(_Property(words[2], _TYPES[words[1]]))
            else:
                raise MeshError(f"{path}: header line {number}: unknown property type "
                                f"{' '.join(words[1:])!r}")
    if encoding not in ("ascii", "binary_little_endian", "binary_big_endian"):
        raise MeshError(f"{path}: PLY format {encoding!r} is not ascii or binary")
    return encoding, body, elements, comments


def _read_binary(data, pos, element, order, path):
    """{property: (count,) array, or (counts (count,), flat values) for lists}; new offset."""
    n = element.count
    if all(p.count_type is None for p in element.props):
        dt = np.dtype([(p.name, order + p.type) for p in element.props])
        if pos + n * dt.itemsize > len(data):
            raise MeshError(f"{path}: element '{element.name}' runs past the end of the file")
        rec = np.frombuffer(data, dt, count=n, offset=pos)
        return {p.name: rec[p.name].copy() for p in element.props}, pos + n * dt.itemsize
    # lists: every row's size depends on its counts; first try rows whose lists all have the
    # lengths of the first row (the common case), else walk the rows
    first = _row_counts(data, pos, element, order, path)
    fields = []
    for p, k in zip(element.props, first):
        if p.count_type is None:
            fields.append((p.name, order + p.type))
        else:
            fields.append((p.name + "\0n", order + p.count_type))
            fields.append((p.name, order + p.type, (k,)))
    dt = np.dtype(fields)
    if pos + n * dt.itemsize <= len(data):
        rec = np.frombuffer(data, dt, count=n, offset=pos)
        if all(np.all(rec[p.name + "\0n"] == k) for p, k in zip(element.props, first)
               if p.count_type is not None):
            out = {}
            for p, k in zip(element.props, first):
                if p.count_type is None:
                    out[p.name] = rec[p.name].copy()
                else:
                    out[p.name] = (np.full(n, k, np.int64), rec[p.name].reshape(-1).copy())
            return out, pos + n * dt.itemsize
    return _walk_rows(data, pos, element, order, path)


def _row_counts(data, pos, element, order, path):
    """The list lengths of the row at ``pos`` (None for scalars)."""
    out = []
    for p in element.props:
        if p.count_type is None:
            pos += np.dtype(p.type).itemsize
            out.append(None)
            continue
        size = np.dtype(p.count_type).itemsize
        if pos + size > len(data):
            raise MeshError(f"{path}: element '{element.name}' runs past the end of the file")
        k = int(np.frombuffer(data, order + p.count_type, 1, pos)[0])
        if k < 0:
            raise MeshError(f"{path}: element '{element.name}' has a negative list length")
        out.append(k)
        pos += size + k * np.dtype(p.type).itemsize
    return out


def _walk_rows(data, pos, element, order, path):
    """Rows of varying list lengths: find each row's offsets, then gather with numpy."""
    n = element.count
    sizes = [np.dtype(p.count_type or p.type).itemsize for p in element.props]
    item = [np.dtype(p.type).itemsize for p in element.props]
    codes = {"u1": "B", "i1": "b", "u2": "H", "i2": "h", "u4": "I", "i4": "i"}
    fmt = {i: ("<" if order == "<" else ">") + codes.get(p.count_type, "?")
           for i, p in enumerate(element.props) if p.count_type is not None}
    for i, p in enumerate(element.props):
        if p.count_type is not None and p.count_type not in codes:
            raise MeshError(f"{path}: list length type of '{p.name}' must be an integer")
    offsets = [np.zeros(n, np.int64) for _ in element.props]
    lengths = [np.zeros(n, np.int64) for _ in element.props]
    unpack = struct.unpack_from
    size = len(data)
    try:
        for r in range(n):
            for i, p in enumerate(element.props):
                offsets[i][r] = pos
                if p.count_type is None:
                    pos += sizes[i]
                else:
                    k = unpack(fmt[i], data, pos)[0]
                    lengths[i][r] = k
                    pos += sizes[i] + k * item[i]
    except struct.error:
        raise MeshError(f"{path}: element '{element.name}' runs past the end of the file") from None
    if pos > size:
        raise MeshError(f"{path}: element '{element.name}' runs past the end of the file")
    buf = np.frombuffer(data, np.uint8)
    out = {}
    for i, p in enumerate(element.props):
        dt = np.dtype(order + p.type)
        if p.count_type is None:
            raw = buf[offsets[i][:, None] + np.arange(dt.itemsize)]
            out[p.name] = raw.reshape(-1).view(dt).copy()
            continue
        k = lengths[i]
        total = int(k.sum())
        start = np.repeat(offsets[i] + sizes[i], k) + (
            np.arange(total) - np.repeat(np.cumsum(k) - k, k)) * dt.itemsize
        raw = buf[start[:, None] + np.arange(dt.itemsize)]
        out[p.name] = (k, raw.reshape(-1).view(dt).copy())
    return out, pos


def _read_ascii(lines, start, element, path):
    """Like _read_binary for ASCII rows ``lines[start:start + count]``; returns the next line."""
    n = element.count
    rows = lines[start:start + n]
    if len(rows) < n:
        raise MeshError(f"{path}: element '{element.name}' has {len(rows)} of its {n} lines")
    if all(p.count_type is None for p in element.props):
        width = len(element.props)
        try:
            values = np.array(b" ".join(rows).split(), dtype=np.float64)
        except ValueError:
            raise MeshError(f"{path}: element '{element.name}' holds a malformed number") from None
        if values.size != n * width:
            raise MeshError(f"{path}: element '{element.name}' lines need {width} numbers each")
        table = values.reshape(n, width)
        return {p.name: table[:, i].astype(p.type) for i, p in enumerate(element.props)}, start + n
    cols = {p.name: [] for p in element.props}
    lens = {p.name: np.zeros(n, np.int64) for p in element.props if p.count_type is not None}
    for r, line in enumerate(rows):
        words = line.split()
        j = 0
        try:
            for p in element.props:
                if p.count_type is None:
                    cols[p.name].append(float(words[j]))
                    j += 1
                else:
                    k = int(words[j])
                    lens[p.name][r] = k
                    cols[p.name].extend(float(w) for w in words[j + 1:j + 1 + k])
                    if len(words) < j + 1 + k:
                        raise IndexError
                    j += 1 + k
        except (IndexError, ValueError):
            raise MeshError(f"{path}: element '{element.name}' line {r + 1} is malformed") from None
    out = {}
    for p in element.props:
        values = np.asarray(cols[p.name], np.float64).astype(p.type)
        out[p.name] = values if p.count_type is None else (lens[p.name], values)
    return out, start + n


def _strips(counts, values):
    """Triangles of ``tristrips`` lists (-1 restarts a strip); degenerate ones are skipped."""
    idx = values.astype(np.int64)
    strip = np.repeat(np.arange(len(counts)), counts)
    brk = idx < 0
    # a new run starts at each list start and after each -1
    run = np.cumsum(np.concatenate(([True], (strip[1:] != strip[:-1]) | brk[:-1])))
    keep = ~brk
    idx, run = idx[keep], run[keep]
    pos = np.arange(len(idx)) - np.searchsorted(run, run)  # position inside its run
    k = np.flatnonzero((pos[2:] >= 2) & (run[2:] == run[:-2])) + 2
    a, b, c = idx[k - 2], idx[k - 1], idx[k]
    odd = pos[k] % 2 == 1
    tri = np.stack([a, np.where(odd, c, b), np.where(odd, b, c)], axis=1)
    good = (a != b) & (b != c) & (a != c)
    return tri[good]


def _names(comments, kind):
    """{value: name} from ``comment pliant <kind> <value> <name>`` header lines."""
    out = {}
    for words in comments:
        if len(words) >= 4 and words[0] == "pliant" and words[1] == kind:
            try:
                out[int(words[2])] = " ".join(words[3:])
            except ValueError:
                continue
    return out


def load(path, data: bytes) -> MeshDoc:
    """Read PLY bytes (``path`` names the file in errors)."""
    encoding, body, elements, comments = _header(data, path)
    order = ">" if encoding == "binary_big_endian" else "<"
    values = {}
    if encoding == "ascii":
        lines = [ln for ln in data[body:].split(b"\n") if ln.strip()]
        pos = 0
        for el in elements:
            el.start = pos
            values[el.name], pos = _read_ascii(lines, pos, el, path)
            el.stop = pos
    else:
        pos = body
        for el in elements:
            el.start = pos
            values[el.name], pos = _read_binary(data, pos, el, order, path)
            el.stop = pos
    by_name = {el.name: el for el in elements}
    vertex = by_name.get("vertex")
    vals = values.get("vertex", {})
    if vertex is None or vertex.count == 0 or not {"x", "y", "z"} <= set(vals):
        raise MeshError(f"{path}: no vertices found (the PLY has no 'vertex' element with x, y, z)")
    vertices = np.stack([vals[k] for k in "xyz"], axis=1).astype(np.float64)
    if not np.all(np.isfinite(vertices)):
        raise MeshError(f"{path}: a vertex position is NaN or infinity")
    n = len(vertices)
    counts, corners, face_props = np.zeros(0, np.int64), np.zeros(0, np.int64), {}
    if "face" in values:
        fv = values["face"]
        key = next((k for k in ("vertex_indices", "vertex_index") if k in fv), None)
        if key is None or not isinstance(fv[key], tuple):
            raise MeshError(f"{path}: the 'face' element has no 'vertex_indices' list")
        counts, corners = fv[key][0], fv[key][1].astype(np.int64)
        if np.any(counts < 3):
            raise MeshError(f"{path}: a face has fewer than 3 corners")
        face_props = fv
    elif "tristrips" in values:
        sv = values["tristrips"]
        key = next((k for k in ("vertex_indices", "vertex_index") if k in sv), None)
        if key is None or not isinstance(sv[key], tuple):
            raise MeshError(f"{path}: the 'tristrips' element has no 'vertex_indices' list")
        tri = _strips(*sv[key])
        counts, corners = np.full(len(tri), 3, np.int64), tri.reshape(-1)
    if len(corners) and (corners.min() < 0 or corners.max() >= n):
        raise MeshError(f"{path}: a face index is out of range (file has {n} vertices)")
    polys = Polygons(counts.astype(np.int64), corners)
    faces = corners[polys.fan_triangles()] if len(corners) else np.zeros((0, 3), np.int64)
    uv = None
    for su, sv_ in _UV_NAMES:
        if su in vals and sv_ in vals:
            uv = np.stack([vals[su], vals[sv_]], axis=1).astype(np.float64)
            polys.uv, polys.uv_index = uv, corners
            break
    if uv is None and isinstance(face_props.get("texcoord"), tuple):
        k, flat = face_props["texcoord"]
        if np.array_equal(k, 2 * counts):
            polys.uv, polys.uv_index = flat.reshape(-1, 2).astype(np.float64), np.arange(len(corners))
    if {"nx", "ny", "nz"} <= set(vals):
        polys.normals = np.stack([vals[k] for k in ("nx", "ny", "nz")], axis=1).astype(np.float64)
        polys.normal_index = corners
    for kind in ("group", "material"):
        column = face_props.get(kind)
        if column is None or isinstance(column, tuple):
            continue
        names = _names(comments, kind)
        column = column.astype(np.int64)
        present = [v for v in sorted(set(column.tolist())) if v >= 0]
        if kind == "group":
            polys.groups = {names.get(v, f"group{v}"): np.flatnonzero(column == v) for v in present}
        else:
            polys.materials = tuple(names.get(v, f"material{v}") for v in present)
            remap = {v: i for i, v in enumerate(present)}
            polys.material_index = np.array([remap.get(v, -1) for v in column.tolist()], np.int64)
    patchable = all(p.count_type is None for p in vertex.props)
    dtype = (np.dtype([(p.name, order + p.type) for p in vertex.props])
             if patchable and encoding != "ascii" else None)
    normals = "recomputed" if patchable and polys.normals is not None else "absent"
    source = _PlySource(data, encoding, body, vertex if patchable else None, dtype)
    name = os.path.splitext(os.path.basename(os.fspath(path)))[0]
    doc = MeshDoc(vertices, faces, os.fspath(path), "ply", None if uv is None else uv, normals,
                  (MeshPart(name, 0, n),), source, polys.vertex_groups(), polys,
                  tuple(_unconverted(elements, vals)))
    if SOURCE_PROPERTY in vals:
        doc.source_vertex = vals[SOURCE_PROPERTY].astype(np.int64)
    return doc


def _unconverted(elements, vals):
    known = {"x", "y", "z", "nx", "ny", "nz", SOURCE_PROPERTY} | {n for p in _UV_NAMES for n in p}
    out = []
    if _COLOUR_NAMES & set(vals):
        out.append("vertex colours")
    other = [k for k in vals if k not in known and k not in _COLOUR_NAMES]
    if other:
        out.append("vertex properties " + ", ".join(other))
    extra = [el.name for el in elements if el.name not in ("vertex", "face", "tristrips")]
    if extra:
        out.append("PLY elements " + ", ".join(extra))
    return out


def save(doc: MeshDoc, vertices) -> bytes:
    """The source file with new positions (and recomputed normals) patched in where possible."""
    src: _PlySource = doc._source
    if src.vertex is None:
        return export(vertices, doc.polygons, binary=src.encoding != "ascii")
    normals, good = None, None
    if doc.normals_on_save == "recomputed":
        normals = surface.vertex_normals(vertices, doc.faces)
        good = np.any(normals != 0, axis=1)  # vertices with no area keep their stored normal
    el = src.vertex
    n = el.count
    if src.encoding != "ascii":
        dtype = src.vertex_dtype
        rec = np.frombuffer(src.data, dtype=dtype, count=n, offset=el.start).copy()
        for c, name in enumerate("xyz"):
            rec[name] = vertices[:, c]
        if normals is not None:
            for c, name in enumerate(("nx", "ny", "nz")):
                rec[name][good] = normals[good, c]
        return src.data[:el.start] + rec.tobytes() + src.data[el.stop:]
    # ASCII: rewrite the vertex element's lines, keep every other byte
    names = [p.name for p in el.props]
    cols = [names.index(k) for k in "xyz"]
    ncols = [names.index(k) for k in ("nx", "ny", "nz")] if normals is not None else []
    head, text = src.data[:src.body], src.data[src.body:]
    lines = text.split(b"\n")
    data_line = [i for i, ln in enumerate(lines) if ln.strip()]
    rows = vertices.tolist()
    nrows = normals.tolist() if normals is not None else None
    for r in range(n):
        i = data_line[el.start + r]
        line = lines[i]
        cr = line.endswith(b"\r")
        words = line.split()
        for c, j in enumerate(cols):
            words[j] = repr(rows[r][c]).encode()
        if nrows is not None and good[r]:
            for c, j in enumerate(ncols):
                words[j] = ("%.7g" % nrows[r][c]).encode()
        lines[i] = b" ".join(words) + (b"\r" if cr else b"")
    return head + b"\n".join(lines)


def export(vertices, polys: Polygons, *, binary=True, source_vertex=None) -> bytes:
    """A new PLY: per-vertex positions, normals and texture coordinates (``s t``), polygon
    faces, and pliant's ``group``/``material`` face properties named in header comments.

    vertices : (n, 3) float; polys : :class:`Polygons` whose ``uv_index`` and ``normal_index``,
    when present, equal ``corners`` (one value per vertex); source_vertex : (n,) int, optional.
    """
    n = len(vertices)
    vfields = [("x", "<f4" if binary else "<f8"), ("y", "<f4" if binary else "<f8"),
               ("z", "<f4" if binary else "<f8")]
    if polys.normals is not None:
        vfields += [("nx", "<f4"), ("ny", "<f4"), ("nz", "<f4")]
    if polys.uv is not None:
        vfields += [("s", "<f4"), ("t", "<f4")]
    if source_vertex is not None:
        vfields += [(SOURCE_PROPERTY, "<i4")]
    rec = np.zeros(n, np.dtype(vfields))
    for c, k in enumerate("xyz"):
        rec[k] = vertices[:, c]
    if polys.normals is not None:
        for c, k in enumerate(("nx", "ny", "nz")):
            rec[k] = polys.normals[:, c]
    if polys.uv is not None:
        rec["s"], rec["t"] = polys.uv[:, 0], polys.uv[:, 1]
    if source_vertex is not None:
        rec[SOURCE_PROPERTY] = source_vertex
    group = np.full(len(polys.counts), -1, np.int64)
    group_names = list(polys.groups)
    for i, name in enumerate(group_names):  # a polygon in several groups keeps the first
        members = np.asarray(polys.groups[name], np.int64)
        free = members[group[members] < 0]
        group[free] = i
    lines = ["ply", f"format {'binary_little_endian' if binary else 'ascii'} 1.0",
             "comment written by pliant"]
    lines += [f"comment pliant group {i} {name}" for i, name in enumerate(group_names)]
    lines += [f"comment pliant material {i} {name}" for i, name in enumerate(polys.materials)]
    lines.append(f"element vertex {n}")
    type_name = {"<f4": "float", "<f8": "double", "<i4": "int"}
    lines += [f"property {type_name[t]} {k}" for k, t in vfields]
    lines += [f"element face {len(polys.counts)}", "property list uchar int vertex_indices"]
    face_cols = []
    if group_names:
        lines.append("property int group")
        face_cols.append(group)
    if polys.materials:
        lines.append("property int material")
        face_cols.append(polys.material_index)
    lines.append("end_header")
    header = ("\n".join(lines) + "\n").encode("ascii", "replace")
    counts = np.asarray(polys.counts, np.int64)
    if counts.size and counts.max() > 255:
        raise MeshError("a polygon has more than 255 corners, more than a PLY face list holds here")
    starts = np.cumsum(counts) - counts
    if not binary:
        columns = [np.asarray(vertices, np.float64)]
        if polys.normals is not None:
            columns.append(np.asarray(polys.normals, np.float64))
        if polys.uv is not None:
            columns.append(np.asarray(polys.uv, np.float64))
        table = np.concatenate(columns, axis=1).tolist()
        src = None if source_vertex is None else np.asarray(source_vertex).tolist()
        vlines = [" ".join(map(repr, row)) + ("" if src is None else f" {src[i]}")
                  for i, row in enumerate(table)]
        corners = polys.corners.tolist()
        extra = [c.tolist() for c in face_cols]
        flines = []
        for i, (s, k) in enumerate(zip(starts.tolist(), counts.tolist())):
            words = [str(k)] + [str(v) for v in corners[s:s + k]] + [str(c[i]) for c in extra]
            flines.append(" ".join(words))
        return header + ("\n".join(vlines + flines) + "\n").encode("ascii")
    # binary faces: one record layout per distinct polygon size, scattered back in file order
    out = bytearray()
    row_size = 1 + 4 * counts + 4 * len(face_cols)
    offsets = np.cumsum(row_size) - row_size
    blob = np.zeros(int(row_size.sum()), np.uint8)
    for k in np.unique(counts).tolist():
        sel = np.flatnonzero(counts == k)
        dt = np.dtype([("n", "u1"), ("v", "<i4", (k,))] + [(f"c{j}", "<i4") for j in range(len(face_cols))])
        r = np.zeros(len(sel), dt)
        r["n"] = k
        r["v"] = polys.corners[starts[sel][:, None] + np.arange(k)]
        for j, col in enumerate(face_cols):
            r[f"c{j}"] = col[sel]
        raw = r.view(np.uint8).reshape(len(sel), dt.itemsize)
        blob[offsets[sel][:, None] + np.arange(dt.itemsize)] = raw
    out += header + rec.tobytes() + blob.tobytes()
    return bytes(out)
