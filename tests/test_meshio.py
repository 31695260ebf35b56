"""Tests for brushes.meshio: every format round-trips keeping vertex order and structure.

Geometry is checked against trimesh (an independent reader); structure is checked by our own
line-by-line text comparison and by comparing raw bytes outside the vertex positions.
"""

import base64
import json
import os
import shutil
import struct
import subprocess

import numpy as np
import pytest
import trimesh

from brushes.meshio import MeshDoc, MeshError, load_mesh, save_mesh

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _pose(v):
    """A non-rigid test deformation: shear plus a bend (any smooth map would do)."""
    v = np.asarray(v, dtype=np.float64)
    return np.stack([v[:, 0] + 0.3 * v[:, 1], v[:, 1] + 0.1 * v[:, 0] ** 2, v[:, 2] * 1.5 - 0.2], 1)


# --------------------------------------------------------------------------- OBJ

OBJ_STRUCTURED = """\
# toy workshop mascot: a tiny test piece
mtllib mascot.mtl
o body
v 0 0 0 1 0 0
v 1 0 0 0 1 0
v 1 1 0 0 0 1
v 0 1 0 1 1 0
v 0.5 1.5 0 0 1 1
vt 0 0
vt 1 0
vt 1 1
vt 0 1
vt 0.5 1
vt 0.25 0.25
g front
usemtl paint
s 1
f 1/1 2/2 3/3 4/4
f 4/4 3/3 5/5
g back
usemtl wood
s off
v 0.5 0.5 -1 0.2 0.2 0.2
f 1/6 5/5 6/1
l 1 2
"""


def _write(path, text, newline="\n"):
    with open(path, "w", newline=newline) as f:
        f.write(text)


def _non_v_lines(text):
    return [ln for ln in text.splitlines() if not (ln.startswith("v ") or ln == "v")]


def _v_lines(text):
    return [ln.split() for ln in text.splitlines() if ln.startswith("v ")]


def test_obj_round_trip_changes_only_v_lines(tmp_path):
    src = tmp_path / "mascot.obj"
    _write(src, OBJ_STRUCTURED)
    doc = load_mesh(src)
    assert doc.format == "obj" and doc.vertices.shape == (6, 3)
    posed = _pose(doc.vertices)
    out = tmp_path / "posed.obj"
    save_mesh(doc, out, posed)
    before, after = src.read_text(), out.read_text()
    # structure: every non-v line byte-identical and in place (our own text diff)
    assert _non_v_lines(after) == _non_v_lines(before)
    assert len(after.splitlines()) == len(before.splitlines())
    # positions: independent float() parse of the written text; colours kept verbatim
    rows = _v_lines(after)
    got = np.array([[float(x) for x in r[1:4]] for r in rows])
    np.testing.assert_array_equal(got, posed)  # repr() round-trips float64 exactly
    assert [r[4:] for r in rows] == [r[4:] for r in _v_lines(before)]


def test_obj_geometry_and_colours_match_trimesh(tmp_path):
    src = tmp_path / "mascot.obj"
    _write(src, OBJ_STRUCTURED)
    doc = load_mesh(src)
    out = tmp_path / "posed.obj"
    posed = _pose(doc.vertices)
    save_mesh(doc, out, posed)
    # independent reader: trimesh splits vertices at texture seams, groups faces by material
    # and triangulates quads its own way, so compare positions and colours per position
    ref = trimesh.load(out, process=False, maintain_order=True, force="mesh")
    ref_src = trimesh.load(src, process=False, maintain_order=True, force="mesh")
    colour_of = {tuple(np.round(p, 9)): tuple(c) for p, c in
                 zip(ref.vertices, ref.visual.to_color().vertex_colors)}
    assert set(colour_of) == {tuple(np.round(p, 9)) for p in posed}
    colour_src = {tuple(np.round(p, 9)): tuple(c) for p, c in
                  zip(ref_src.vertices, ref_src.visual.to_color().vertex_colors)}
    for p, q in zip(posed, doc.vertices):
        assert colour_of[tuple(np.round(p, 9))] == colour_src[tuple(np.round(q, 9))]


