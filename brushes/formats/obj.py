"""OBJ files, parsed and written by pliant (numpy bulk parsing), keeping the file's structure.

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
"""
from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np

from brushes import surface

from ._parsing import fan, gather, parse_numbers, run_splice, split_lines, tokens
from .document import MeshDoc, MeshError, MeshPart, Polygons

__all__ = ["load", "save", "export"]


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
    blob, off = gather(buf, s, e, idx)
    tok = tokens(blob, off)
    short = tok.counts < minimum
    if short.any():
        line = int(idx[np.flatnonzero(short)[0]]) + 1
        raise MeshError(f"{path}: line {line}: '{what}' needs at least {minimum} numbers")
    values = parse_numbers(tok.blob, int(tok.counts.sum()), np.float64, f"{path}: '{what}' line")
    return idx, s, off, tok, values


def _first_columns(values, counts, k):
    """The first ``k`` numbers of each line: (lines, k)."""
    if len(counts) and np.all(counts == k):
        return values.reshape(-1, k)
    off = np.cumsum(counts) - counts
    return values[off[:, None] + np.arange(k)]


def load(path, data: bytes) -> MeshDoc:
    """Read OBJ bytes (``path`` names the file in errors)."""
    buf, starts, ends = split_lines(data)
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
    unconverted = []
    if len(fidx):
        s, e = kw[fidx] + 1, ends[fidx]
        blob, off = gather(buf, s, e, fidx)
        tok = tokens(blob, off)
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
            vals = parse_numbers(sel, int(present.sum()), np.int64, f"{path}: 'f' line")
            count_before = np.searchsorted(np.flatnonzero(before_mask), fidx)[corner_line[present]]
            return present, vals, count_before

        pres0, v_ref, v_before = component(0, is_v)
        if not pres0.all():
            raise MeshError(f"{path}: a face corner has no vertex index")
        corners = _resolve(v_ref, v_before, nv, path, "vertex")
        tri = fan(tok.counts, corners)
        faces = corners[tri]
        polys = Polygons(tok.counts.astype(np.int64), corners.astype(np.int64))

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
                polys.uv, polys.uv_index = cols, t_corner
                cuv = cols[t_corner]
                per_vertex = np.zeros((nv, 2))
                per_vertex[corners] = cuv
                if np.array_equal(per_vertex[corners], cuv):
                    uv = per_vertex
            elif pres1.any():
                unconverted.append("texture coordinates (only some face corners have them)")
        if vn_count:
            pres2, n_ref, n_before = component(2, is_vn)
            n_corner = np.full(ncorner, -1, np.int64)
            n_corner[pres2] = _resolve(n_ref, n_before, vn_count, path, "normal")
            used = n_corner >= 0
            nidx, _, _, ntok, nvals = _obj_floats(buf, kw, ends, is_vn, 2, path, "vn", 3)
            if used.all():
                polys.normals, polys.normal_index = _first_columns(nvals, ntok.counts, 3), n_corner
            elif used.any():
                unconverted.append("normals (only some face corners have them)")
            owner = np.full(vn_count, -1, np.int64)
            owner[n_corner[used]] = corners[used]
            if np.array_equal(owner[n_corner[used]], corners[used]):
                tri_vn = n_corner[tri]
                source.vn_starts = starts[nidx]
                source.vn_ends = ends[nidx]
                source.vn_old = _first_columns(nvals, ntok.counts, 3)
                source.tri_vn = tri_vn
                normals = "recomputed"
        polys.groups = _face_names(data, buf, kw, ends, fidx, b"g", split=True)
        materials = _face_names(data, buf, kw, ends, fidx, b"usemtl", split=False)
        if materials:
            polys.materials = tuple(materials)
            polys.material_index = np.full(len(fidx), -1, np.int64)
            for j, members in enumerate(materials.values()):
                polys.material_index[members] = j
    else:
        polys = Polygons(np.zeros(0, np.int64), np.zeros(0, np.int64))
    unconverted.extend(_other_statements(data, buf, kw, ends, is_v, is_vt, is_vn, is_f, vtok))
    if len(faces) == 0:
        faces = np.zeros((0, 3), np.int64)
    name = os.path.splitext(os.path.basename(os.fspath(path)))[0]
    return MeshDoc(
        vertices, faces.astype(np.int64), os.fspath(path), "obj", uv, normals,
        (MeshPart(name, 0, nv),), source, polys.vertex_groups(), polys, tuple(unconverted),
    )


def _keyword_lines(buf, kw, ends, word):
    """Line numbers whose keyword is ``word`` (bytes), followed by a blank or the line end."""
    k = len(word)
    length = ends - kw
    hit = length >= k
    for i, ch in enumerate(word):
        hit &= buf[np.minimum(kw + i, len(buf) - 1)] == ch
    after = buf[np.minimum(kw + k, len(buf) - 1)]
    return np.flatnonzero(hit & ((length == k) | ((after == 32) | (after == 9))))


