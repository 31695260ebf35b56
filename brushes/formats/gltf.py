"""GLB and glTF 2.0 files: every mesh posed in world space, written back in its own space.

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
import struct
import urllib.parse
from dataclasses import dataclass

import numpy as np

from brushes import surface

from ._parsing import one_line
from .document import MeshDoc, MeshError, MeshPart, Polygons

__all__ = ["load", "save", "export", "SOURCE_ATTRIBUTE"]


_GLB_MAGIC = 0x46546C67
_CHUNK_JSON = 0x4E4F534A
_CHUNK_BIN = 0x004E4942
_COMPONENT = {5120: "i1", 5121: "u1", 5122: "i2", 5123: "u2", 5125: "u4", 5126: "f4"}
_NCOMP = {"SCALAR": 1, "VEC2": 2, "VEC3": 3, "VEC4": 4, "MAT2": 4, "MAT3": 9, "MAT4": 16}
_ARRAY_BUFFER, _ELEMENT_ARRAY_BUFFER = 34962, 34963
SOURCE_ATTRIBUTE = "_SOURCE_VERTEX"  # pliant's own vertex attribute (glTF 2.0 allows "_" names)
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
                raise MeshError(f"{path}: buffer {i} has a bad data URI ({one_line(exc)})") from None
        else:
            ref = os.path.join(folder, urllib.parse.unquote(uri))
            try:
                with open(ref, "rb") as f:
                    data = f.read()
            except OSError as exc:
                raise MeshError(f"{path}: cannot read buffer file {uri!r} ({one_line(exc)})") from None
        if len(data) < b.get("byteLength", 0):
            raise MeshError(f"{path}: buffer {i} is shorter than its byteLength")
        buffers.append(data)
    return buffers


def load(path, data: bytes, fmt: str) -> MeshDoc:
    """Read GLB (``fmt="glb"``) or glTF JSON bytes; buffers are read relative to ``path``."""
    folder = os.path.dirname(os.path.abspath(os.fspath(path)))
    if fmt == "glb":
        jtext, binchunk = _parse_glb(data, path)
    else:
        jtext, binchunk = data, None
    try:
        gltf = json.loads(jtext.decode("utf-8"))
    except (UnicodeDecodeError, ValueError) as exc:
        raise MeshError(f"{path}: not valid glTF JSON ({one_line(exc)})") from None
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
        raise MeshError(f"{path}: malformed glTF ({type(exc).__name__}: {one_line(exc)})") from None


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
    all_v, all_f, all_uv, all_n, all_src = [], [], [], [], []
    parts, records = [], []
    owner: dict[int, int] = {}
    start = 0
    uv_ok = normals_ok = source_ok = True
    face_material: list[np.ndarray] = []
    material_names = _material_names(gltf)
    for node_i, mesh_i, world in visits:
        if abs(np.linalg.det(world[:3, :3])) < 1e-300:
            raise MeshError(f"{path}: node {node_i} has a singular transform (zero scale)")
        mesh = gltf["meshes"][mesh_i]
        by_acc: dict[int, _GltfPart] = {}
        materials_of: dict[int, list] = {}
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
                uv_ok = uv_ok and _vertex_attribute(gltf, buffers, prim, "TEXCOORD_0", 2, path,
                                                    all_uv)
                if normals_ok and _vertex_attribute(gltf, buffers, prim, "NORMAL", 3, path, all_n):
                    inv_t = np.linalg.inv(world[:3, :3]).T  # normals map by the inverse transpose
                    n = all_n[-1] @ inv_t.T
                    length = np.linalg.norm(n, axis=1, keepdims=True)
                    all_n[-1] = np.divide(n, length, out=np.zeros_like(n), where=length > 0)
                else:
                    normals_ok = False
                source_ok = source_ok and _vertex_attribute(gltf, buffers, prim, SOURCE_ATTRIBUTE,
                                                            1, path, all_src)
                start += len(pos)
            else:
                part.faces = np.concatenate([part.faces, faces])
                if part.normal != nrm:
                    part.normal = None  # primitives disagree on the normal accessor: keep as is
            materials_of.setdefault(ai, []).append(
                np.full(len(faces), prim.get("material", -1), np.int64))
        for ai, part in by_acc.items():
            all_f.append(part.faces + part.start)
            face_material.extend(materials_of[ai])
            records.append(part)
            name = gltf["nodes"][node_i].get("name") or mesh.get("name") or f"node{node_i}"
            parts.append(MeshPart(name, part.start, part.stop, node_i, mesh_i))
    if not all_v or start == 0:
        raise MeshError(f"{path}: no mesh vertices found in the scene")
    vertices = np.concatenate(all_v)
    faces = np.concatenate(all_f).astype(np.int64) if all_f else np.zeros((0, 3), np.int64)
    uv = np.concatenate(all_uv) if uv_ok and all_uv else None
    if uv is not None:  # glTF's texture origin is the image's top left; pliant's (OBJ's) bottom left
        uv = np.stack([uv[:, 0], 1.0 - uv[:, 1]], axis=1)
    normals = "recomputed" if any(p.normal is not None for p in records) else "absent"
    source = _GltfSource(gltf, buffers, fmt == "glb", folder, records)
    polys = Polygons.from_triangles(faces)
    if uv is not None:
        polys.uv, polys.uv_index = uv, polys.corners
    if normals_ok and all_n:
        polys.normals, polys.normal_index = np.concatenate(all_n), polys.corners
    used = np.concatenate(face_material) if face_material else np.zeros(0, np.int64)
    if np.any(used >= 0):
        present = sorted(set(used[used >= 0].tolist()))
        polys.materials = tuple(material_names[i] for i in present)
        remap = np.full(max(present) + 2, -1, np.int64)
        remap[present] = np.arange(len(present))
        polys.material_index = remap[used]
    tri_start = np.cumsum([0] + [len(f) for f in all_f])
    for k, part in enumerate(parts):
        members = np.arange(tri_start[k], tri_start[k + 1], dtype=np.int64)
        prev = polys.groups.get(part.name)
        polys.groups[part.name] = members if prev is None else np.concatenate([prev, members])
    groups = {}
    for part in parts:
        groups.setdefault(part.name, []).append(np.arange(part.start, part.stop, dtype=np.int64))
    groups = {k: np.concatenate(v) for k, v in groups.items()}
    doc = MeshDoc(vertices, faces, os.fspath(path), fmt, uv, normals, tuple(parts), source, groups,
                  polys, _unconverted(gltf))
    if source_ok and all_src:
        doc.source_vertex = np.concatenate(all_src)[:, 0].astype(np.int64)
    return doc


def _material_names(gltf):
    """A unique name per material (its own name, else ``material<i>``)."""
    names, seen = [], set()
    for i, m in enumerate(gltf.get("materials", [])):
        name = m.get("name") or f"material{i}"
        while name in seen:
            name = f"{name}_{i}"
        seen.add(name)
        names.append(name)
    return names


def _vertex_attribute(gltf, buffers, prim, semantic, width, path, out):
    """Append the primitive's ``semantic`` attribute as (count, width) float64; False if absent."""
    index = prim.get("attributes", {}).get(semantic)
    if index is None:
        return False
    values, acc = _accessor_array(gltf, buffers, index, path)
    if values.shape[1] != width or (values.dtype != np.float32 and semantic != SOURCE_ATTRIBUTE):
        return False
    out.append(values.astype(np.float64))
    return True