def test_obj_faces_fan_triangulated_by_hand():
    # hand-derived from OBJ_STRUCTURED: quad 1 2 3 4 -> (0,1,2),(0,2,3); then 4 3 5; then 1 5 6
    expected = [[0, 1, 2], [0, 2, 3], [3, 2, 4], [0, 4, 5]]
    import tempfile

    with tempfile.TemporaryDirectory() as d:
        p = os.path.join(d, "m.obj")
        _write(p, OBJ_STRUCTURED)
        doc = load_mesh(p)
    np.testing.assert_array_equal(doc.faces, expected)
    # uv: vertex 0 uses vt 1 and vt 6 (a seam) -> no per-vertex uv
    assert doc.uv is None


def test_obj_negative_indices_and_crlf(tmp_path):
    text = (
        "v 0 0 0\nv 1 0 0\nv 0 1 0\nvt 0 0\nvt 1 0\nvt 0 1\n"
        "f -3/-3 -2/-2 -1/-1\n"
        "v 0 0 1\nf 1 -2 -1\n"
    )
    p = tmp_path / "neg.obj"
    _write(p, text, newline="\r\n")
    doc = load_mesh(p)
    # hand-resolved: first face uses vertices 1,2,3; second: 1, (4-2+1)=3, 4 (1-based)
    np.testing.assert_array_equal(doc.faces, [[0, 1, 2], [0, 2, 3]])
    assert doc.uv is None  # the second face has no texture corners
    out = tmp_path / "out.obj"
    save_mesh(doc, out, doc.vertices + 2.0)
    raw_in, raw_out = p.read_bytes(), out.read_bytes()
    assert raw_out.count(b"\r\n") == raw_in.count(b"\r\n")  # line endings kept
    assert raw_out.split(b"\r\n")[0] == b"v 2.0 2.0 2.0"
    assert _non_v_lines(raw_out.decode()) == _non_v_lines(raw_in.decode())


def test_obj_per_vertex_uv(tmp_path):
    text = "v 0 0 0\nv 1 0 0\nv 0 1 0\nvt 0.1 0.2\nvt 0.3 0.4\nvt 0.5 0.6\nf 1/1 2/2 3/3\n"
    p = tmp_path / "uv.obj"
    _write(p, text)
    doc = load_mesh(p)
    np.testing.assert_array_equal(doc.uv, [[0.1, 0.2], [0.3, 0.4], [0.5, 0.6]])


def _grid_obj(k=4, *, shared_normal=False):
    """A flat k x k grid in z = 0 with one vn per vertex (or one vn shared by all)."""
    lines = []
    for i in range(k):
        for j in range(k):
            lines.append(f"v {i} {j} 0")
    if shared_normal:
        lines.append("vn 0 0 1")
    else:
        lines += ["vn 0 0 1"] * (k * k)
    for i in range(k - 1):
        for j in range(k - 1):
            a, b, c, d = i * k + j + 1, (i + 1) * k + j + 1, (i + 1) * k + j + 2, i * k + j + 2
            n = [1] * 4 if shared_normal else [a, b, c, d]
            lines.append(f"f {a}//{n[0]} {b}//{n[1]} {c}//{n[2]} {d}//{n[3]}")
    return "\n".join(lines) + "\n"


def test_obj_normals_recomputed_when_per_vertex(tmp_path):
    p = tmp_path / "grid.obj"
    _write(p, _grid_obj())
    doc = load_mesh(p)
    assert doc.normals_on_save == "recomputed"
    # rotate 90 degrees about x: the plane z=0 maps to y=0 and its normal (0,0,1) to (0,-1,0)
    rot = np.array([[1, 0, 0], [0, 0, -1], [0, 1, 0]], dtype=float)
    out = tmp_path / "out.obj"
    save_mesh(doc, out, doc.vertices @ rot.T)
    vn = np.array([[float(x) for x in ln.split()[1:]] for ln in out.read_text().splitlines()
                   if ln.startswith("vn ")])
    np.testing.assert_allclose(vn, np.tile([0, -1, 0], (16, 1)), atol=1e-7)  # hand-computed
    assert [ln for ln in out.read_text().splitlines() if ln.startswith("f ")] == \
        [ln for ln in p.read_text().splitlines() if ln.startswith("f ")]