def _face_names(data, buf, kw, ends, fidx, word, *, split):
    """{name: (q,) polygon indices} from ``g`` or ``usemtl`` lines: each face takes the name(s)
    of the last such line before it (a ``g`` line may name several groups), in order of first
    use."""
    lines = _keyword_lines(buf, kw, ends, word)
    if not len(lines) or not len(fidx):
        return {}
    owner = np.searchsorted(lines, fidx, side="right") - 1  # per face: which line, -1 none
    out = {}
    for j, line in enumerate(lines.tolist()):
        text = data[int(kw[line]) + len(word):int(ends[line])].decode("utf-8", "replace")
        text = text.split("#", 1)[0]
        names = text.split() if split else ([text.strip()] if text.strip() else [])
        members = np.flatnonzero(owner == j)
        if not len(members):
            continue
        for name in names:
            prev = out.get(name)
            out[name] = members if prev is None else np.concatenate([prev, members])
    return {k: np.unique(v).astype(np.int64) for k, v in out.items()}


def _other_statements(data, buf, kw, ends, is_v, is_vt, is_vn, is_f, vtok):
    """What an OBJ holds that no conversion carries, as labels for the dropped-list."""
    out = []
    if len(vtok.counts) and np.any(vtok.counts >= 6):
        out.append("vertex colours")
    for word, label in ((b"mtllib", "material definitions (the .mtl file; names are kept)"),
                        (b"l", "line elements"), (b"p", "point elements"),
                        (b"s", "smoothing groups"), (b"o", "object names")):
        if len(_keyword_lines(buf, kw, ends, word)):
            out.append(label)
    return out


def _resolve(ref, before, count, path, what):
    """OBJ indices (1-based, or negative relative to the elements read so far) -> 0-based."""
    out = np.where(ref > 0, ref - 1, before + ref)
    bad = (ref == 0) | (out < 0) | (out >= count)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise MeshError(f"{path}: {what} index {int(ref[i])} out of range (file has {count})")
    return out


def save(doc: MeshDoc, vertices) -> bytes:
    """The source file's bytes with its ``v`` (and recomputable ``vn``) lines rewritten."""
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
        # area-weighted sums as in surface.vertex_normals, binned by normal slot, not by vertex
        fn = surface.face_cross_products(vertices, doc.faces)
        used = (src.tri_vn >= 0).ravel()
        slot = src.tri_vn.ravel()[used]
        rows = np.repeat(fn, 3, axis=0)[used]
        acc = np.stack([np.bincount(slot, weights=rows[:, c], minlength=len(src.vn_old))
                        for c in range(3)], axis=1)
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

    return run_splice(src.data, starts, ends, key, render)


def export(vertices, polys: Polygons) -> bytes:
    """A new OBJ from polygons: ``v``, ``vt``, ``vn`` and ``f v/vt/vn`` lines, a ``g`` line where
    the polygons' groups change and a ``usemtl`` line where their material changes.

    vertices : (n, 3) float; polys : :class:`Polygons` (its indices are written as they are, so
    texture seams need no split vertices).
    """
    vertices = np.asarray(vertices, np.float64)
    out = ["# written by pliant\n"]
    out.append(("v %r %r %r\n" * len(vertices)) % tuple(vertices.ravel().tolist()))
    if polys.uv is not None:
        out.append(("vt %r %r\n" * len(polys.uv)) % tuple(np.asarray(polys.uv, float).ravel().tolist()))
    if polys.normals is not None:
        out.append(("vn %.9g %.9g %.9g\n" * len(polys.normals))
                   % tuple(np.asarray(polys.normals, float).ravel().tolist()))
    cols = [polys.corners + 1]
    if polys.uv is not None:
        cols.append(polys.uv_index + 1)
    if polys.normals is not None:
        cols.append(polys.normal_index + 1)
    if len(cols) == 1:
        corner = [str(v) for v in cols[0].tolist()]
    elif len(cols) == 2 and polys.uv is not None:
        corner = [f"{a}/{b}" for a, b in zip(cols[0].tolist(), cols[1].tolist())]
    elif len(cols) == 2:
        corner = [f"{a}//{b}" for a, b in zip(cols[0].tolist(), cols[1].tolist())]
    else:
        corner = [f"{a}/{b}/{c}" for a, b, c in zip(*(c.tolist() for c in cols))]
    member = [[] for _ in range(len(polys.counts))]
    for name, polys_in in polys.groups.items():
        for p in np.asarray(polys_in).tolist():
            member[p].append(name)
    mats = polys.material_index.tolist() if polys.material_index is not None else None
    last_group, last_mat = (), -1
    start = 0
    for i, k in enumerate(polys.counts.tolist()):
        names = tuple(member[i])
        if names != last_group:
            out.append("g " + " ".join(names) + "\n" if names else "g\n")
            last_group = names
        if mats is not None and mats[i] != last_mat and mats[i] >= 0:
            out.append(f"usemtl {polys.materials[mats[i]]}\n")
            last_mat = mats[i]
        out.append("f " + " ".join(corner[start:start + k]) + "\n")
        start += k
    return "".join(out).encode("utf-8")
