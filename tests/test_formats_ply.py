"""Tests for brushes.formats.ply: PLY files keep every byte outside the positions and normals.

Geometry is checked against trimesh (an independent reader), structure by comparing raw bytes.
"""

import struct

import pytest

import numpy as np
import trimesh

from brushes.formats import MeshError, load_mesh, save_mesh


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


# --------------------------------------------------------------------------- every face encoding

QUAD_FAN = np.array([[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0], [2, 0, 0], [2, 1, 0], [3, 0.5, 0]],
                    float)
MIXED = [[0, 1, 2, 3], [1, 4, 5, 2], [4, 6, 5]]  # two quads and a triangle


def _header(encoding, n, faces_line):
    return (f"ply\nformat {encoding} 1.0\nelement vertex {n}\nproperty float x\n"
            f"property float y\nproperty float z\n{faces_line}end_header\n").encode()


def _binary_mixed(path, order):
    body = np.asarray(QUAD_FAN, order + "f4").tobytes()
    for poly in MIXED:
        body += struct.pack(order + "B", len(poly)) + struct.pack(f"{order}{len(poly)}i", *poly)
    path.write_bytes(_header("binary_little_endian" if order == "<" else "binary_big_endian",
                             len(QUAD_FAN), "element face 3\nproperty list uchar int vertex_indices\n")
                     + body)


@pytest.mark.parametrize("order", ["<", ">"])
def test_binary_faces_of_mixed_sizes_both_byte_orders(tmp_path, order):
    # (trimesh's binary reader needs faces of one size: this is the case issue 11 names)
    src = tmp_path / "mixed.ply"
    _binary_mixed(src, order)
    doc = load_mesh(src)
    np.testing.assert_allclose(doc.vertices, QUAD_FAN, atol=1e-7)
    assert doc.polygon_count == 3 and doc.polygons.counts.tolist() == [4, 4, 3]
    assert doc.polygons.corners.tolist() == sum(MIXED, [])
    # fan triangles by hand: (0 1 2) (0 2 3) (1 4 5) (1 5 2) (4 6 5)
    assert doc.faces.tolist() == [[0, 1, 2], [0, 2, 3], [1, 4, 5], [1, 5, 2], [4, 6, 5]]
    out = tmp_path / "o.ply"
    save_mesh(doc, out, doc.vertices + 1)
    raw, before = out.read_bytes(), src.read_bytes()
    head = before.index(b"end_header\n") + len(b"end_header\n")
    vend = head + 12 * len(QUAD_FAN)
    assert raw[:head] == before[:head] and raw[vend:] == before[vend:]  # only positions changed
    np.testing.assert_allclose(np.frombuffer(raw, order + "f4", 21, head).reshape(7, 3),
                               QUAD_FAN + 1, atol=1e-6)


def test_ascii_mixed_faces_match_trimesh(tmp_path):
    src = tmp_path / "mixed.ply"
    text = _header("ascii", len(QUAD_FAN), "element face 3\nproperty list uchar int vertex_indices\n")
    text += "".join(f"{x} {y} {z}\n" for x, y, z in QUAD_FAN.tolist()).encode()
    text += "".join(f"{len(p)} " + " ".join(map(str, p)) + "\n" for p in MIXED).encode()
    src.write_bytes(text)
    doc = load_mesh(src)
    ref = trimesh.load(src, process=False)  # independent reader (triangulates the ASCII quads)
    np.testing.assert_allclose(doc.vertices, ref.vertices)
    assert len(ref.faces) == len(doc.faces) == 5
    assert np.isclose(trimesh.Trimesh(doc.vertices, doc.faces).area, ref.area)


@pytest.mark.parametrize("encoding", ["ascii", "binary_little_endian"])
def test_triangle_strips(tmp_path, encoding):
    # tristrips with -1 restarts (PLY convention; winding alternates along a strip and triangles
    # repeating a vertex are skipped, common practice). By hand, the strip 0 1 3 2 gives
    # (0 1 3) and, odd so reversed, (1 2 3) in the order (1, 2, 3); after the -1, 4 5 6 gives
    # (4 5 6), and 5 6 6 repeats a vertex
    strip = [0, 1, 3, 2, -1, 4, 5, 6, 6]  # the trailing 6 makes a degenerate triangle
    src = tmp_path / "strip.ply"
    head = _header(encoding, len(QUAD_FAN), "element tristrips 1\nproperty list int int vertex_indices\n")
    if encoding == "ascii":
        body = "".join(f"{x} {y} {z}\n" for x, y, z in QUAD_FAN.tolist()).encode()
        body += (f"{len(strip)} " + " ".join(map(str, strip)) + "\n").encode()
    else:
        body = np.asarray(QUAD_FAN, "<f4").tobytes()
        body += struct.pack("<i", len(strip)) + struct.pack(f"<{len(strip)}i", *strip)
    src.write_bytes(head + body)
    doc = load_mesh(src)
    assert doc.faces.tolist() == [[0, 1, 3], [1, 2, 3], [4, 5, 6]]
    # the strip's two triangles of the unit square wind the same way (normals both +z)
    n = np.cross(QUAD_FAN[doc.faces[:2, 1]] - QUAD_FAN[doc.faces[:2, 0]],
                 QUAD_FAN[doc.faces[:2, 2]] - QUAD_FAN[doc.faces[:2, 0]])
    assert np.all(n[:, 2] > 0)
    out = tmp_path / "o.ply"
    save_mesh(doc, out, doc.vertices * 2)
    back = load_mesh(out)
    assert back.faces.tolist() == doc.faces.tolist()
    np.testing.assert_allclose(back.vertices, QUAD_FAN * 2, atol=1e-6)


def test_truncated_binary_faces_name_the_file(tmp_path):
    src = tmp_path / "cut.ply"
    _binary_mixed(src, "<")
    src.write_bytes(src.read_bytes()[:-5])
    with pytest.raises(MeshError, match="runs past the end"):
        load_mesh(src)