def test_obj_shared_normals_kept(tmp_path):
    p = tmp_path / "grid.obj"
    _write(p, _grid_obj(shared_normal=True))
    doc = load_mesh(p)
    assert doc.normals_on_save == "kept"
    out = tmp_path / "out.obj"
    save_mesh(doc, out, doc.vertices * 2)
    assert _non_v_lines(out.read_text()) == _non_v_lines(p.read_text())


def test_obj_normals_match_trimesh_on_curved_mesh(tmp_path):
    sphere = trimesh.creation.icosphere(subdivisions=1)
    v, f = sphere.vertices, sphere.faces
    text = ("v %r %r %r\n" * len(v)) % tuple(v.ravel().tolist()) + ("vn 0 0 1\n" * len(v))
    text += ("f %d//%d %d//%d %d//%d\n" * len(f)) % tuple(np.repeat(f.ravel() + 1, 2))
    p = tmp_path / "s.obj"
    _write(p, text)
    doc = load_mesh(p)
    posed = _pose(v)
    out = tmp_path / "o.obj"
    save_mesh(doc, out, posed)
    vn = np.array([[float(x) for x in ln.split()[1:]] for ln in out.read_text().splitlines()
                   if ln.startswith("vn ")])
    # independent: area-weighted vertex normals from trimesh's face normals and areas
    m = trimesh.Trimesh(posed, f, process=False)
    ref = np.zeros((len(v), 3))
    for k in range(3):
        np.add.at(ref, f[:, k], m.face_normals * m.area_faces[:, None])
    ref /= np.linalg.norm(ref, axis=1, keepdims=True)
    np.testing.assert_allclose(vn, ref, atol=1e-6)


# --------------------------------------------------------------------------- PLY / STL / OFF


def _binary_ply(path, vertices, faces_polys, uv, colors):
    """A little-endian PLY with normals, colours, uv and polygon faces, written by hand."""
    n = len(vertices)
    vdt = np.dtype([("x", "<f4"), ("y", "<f4"), ("z", "<f4"), ("nx", "<f4"), ("ny", "<f4"),
                    ("nz", "<f4"), ("red", "u1"), ("green", "u1"), ("blue", "u1"),
                    ("s", "<f4"), ("t", "<f4")])
    rec = np.zeros(n, vdt)
    for c, k in enumerate("xyz"):
        rec[k] = vertices[:, c]
    rec["nz"] = 1
    rec["red"], rec["green"], rec["blue"] = colors.T
    rec["s"], rec["t"] = uv.T
    header = (
        "ply\nformat binary_little_endian 1.0\ncomment toy workshop test piece\n"
        f"element vertex {n}\n"
        "property float x\nproperty float y\nproperty float z\n"
        "property float nx\nproperty float ny\nproperty float nz\n"
        "property uchar red\nproperty uchar green\nproperty uchar blue\n"
        "property float s\nproperty float t\n"
        f"element face {len(faces_polys)}\nproperty list uchar int vertex_indices\nend_header\n"
    )
    body = b"".join(struct.pack("<B", len(p)) + struct.pack(f"<{len(p)}i", *p) for p in faces_polys)
    path.write_bytes(header.encode() + rec.tobytes() + body)
    return header, rec, body


def test_ply_binary_in_place(tmp_path):
    rng = np.random.default_rng(1)
    verts = np.array([[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0], [0.5, 0.5, 1]], float)
    # (trimesh's binary PLY reader needs faces of one size, so the base is two triangles)
    polys = [[0, 2, 1], [0, 3, 2], [0, 1, 4], [1, 2, 4], [2, 3, 4], [3, 0, 4]]
    uv = rng.random((5, 2))
    colors = rng.integers(0, 255, (5, 3))
    src = tmp_path / "p.ply"
    header, rec, body = _binary_ply(src, verts, polys, uv, colors)
    doc = load_mesh(src)
    assert doc.normals_on_save == "recomputed"
    posed = _pose(verts)
    out = tmp_path / "o.ply"
    save_mesh(doc, out, posed)
    raw = out.read_bytes()
    assert raw.startswith(header.encode()) and raw.endswith(body)  # header and faces byte-identical
    got = np.frombuffer(raw, rec.dtype, count=5, offset=len(header))
    for k in ("red", "green", "blue", "s", "t"):
        np.testing.assert_array_equal(got[k], rec[k])
    # independent reader: trimesh sees the posed positions (float32) and the same faces
    ref = trimesh.load(out, process=False)
    np.testing.assert_allclose(ref.vertices, posed, atol=1e-6)
    np.testing.assert_array_equal(ref.faces, doc.faces)
    np.testing.assert_allclose(doc.uv, uv.astype(np.float32), atol=1e-7)
    # normals: trimesh's face normals of the posed apex triangles, area-weighted, for vertex 4
    m = trimesh.Trimesh(posed, doc.faces, process=False)
    sel = np.flatnonzero((doc.faces == 4).any(axis=1))
    n4 = (m.face_normals[sel] * m.area_faces[sel, None]).sum(0)
    n4 /= np.linalg.norm(n4)
    np.testing.assert_allclose([got["nx"][4], got["ny"][4], got["nz"][4]], n4, atol=1e-6)


