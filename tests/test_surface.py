"""Tests for brushes.surface: enclosed volume and area-weighted vertex normals.

Hand-computed cases, trimesh as the independent reference (its mass-properties volume and its
geometry.mean_vertex_normals), and invariance under moving and rotating the mesh.
"""

import numpy as np
import pytest
import trimesh
from scipy.spatial.transform import Rotation

from brushes import surface

TET_V = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], float)
TET_F = np.array([[0, 2, 1], [0, 1, 3], [0, 3, 2], [1, 2, 3]])


def test_unit_tetrahedron_by_hand():
    # volume of the corner tetrahedron is 1/6 (a third of base 1/2 times height 1)
    assert surface.signed_volume(TET_V, TET_F) == pytest.approx(1 / 6, rel=1e-15)
    # winding turned inside out gives the negative volume
    assert surface.signed_volume(TET_V, TET_F[:, ::-1]) == pytest.approx(-1 / 6, rel=1e-15)
    # face cross products: the bottom face (0, 2, 1) has (v2 - v0) x (v1 - v0) = y x x = -z
    np.testing.assert_array_equal(surface.face_cross_products(TET_V, TET_F)[0], [0, 0, -1])


def test_vertex_normals_by_hand():
    # vertex 0 of the tetrahedron touches three unit-area-doubled faces with normals -x, -y, -z
    n = surface.vertex_normals(TET_V, TET_F)
    np.testing.assert_allclose(n[0], -np.ones(3) / np.sqrt(3), atol=1e-15)
    raw = surface.vertex_normals(TET_V, TET_F, normalize=False)
    np.testing.assert_array_equal(raw[0], [-1, -1, -1])
    # vertex 1: faces 0 (-z), 1 (-y) and 3 ((1, 1, 1), twice the area sqrt(3)/2)
    np.testing.assert_array_equal(raw[1], [1, 0, 0])


@pytest.mark.parametrize("mesh", [
    trimesh.creation.icosphere(subdivisions=3, radius=1.3),
    trimesh.creation.box(extents=(1, 2, 3)),
    trimesh.creation.capsule(height=2.0, radius=0.4),
], ids=["sphere", "box", "capsule"])
def test_volume_matches_trimesh(mesh):
    # reference: trimesh's Trimesh.volume (mass-properties integration, independent code)
    shifted = mesh.copy()
    shifted.apply_translation([40.0, -7.0, 3.0])  # far from the origin: cancellation matters
    for m in (mesh, shifted):
        assert surface.signed_volume(m.vertices, m.faces) == pytest.approx(m.volume, rel=1e-12)


def test_vertex_normals_match_trimesh_area_weighted():
    # reference: trimesh.geometry.mean_vertex_normals sums the face normals it is given at each
    # vertex and unitizes; given trimesh's unit face normals times its face areas, that is the
    # area-weighted normal
    mesh = trimesh.creation.icosphere(subdivisions=2)
    mesh.vertices = mesh.vertices * [1.0, 0.5, 2.0] + 0.1 * np.sin(7 * mesh.vertices)
    reference = trimesh.geometry.mean_vertex_normals(
        len(mesh.vertices), mesh.faces, mesh.face_normals * mesh.area_faces[:, None])
    ours = surface.vertex_normals(mesh.vertices, mesh.faces)
    np.testing.assert_allclose(ours, reference, atol=1e-12)


def test_operator_and_float32_agree_with_plain_path():
    mesh = trimesh.creation.icosphere(subdivisions=3)
    op = surface.vertex_normal_operator(mesh.faces, len(mesh.vertices))
    plain = surface.vertex_normals(mesh.vertices, mesh.faces)
    np.testing.assert_allclose(surface.vertex_normals(mesh.vertices, mesh.faces, operator=op),
                               plain, atol=1e-6)  # operator is float32
    single = surface.vertex_normals(mesh.vertices.astype(np.float32), mesh.faces)
    assert single.dtype == np.float32
    np.testing.assert_allclose(single, plain, atol=1e-6)


def test_rigid_motion_moves_the_answer():
    mesh = trimesh.creation.icosphere(subdivisions=2)
    rot = Rotation.from_euler("xyz", [20, -35, 70], degrees=True)
    moved = rot.apply(mesh.vertices) + [3.0, -1.0, 0.5]
    assert surface.signed_volume(moved, mesh.faces) == pytest.approx(
        surface.signed_volume(mesh.vertices, mesh.faces), rel=1e-12)
    np.testing.assert_allclose(surface.vertex_normals(moved, mesh.faces),
                               rot.apply(surface.vertex_normals(mesh.vertices, mesh.faces)),
                               atol=1e-12)


