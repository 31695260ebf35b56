"""Tests for brushes.formats.document: MeshDoc.from_arrays writes any format.

Written files are read back with trimesh (an independent reader).
"""


import numpy as np
import pytest
import trimesh

from brushes.formats import MeshDoc, save_mesh


@pytest.mark.parametrize("ext", ["obj", "ply", "stl", "off", "glb"])
def test_from_arrays_writes_any_format(tmp_path, ext):
    box = trimesh.creation.box()
    doc = MeshDoc.from_arrays(box.vertices, box.faces)
    out = tmp_path / f"b.{ext}"
    save_mesh(doc, out)
    ref = trimesh.load(out, process=False, force="mesh")
    np.testing.assert_allclose(ref.vertices[ref.faces], box.vertices[box.faces], atol=1e-6)