def test_ply_ascii_round_trip(tmp_path):
    sphere = trimesh.creation.icosphere(subdivisions=1)
    src = tmp_path / "a.ply"
    src.write_bytes(sphere.export(file_type="ply", encoding="ascii"))
    doc = load_mesh(src)
    posed = _pose(doc.vertices)
    out = tmp_path / "o.ply"
    save_mesh(doc, out, posed)
    ref = trimesh.load(out, process=False)
    np.testing.assert_allclose(ref.vertices, posed, atol=1e-12)
    np.testing.assert_array_equal(ref.faces, sphere.faces)
    a, b = src.read_text().splitlines(), out.read_text().splitlines()
    nv = len(posed)
    head = a.index("end_header") + 1
    assert a[:head] == b[:head] and a[head + nv:] == b[head + nv:]


@pytest.mark.parametrize("ascii_stl", [False, True])
def test_stl_vertex_order_round_trips(tmp_path, ascii_stl):
    box = trimesh.creation.box()
    src = tmp_path / "b.stl"
    if ascii_stl:
        src.write_text(trimesh.exchange.stl.export_stl_ascii(box))
    else:
        data = bytearray(trimesh.exchange.stl.export_stl(box))
        data[:80] = b"toy workshop header".ljust(80, b" ")
        count = struct.unpack("<I", data[80:84])[0]
        for i in range(count):  # attribute bytes some programs use for colour
            data[84 + 50 * i + 48 : 84 + 50 * i + 50] = struct.pack("<H", i + 7)
        src.write_bytes(bytes(data))
    doc = load_mesh(src)
    # vertices: distinct corner positions in order of first appearance (hand-checked rule)
    corners = box.vertices[box.faces].reshape(-1, 3)
    order = []
    for c in corners:
        if not any(np.array_equal(c, o) for o in order):
            order.append(c)
    np.testing.assert_allclose(doc.vertices, np.array(order), atol=1e-6)
    assert len(doc.vertices) == 8 and len(doc.faces) == 12
    posed = _pose(doc.vertices)
    out = tmp_path / "o.stl"
    save_mesh(doc, out, posed)
    # independent reader: trimesh's triangles are the posed faces in facet order
    ref = trimesh.load(out, process=False)
    np.testing.assert_allclose(ref.vertices[ref.faces], posed[doc.faces], atol=1e-5)
    again = load_mesh(out)
    np.testing.assert_allclose(again.vertices, posed, atol=1e-5)
    np.testing.assert_array_equal(again.faces, doc.faces)
    if not ascii_stl:
        raw_in, raw_out = src.read_bytes(), out.read_bytes()
        assert raw_out[:80] == raw_in[:80]
        attr = lambda raw: [raw[84 + 50 * i + 48 : 84 + 50 * i + 50] for i in range(12)]  # noqa: E731
        assert attr(raw_out) == attr(raw_in)
        # facet normals: trimesh's face normals of the posed mesh
        normals = np.frombuffer(raw_out, np.dtype([("n", "<f4", 3), ("r", "V38")]), 12, 84)["n"]
        np.testing.assert_allclose(normals, trimesh.Trimesh(posed, doc.faces).face_normals, atol=1e-6)