def _unconverted(gltf):
    """What a glTF holds that no conversion carries, as labels for the dropped-list."""
    out = []
    if gltf.get("textures") or gltf.get("images"):
        out.append("textures and images")
    if any(set(m) - {"name"} for m in gltf.get("materials", [])):
        out.append("material properties (names are kept)")
    for key, label in (("animations", "animations"), ("skins", "skins"), ("cameras", "cameras")):
        if gltf.get(key):
            out.append(label)
    attrs = {a for m in gltf.get("meshes", []) for p in m.get("primitives", [])
             for a in p.get("attributes", {})}
    if any(a.startswith("COLOR_") for a in attrs):
        out.append("vertex colours")
    if any(a.startswith("TEXCOORD_") and a != "TEXCOORD_0" for a in attrs):
        out.append("texture coordinate sets after the first")
    if any(a.startswith(("JOINTS_", "WEIGHTS_")) for a in attrs):
        out.append("skin weights")
    if any(p.get("targets") for m in gltf.get("meshes", []) for p in m.get("primitives", [])):
        out.append("morph targets")
    return out



def _float_list(a):
    return [float(x) for x in a]


def save(doc: MeshDoc, vertices, path, fmt) -> dict:
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
                n = surface.vertex_normals(stored, part.faces)
                good = np.any(n != 0, axis=1)  # vertices with no area keep their stored normal
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


