"""Tests for brushes.formats.ply: PLY files keep every byte outside the positions and normals.

Geometry is checked against trimesh (an independent reader), structure by comparing raw bytes.
"""

import struct

import numpy as np
import trimesh

from brushes.formats import load_mesh, save_mesh


def _pose(v):
    """A non-rigid test deformation: shear plus a bend (any smooth map would do)."""
    v = np.asarray(v, dtype=np.float64)
    return np.stack([v[:, 0] + 0.3 * v[:, 1], v[:, 1] + 0.1 * v[:, 0] ** 2, v[:, 2] * 1.5 - 0.2], 1)


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
