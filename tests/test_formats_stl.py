"""Tests for brushes.formats.stl: STL vertex order and facets round-trip, binary and ASCII.

Geometry and facet normals are checked against trimesh (an independent reader).
"""

import struct

import numpy as np
import pytest
import trimesh

from brushes.formats import load_mesh, save_mesh


def _pose(v):
    """A non-rigid test deformation: shear plus a bend (any smooth map would do)."""
    v = np.asarray(v, dtype=np.float64)
    return np.stack([v[:, 0] + 0.3 * v[:, 1], v[:, 1] + 0.1 * v[:, 0] ** 2, v[:, 2] * 1.5 - 0.2], 1)


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