def test_unused_and_degenerate_vertices_get_zero_normals():
    v = np.vstack([TET_V, [[5, 5, 5]]])  # vertex 4 is used by no face
    n = surface.vertex_normals(v, TET_F)
    np.testing.assert_array_equal(n[4], 0)
    flat = np.array([[0, 0, 0], [1, 0, 0], [2, 0, 0]], float)  # one zero-area face
    np.testing.assert_array_equal(surface.vertex_normals(flat, [[0, 1, 2]]), 0)
    assert surface.signed_volume(np.zeros((0, 3)), np.zeros((0, 3), int)) == 0.0


def test_bad_input_names_the_argument():
    with pytest.raises(ValueError, match="^vertices: must have shape"):
        surface.vertex_normals(np.zeros((4, 2)), TET_F)
    with pytest.raises(ValueError, match="^faces: indices must lie in"):
        surface.signed_volume(TET_V, TET_F + 1)
    with pytest.raises(ValueError, match="^vertices: must be finite"):
        surface.signed_volume(np.full((4, 3), np.nan), TET_F)
    with pytest.raises(ValueError, match="^operator: must have shape"):
        surface.vertex_normals(TET_V, TET_F, operator=surface.vertex_normal_operator(TET_F, 5))


def _both_paths(monkeypatch, fn):
    """fn() on the numba path, then on the numpy path (as with PLIANT_BACKEND=numpy)."""
    assert surface._kernels() is not None
    fast = fn()
    monkeypatch.setenv("PLIANT_BACKEND", "numpy")
    assert surface._kernels() is None
    slow = fn()
    monkeypatch.delenv("PLIANT_BACKEND")
    return fast, slow


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_numba_and_numpy_paths_agree(monkeypatch, dtype):
    mesh = trimesh.creation.icosphere(subdivisions=4)
    v = (mesh.vertices * [1.0, 0.7, 1.3]).astype(dtype)
    fast, slow = _both_paths(monkeypatch, lambda: (surface.face_cross_products(v, mesh.faces),
                                                   surface.vertex_normals(v, mesh.faces, normalize=False)))
    for a, b in zip(fast, slow):
        assert a.dtype == b.dtype == dtype
        # the same products in the same precision: equal to rounding of the sums' order
        np.testing.assert_allclose(a, b, rtol=0, atol=1e-6 if dtype == np.float32 else 1e-14)
    # outside reference: trimesh's face cross products (its triangles.cross)
    np.testing.assert_allclose(fast[0], trimesh.triangles.cross(v[mesh.faces].astype(np.float64)),
                               atol=1e-6)


def test_update_vertex_normals_equals_a_fresh_computation_on_both_paths(monkeypatch):
    mesh = trimesh.creation.icosphere(subdivisions=3)
    faces = np.asarray(mesh.faces, dtype=np.int64)
    n, m = len(mesh.vertices), len(faces)
    op = surface.vertex_normal_operator(faces, n)
    moved = np.flatnonzero(mesh.vertices[:, 2] > 0.5)
    posed = mesh.vertices.copy()
    posed[moved] += 0.1 * np.cos(4 * posed[moved])

    def run():
        cross, normals = np.zeros((m, 3)), np.zeros((n, 3))
        every = surface.update_vertex_normals(mesh.vertices, faces, op, cross, normals)
        changed = surface.update_vertex_normals(posed, faces, op, cross, normals, moved=moved)
        return every, changed, cross, normals

    fast, slow = _both_paths(monkeypatch, run)
    np.testing.assert_array_equal(fast[0], np.arange(n))
    # the rewritten vertices: every corner of every face that uses a moved vertex (by definition)
    ring = np.unique(faces[np.isin(faces, moved).any(axis=1)])
    for every, changed, cross, normals in (fast, slow):
        np.testing.assert_array_equal(changed, ring)
        np.testing.assert_allclose(cross, surface.face_cross_products(posed, faces), atol=1e-14)
        np.testing.assert_allclose(normals, surface.vertex_normals(posed, faces, normalize=False), atol=1e-6)
    # outside reference: trimesh's area-weighted normals of the posed mesh
    moved_mesh = trimesh.Trimesh(posed, faces, process=False)
    reference = trimesh.geometry.mean_vertex_normals(n, faces, moved_mesh.face_normals * moved_mesh.area_faces[:, None])
    unit = fast[3] / np.linalg.norm(fast[3], axis=1, keepdims=True)
    np.testing.assert_allclose(unit, reference, atol=1e-6)


def test_update_vertex_normals_refuses_mismatched_caches():
    op = surface.vertex_normal_operator(TET_F, 4)
    good = np.zeros((4, 3))
    with pytest.raises(ValueError, match="^cross: must be"):
        surface.update_vertex_normals(TET_V, TET_F, op, np.zeros((3, 3)), good)
    with pytest.raises(ValueError, match="^operator: must have shape"):
        surface.update_vertex_normals(TET_V, TET_F, surface.vertex_normal_operator(TET_F, 5), good, good)
    with pytest.raises(ValueError, match="^moved: indices"):
        surface.update_vertex_normals(TET_V, TET_F, op, good, good, moved=[7])