def test_off_round_trip_keeps_comments_and_colours(tmp_path):
    text = (
        "OFF\n# toy workshop: test piece\n5 2 0\n"
        "0 0 0\n1 0 0 255 0 0 255\n1 1 0\n# a comment between vertex lines\n0 1 0\n0.5 0.5 1\n"
        "4 0 1 2 3\n3 0 1 4\n"
    )
    src = tmp_path / "m.off"
    src.write_text(text)
    doc = load_mesh(src)
    np.testing.assert_array_equal(doc.faces, [[0, 1, 2], [0, 2, 3], [0, 1, 4]])
    posed = _pose(doc.vertices)
    out = tmp_path / "o.off"
    save_mesh(doc, out, posed)
    lines_in, lines_out = text.splitlines(), out.read_text().splitlines()
    vertex_rows = [3, 4, 5, 7, 8]  # hand-located vertex lines of `text`
    for i, (a, b) in enumerate(zip(lines_in, lines_out)):
        if i not in vertex_rows:
            assert a == b
    assert lines_out[4].split()[3:] == ["255", "0", "0", "255"]
    ref = trimesh.load(out, process=False)
    np.testing.assert_allclose(ref.vertices, posed, atol=1e-12)


# --------------------------------------------------------------------------- glTF


def _quat(axis, degrees):
    axis = np.asarray(axis, float) / np.linalg.norm(axis)
    h = np.radians(degrees) / 2
    return [*(axis * np.sin(h)), np.cos(h)]


def _build_gltf(folder, name, *, glb=True, instanced=False, external=False):
    """A two-mesh glTF written by hand: a transformed parent with a child mesh, and a second
    mesh under a matrix node. Returns (path, dict of local positions per node name)."""
    tet_v = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], np.float32)
    tet_i = np.array([0, 2, 1, 0, 1, 3, 0, 3, 2, 1, 2, 3], np.uint16)
    tet_n = np.tile(np.array([0, 0, 1], np.float32), (4, 1))
    tet_uv = np.array([[0, 0], [1, 0], [0, 1], [1, 1]], np.float32)
    quad_v = np.array([[0, 0, 0], [2, 0, 0], [2, 1, 0], [0, 1, 0]], np.float32)
    quad_i = np.array([0, 1, 2, 0, 2, 3], np.uint16)
    blobs, views, accessors = [], [], []
    offset = 0

    def add(arr, target, kind, ctype, minmax=False):
        nonlocal offset
        raw = arr.tobytes()
        raw += b"\0" * (-len(raw) % 4)
        views.append({"buffer": 0, "byteOffset": offset, "byteLength": arr.nbytes, "target": target})
        acc = {"bufferView": len(views) - 1, "componentType": ctype, "count": len(arr), "type": kind}
        if minmax:
            acc["min"] = arr.min(axis=0).tolist()
            acc["max"] = arr.max(axis=0).tolist()
        accessors.append(acc)
        blobs.append(raw)
        offset += len(raw)
        return len(accessors) - 1

    a_tv = add(tet_v, 34962, "VEC3", 5126, True)
    a_tn = add(tet_n, 34962, "VEC3", 5126)
    a_tuv = add(tet_uv, 34962, "VEC2", 5126)
    a_ti = add(tet_i, 34963, "SCALAR", 5123)
    a_qv = add(quad_v, 34962, "VEC3", 5126, True)
    a_qi = add(quad_i, 34963, "SCALAR", 5123)
    binary = b"".join(blobs)
    matrix = np.eye(4)
    matrix[:3, 3] = [0, -3, 1]
    matrix[:3, :3] = np.diag([1, 2, 1])
    gltf = {
        "asset": {"version": "2.0", "generator": "pliant test"},
        "scene": 0,
        "scenes": [{"nodes": [0, 2]}],
        "nodes": [
            {"name": "parent", "translation": [1, 2, 3], "rotation": _quat([0, 0, 1], 90),
             "scale": [2, 2, 2], "children": [1]},
            {"name": "tet", "mesh": 0, "translation": [0.5, 0, 0],
             "rotation": _quat([1, 1, 0], 30)},
            {"name": "quad", "mesh": 0 if instanced else 1,
             "matrix": matrix.T.ravel().tolist()},
        ],
        "meshes": [
            {"name": "tetra", "primitives": [{"attributes": {"POSITION": a_tv, "NORMAL": a_tn,
                                                             "TEXCOORD_0": a_tuv},
                                              "indices": a_ti}]},
            {"name": "quad", "primitives": [{"attributes": {"POSITION": a_qv}, "indices": a_qi}]},
        ],
        "accessors": accessors,
        "bufferViews": views,
        "buffers": [{"byteLength": len(binary)}],
    }
    if glb:
        path = os.path.join(folder, name + ".glb")
        j = json.dumps(gltf).encode()
        j += b" " * (-len(j) % 4)
        chunks = struct.pack("<II", len(j), 0x4E4F534A) + j + struct.pack("<II", len(binary), 0x004E4942) + binary
        with open(path, "wb") as f:
            f.write(struct.pack("<III", 0x46546C67, 2, 12 + len(chunks)) + chunks)
    else:
        path = os.path.join(folder, name + ".gltf")
        if external:
            with open(os.path.join(folder, name + ".bin"), "wb") as f:
                f.write(binary)
            gltf["buffers"][0]["uri"] = name + ".bin"
        else:
            gltf["buffers"][0]["uri"] = "data:application/octet-stream;base64," + base64.b64encode(binary).decode()
        with open(path, "w") as f:
            json.dump(gltf, f)
    return path, {"tet": tet_v.astype(float), "quad": quad_v.astype(float)}


