"""Tests for brushes.formats.obj: OBJ files round-trip line for line, keeping vertex order,
groups, texture coordinates and normals.

Geometry is checked against trimesh (an independent reader); structure is checked by our own
line-by-line text comparison.
"""

import os

import numpy as np
import pytest
import trimesh

from brushes.formats import MeshError, load_mesh, save_mesh


def _pose(v):
    """A non-rigid test deformation: shear plus a bend (any smooth map would do)."""
    v = np.asarray(v, dtype=np.float64)
    return np.stack([v[:, 0] + 0.3 * v[:, 1], v[:, 1] + 0.1 * v[:, 0] ** 2, v[:, 2] * 1.5 - 0.2], 1)


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
    assert sorted(os.listdir(tmp_path)) == ["m.obj"]  # bad input writes nothing
    # another format is a conversion now (issue 11), and it says what it cannot keep
    written = save_mesh(doc, tmp_path / "o.ply")
    assert written.converted == ("obj", "ply")
    assert "material definitions" in written.summary() and "line elements" in written.summary()
    assert sorted(os.listdir(tmp_path)) == ["m.obj", "o.ply"]


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
