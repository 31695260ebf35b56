"""Tests for brushes.formats.off: OFF vertex lines rewritten, comments and colours kept.

Geometry is checked against trimesh (an independent reader).
"""


import numpy as np
import trimesh

from brushes.formats import load_mesh, save_mesh


def _pose(v):
    """A non-rigid test deformation: shear plus a bend (any smooth map would do)."""
    v = np.asarray(v, dtype=np.float64)
    return np.stack([v[:, 0] + 0.3 * v[:, 1], v[:, 1] + 0.1 * v[:, 0] ** 2, v[:, 2] * 1.5 - 0.2], 1)


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