def _trimesh_world(path):
    """World-space positions per node name, from trimesh's scene loader (independent)."""
    scene = trimesh.load(path, process=False)
    out = {}
    for node in scene.graph.nodes_geometry:
        matrix, geom = scene.graph[node]
        v = scene.geometry[geom].vertices
        out[node] = v @ matrix[:3, :3].T + matrix[:3, 3]
    return out


@pytest.mark.parametrize("glb", [True, False])
def test_gltf_world_space_matches_trimesh(tmp_path, glb):
    path, _ = _build_gltf(str(tmp_path), "scene", glb=glb)
    doc = load_mesh(path)
    assert [p.name for p in doc.parts] == ["tet", "quad"]
    ref = _trimesh_world(path)
    for p in doc.parts:
        np.testing.assert_allclose(doc.vertices[p.start:p.stop], ref[p.name], atol=1e-5)
    assert doc.uv is None  # the quad has no TEXCOORD_0
    assert doc.faces.shape == (6, 3)


@pytest.mark.parametrize("glb", [True, False])
def test_gltf_world_space_edit_round_trip(tmp_path, glb):
    path, _ = _build_gltf(str(tmp_path), "scene", glb=glb)
    doc = load_mesh(path)
    posed = _pose(doc.vertices)
    out = os.path.join(str(tmp_path), "posed." + ("glb" if glb else "gltf"))
    save_mesh(doc, out, posed)
    ref = _trimesh_world(out)  # independent reader of what we wrote
    for p in doc.parts:
        np.testing.assert_allclose(ref[p.name], posed[p.start:p.stop], atol=1e-5)
    again = load_mesh(out)
    np.testing.assert_allclose(again.vertices, posed, atol=1e-5)
    np.testing.assert_array_equal(again.faces, doc.faces)
    # everything but positions, normals and their min/max is unchanged
    src_doc, out_doc = doc._source, again._source
    g0, g1 = src_doc.gltf, out_doc.gltf
    for key in ("nodes", "meshes", "bufferViews", "scenes", "asset"):
        assert g0[key] == g1[key]
    b0, b1 = np.frombuffer(src_doc.buffers[0], np.uint8), np.frombuffer(out_doc.buffers[0], np.uint8)
    changed = np.flatnonzero(b0 != b1)
    pos_normal_views = {g0["accessors"][a]["bufferView"] for a in (0, 1, 4)}
    allowed = np.zeros(len(b0), bool)
    for v in pos_normal_views:
        bv = g0["bufferViews"][v]
        allowed[bv["byteOffset"]:bv["byteOffset"] + bv["byteLength"]] = True
    assert allowed[changed].all()
    # accessor min/max follow the stored values (glTF 2.0 spec 3.6.2.5: exact bounds)
    for a in (0, 4):
        acc = g1["accessors"][a]
        bv = g1["bufferViews"][acc["bufferView"]]
        vals = np.frombuffer(out_doc.buffers[0], "<f4", acc["count"] * 3, bv["byteOffset"]).reshape(-1, 3)
        assert acc["min"] == vals.min(0).tolist() and acc["max"] == vals.max(0).tolist()
    # normals recomputed: unit length (glTF 2.0 requires unit NORMAL vectors)
    nbv = g1["bufferViews"][g1["accessors"][1]["bufferView"]]
    n = np.frombuffer(out_doc.buffers[0], "<f4", 12, nbv["byteOffset"]).reshape(-1, 3)
    np.testing.assert_allclose(np.linalg.norm(n, axis=1), 1, atol=1e-6)
    _assert_validates(out)


