"""Tests for brushes.formats.match: a posed file's vertices in its rest file's order.

Files are made here; the expected positions are the pose applied to the rest positions directly.
"""

import numpy as np
import pytest
import trimesh

from brushes.formats import MeshDoc, MeshError, load_mesh, save_mesh
from brushes.formats.match import posed_in_rest_order


def _pose(v):
    return np.stack([v[:, 0] + 0.2 * v[:, 1] ** 2, v[:, 1], 1.1 * v[:, 2]], axis=1)


def test_same_file_layout_is_identity():
    box = trimesh.creation.box()
    rest = MeshDoc.from_arrays(box.vertices, box.faces)
    posed = MeshDoc.from_arrays(_pose(box.vertices), box.faces)
    np.testing.assert_array_equal(posed_in_rest_order(rest, posed), _pose(box.vertices))


def test_stl_posed_from_stl_pairs_by_facet_corner(tmp_path):
    ball = trimesh.creation.icosphere(subdivisions=2)
    src = tmp_path / "ball.stl"
    src.write_bytes(ball.export(file_type="stl"))          # trimesh writes the STL
    rest = load_mesh(src)
    out = tmp_path / "posed.stl"
    save_mesh(rest, out, _pose(rest.vertices))
    posed = load_mesh(out)
    np.testing.assert_allclose(posed_in_rest_order(rest, posed), _pose(rest.vertices), atol=1e-6)


def test_stl_converted_from_obj_pairs_by_facet_corner(tmp_path):
    ball = trimesh.creation.icosphere(subdivisions=2)
    src = tmp_path / "ball.obj"
    src.write_text(trimesh.exchange.obj.export_obj(ball, include_normals=False))
    rest = load_mesh(src)
    out = tmp_path / "posed.stl"
    save_mesh(rest, out, _pose(rest.vertices))
    np.testing.assert_allclose(posed_in_rest_order(rest, load_mesh(out)), _pose(rest.vertices),
                               atol=1e-6)


def test_split_conversion_maps_back_through_its_record(tmp_path):
    # an OBJ whose two triangles disagree on a shared vertex's texture coordinate: GLB splits it
    src = tmp_path / "seam.obj"
    src.write_text("v 0 0 0\nv 1 0 0\nv 1 1 0\nv 0 1 0\nvt 0 0\nvt 1 0\nvt 1 1\nvt 0 1\nvt 0.5 0.5\n"
                   "f 1/1 2/2 3/3\nf 1/5 3/3 4/4\n")
    rest = load_mesh(src)
    out = tmp_path / "seam.glb"
    save_mesh(rest, out, _pose(rest.vertices))
    posed = load_mesh(out)
    assert len(posed.vertices) == 5
    np.testing.assert_allclose(posed_in_rest_order(rest, posed), _pose(rest.vertices), atol=1e-6)


def test_unrelated_meshes_are_refused_naming_both():
    a = trimesh.creation.icosphere(subdivisions=1)
    b = trimesh.creation.icosphere(subdivisions=2)
    with pytest.raises(MeshError, match="POSED: its vertices do not match REST"):
        posed_in_rest_order(MeshDoc.from_arrays(a.vertices, a.faces),
                            MeshDoc.from_arrays(b.vertices, b.faces))
    with pytest.raises(MeshError, match="other faces"):
        posed_in_rest_order(MeshDoc.from_arrays(a.vertices, a.faces),
                            MeshDoc.from_arrays(a.vertices, a.faces[:, ::-1]))