def export(vertices, polys: Polygons, *, glb=True, source_vertex=None, name="mesh"):
    """A new glTF 2.0 (GLB, or ``.gltf`` with an embedded buffer) from per-vertex data.

    Polygons are fan-triangulated. Each group becomes one node with one mesh of its name (a
    polygon in several groups goes to the first; polygons in none to a node called ``name``),
    holding its own vertices; each material is one primitive with a material of that name.
    ``source_vertex`` (n,) int, when given, is written as the ``_SOURCE_VERTEX`` attribute.

    vertices : (n, 3) float; polys : :class:`Polygons` whose ``uv_index``/``normal_index``
    equal ``corners``. Returns (bytes, number of vertices written).
    """
    vertices = np.asarray(vertices, np.float64)
    written = 0
    tri_poly = polys.triangle_polygon
    tris = polys.corners[polys.fan_triangles()] if len(polys.corners) else np.zeros((0, 3), np.int64)
    owner = np.full(len(polys.counts), -1, np.int64)
    names = list(polys.groups)
    for i, g in enumerate(names):
        members = np.asarray(polys.groups[g], np.int64)
        owner[members[owner[members] < 0]] = i
    tri_owner = owner[tri_poly]
    mat = (polys.material_index[tri_poly] if polys.material_index is not None
           else np.full(len(tris), -1, np.int64))
    buf = BufferBuilder()

    nodes, meshes = [], []
    order = [i for i in range(len(names)) if np.any(tri_owner == i)]
    if np.any(tri_owner < 0):
        order.append(-1)
    for part in order:
        sel = np.flatnonzero(tri_owner == part)
        used, local = np.unique(tris[sel], return_inverse=True)
        local = local.reshape(-1, 3)
        pos = vertices[used].astype(np.float32)
        written += len(used)
        attributes = {"POSITION": buf.add(pos, "VEC3", 5126, target=_ARRAY_BUFFER, bounds=True)}
        if polys.normals is not None:
            n = np.asarray(polys.normals, np.float64)[used]
            length = np.linalg.norm(n, axis=1, keepdims=True)
            n = np.divide(n, length, out=np.tile([0.0, 0.0, 1.0], (len(n), 1)), where=length > 0)
            attributes["NORMAL"] = buf.add(n.astype(np.float32), "VEC3", 5126, target=_ARRAY_BUFFER)
        if polys.uv is not None:
            uv = np.asarray(polys.uv, np.float64)[used]
            uv = np.stack([uv[:, 0], 1.0 - uv[:, 1]], axis=1)  # to glTF's top-left origin
            attributes["TEXCOORD_0"] = buf.add(uv.astype(np.float32), "VEC2", 5126, target=_ARRAY_BUFFER)
        if source_vertex is not None:
            attributes[SOURCE_ATTRIBUTE] = buf.add(np.asarray(source_vertex, np.float32)[used], "SCALAR", 5126,
                                                   target=_ARRAY_BUFFER)
        primitives = []
        for m in sorted(set(mat[sel].tolist())):
            idx = local[mat[sel] == m].reshape(-1)
            ctype, dt = (5123, np.uint16) if len(used) <= 65535 else (5125, np.uint32)
            prim = {"attributes": dict(attributes),
                    "indices": buf.add(idx.astype(dt), "SCALAR", ctype, target=_ELEMENT_ARRAY_BUFFER),
                    "mode": 4}
            if m >= 0:
                prim["material"] = int(m)
            primitives.append(prim)
        label = names[part] if part >= 0 else name
        meshes.append({"name": label, "primitives": primitives})
        nodes.append({"name": label, "mesh": len(meshes) - 1})
    binary = buf.binary()
    gltf = {"asset": {"version": "2.0", "generator": "pliant"}, "scene": 0,
            "scenes": [{"nodes": list(range(len(nodes)))}], "nodes": nodes, "meshes": meshes,
            "accessors": buf.accessors, "bufferViews": buf.views,
            "buffers": [{"byteLength": len(binary)}]}
    if polys.materials:
        gltf["materials"] = [{"name": m} for m in polys.materials]
    return container(gltf, binary, glb=glb), written


class BufferBuilder:
    """One glTF binary buffer (buffer 0) built from arrays, for the writers of this package,
    `brushes.correctives` and `brushes.animate`.

    `add(arr, kind, ctype, *, target=None, bounds=False)` appends the array's bytes as a buffer
    view (4-byte aligned, as glTF 2.0 requires) and an accessor, and returns the accessor's
    index; ``bounds`` records the exact min and max per component (required for POSITION and
    animation inputs). `views` and `accessors` are the JSON lists; `binary()` the buffer.
    """

    def __init__(self):
        self.views, self.accessors, self._blobs, self._offset = [], [], [], 0

    def add(self, arr, kind, ctype, *, target=None, bounds=False):
        arr = np.ascontiguousarray(arr)
        raw = arr.tobytes()
        view = {"buffer": 0, "byteOffset": self._offset, "byteLength": len(raw)}
        if target is not None:
            view["target"] = target
        self.views.append(view)
        acc = {"bufferView": len(self.views) - 1, "componentType": ctype, "count": int(len(arr)), "type": kind}
        if bounds:
            flat = arr.reshape(len(arr), -1)
            acc["min"] = [float(v) for v in flat.min(axis=0)]
            acc["max"] = [float(v) for v in flat.max(axis=0)]
        self.accessors.append(acc)
        raw += b"\0" * (-len(raw) % 4)
        self._blobs.append(raw)
        self._offset += len(raw)
        return len(self.accessors) - 1

    def binary(self):
        return b"".join(self._blobs)


def container(gltf, binary, *, glb):
    """GLB bytes, or glTF JSON with the buffer as a base64 data URI (``gltf["buffers"][0]``)."""
    if not glb:
        gltf["buffers"][0]["uri"] = ("data:application/octet-stream;base64,"
                                     + base64.b64encode(binary).decode("ascii"))
        return (json.dumps(gltf, indent=1) + "\n").encode("utf-8")
    jbytes = json.dumps(gltf, separators=(",", ":")).encode("utf-8")
    jbytes += b" " * (-len(jbytes) % 4)
    binary += b"\0" * (-len(binary) % 4)
    chunks = (struct.pack("<II", len(jbytes), _CHUNK_JSON) + jbytes
              + struct.pack("<II", len(binary), _CHUNK_BIN) + binary)
    return struct.pack("<III", _GLB_MAGIC, 2, 12 + len(chunks)) + chunks