def test_gltf_external_buffer_saved_elsewhere(tmp_path):
    path, _ = _build_gltf(str(tmp_path), "scene", glb=False, external=True)
    original_bin = (tmp_path / "scene.bin").read_bytes()
    doc = load_mesh(path)
    (tmp_path / "out").mkdir()
    out = tmp_path / "out" / "posed.gltf"
    save_mesh(doc, out, doc.vertices + 1)
    assert (tmp_path / "scene.bin").read_bytes() == original_bin  # source untouched
    assert (tmp_path / "out" / "posed.bin").exists()
    np.testing.assert_allclose(load_mesh(out).vertices, doc.vertices + 1, atol=1e-5)


def test_gltf_instanced_mesh_refused(tmp_path):
    path, _ = _build_gltf(str(tmp_path), "inst", instanced=True)
    with pytest.raises(MeshError, match="instanced"):
        load_mesh(path)


def _validator():
    node = shutil.which("node")
    script = os.path.join(REPO, "tests", "gltf_validate.mjs")
    package = os.path.join(REPO, "node_modules", "gltf-validator")
    if node is None:
        pytest.skip("node is not installed, so the Khronos glTF validator cannot run")
    if not os.path.isdir(package):
        pytest.skip("npm package gltf-validator is not installed (run `npm ci` in the repo root)")
    return node, script


def _assert_validates(path):
    node, script = _validator()
    proc = subprocess.run([node, script, str(path)], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    report = json.loads(proc.stdout)
    assert report["issues"]["numErrors"] == 0, report["issues"]["messages"]


# --------------------------------------------------------------------------- bad input


@pytest.mark.parametrize("ext", ["obj", "ply", "stl", "off", "glb", "gltf"])
@pytest.mark.parametrize("content", [b"", b"\x00\xff\x13garbage\x01" * 40, b"hello world\n"])
def test_garbage_raises_mesh_error_naming_file(tmp_path, ext, content):
    p = tmp_path / f"bad.{ext}"
    p.write_bytes(content)
    with pytest.raises(MeshError) as info:
        load_mesh(p)
    msg = str(info.value)
    assert str(p) in msg and "\n" not in msg


def test_missing_folder_and_unknown_extension(tmp_path):
    with pytest.raises(MeshError, match="no such file"):
        load_mesh(tmp_path / "none.obj")
    (tmp_path / "dir.obj").mkdir()
    with pytest.raises(MeshError, match="folder"):
        load_mesh(tmp_path / "dir.obj")
    with pytest.raises(MeshError, match="unknown mesh format"):
        load_mesh(tmp_path / "x.fbx")


@pytest.mark.parametrize("text,match", [
    ("v 0 0 0\nv 1 0 0\nf 1 2 3\n", "out of range"),
    ("v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 0\n", "out of range"),
    ("v 0 0\n", "at least 3"),
    ("v 0 0 zero\n", "malformed"),
    ("v 0 0 0\nv 1 0 0\nf 1 2\n", "at least 3"),
    ("v 0 0 nan\n", "NaN"),
])
def test_malformed_obj(tmp_path, text, match):
    p = tmp_path / "m.obj"
    p.write_text(text)
    with pytest.raises(MeshError, match=match):
        load_mesh(p)


def test_save_checks_arguments(tmp_path):
    p = tmp_path / "m.obj"
    _write(p, OBJ_STRUCTURED)
    doc = load_mesh(p)
    with pytest.raises(ValueError, match="vertices"):
        save_mesh(doc, tmp_path / "o.obj", np.zeros((2, 3)))
    with pytest.raises(ValueError, match="vertices"):
        save_mesh(doc, tmp_path / "o.obj", np.full((6, 3), np.nan))
    with pytest.raises(MeshError, match="PLY"):
        save_mesh(doc, tmp_path / "o.ply")
    assert sorted(os.listdir(tmp_path)) == ["m.obj"]


@pytest.mark.parametrize("ext", ["obj", "ply", "stl", "off", "glb"])
def test_from_arrays_writes_any_format(tmp_path, ext):
    box = trimesh.creation.box()
    doc = MeshDoc.from_arrays(box.vertices, box.faces)
    out = tmp_path / f"b.{ext}"
    save_mesh(doc, out)
    ref = trimesh.load(out, process=False, force="mesh")
    np.testing.assert_allclose(ref.vertices[ref.faces], box.vertices[box.faces], atol=1e-6)


def test_obj_comments_weights_and_indented_lines(tmp_path):
    text = "v 0 0 0 # origin\n  v 1 0 0 0.5\nv 0 1 0\n\tf 1 2 3 # one face\n"
    p = tmp_path / "c.obj"
    _write(p, text)
    doc = load_mesh(p)
    np.testing.assert_array_equal(doc.vertices, [[0, 0, 0], [1, 0, 0], [0, 1, 0]])
    np.testing.assert_array_equal(doc.faces, [[0, 1, 2]])
    out = tmp_path / "o.obj"
    save_mesh(doc, out, doc.vertices + 1)
    # hand-written expectation: only the v lines change; their trailing text is kept
    assert out.read_text() == "v 1.0 1.0 1.0 # origin\nv 2.0 1.0 1.0 0.5\nv 1.0 2.0 1.0\n\tf 1 2 3 # one face\n"


def test_bench_synthetic_obj_and_ratio(tmp_path):
    from benchmarks.files import bench_obj, synthetic_obj

    p = tmp_path / "g.obj"
    nv, nf = synthetic_obj(p, 400)
    ref = trimesh.load(p, process=False, force="mesh")  # independent reader
    assert (nv, nf) == (400, 2 * 19 * 19) and len(ref.faces) == nf
    np.testing.assert_allclose(load_mesh(p).vertices, ref.vertices, atol=0)
    r = bench_obj(400)
    assert r["vertices"] == 400 and r["ratio"] == r["ours_s"] / r["trimesh_s"]


def test_obj_groups_name_the_vertices_of_their_faces(tmp_path):
    # hand-made: faces after 'g left' use vertices 1-4, after 'g right both' vertices 3-6
    text = ("v 0 0 0\nv 1 0 0\nv 1 1 0\nv 0 1 0\nv 2 0 0\nv 2 1 0\n"
            "g left\nf 1 2 3\nf 1 3 4\n"
            "g right both\nf 2 5 6 3\n")
    path = tmp_path / "two.obj"
    path.write_text(text)
    doc = load_mesh(path)
    assert sorted(doc.groups) == ["both", "left", "right"]
    assert doc.groups["left"].tolist() == [0, 1, 2, 3]
    assert doc.groups["right"].tolist() == [1, 2, 4, 5]
    assert doc.groups["both"].tolist() == doc.groups["right"].tolist()


def test_obj_groups_agree_with_trimesh_group_split():
    # independent reader: trimesh's OBJ loader with split_groups gives each 'g' group's faces
    import warnings

    from trimesh.exchange.obj import load_obj

    root = os.path.join(os.path.dirname(__file__), "..", "models", "mascot.obj")
    doc = load_mesh(root)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with open(root, "rb") as fh:
            loaded = load_obj(fh, split_groups=True, maintain_order=True)
    theirs = {}
    for name, geom in loaded["geometry"].items():
        corners = np.asarray(geom["vertices"])[np.asarray(geom["faces"])].reshape(-1, 3)
        theirs[name] = np.unique(np.round(corners, 9), axis=0)
    assert sorted(theirs) == sorted(doc.groups)
    for name, idx in doc.groups.items():
        ours = np.unique(np.round(doc.vertices[idx], 9), axis=0)
        assert np.array_equal(ours, theirs[name]), name
