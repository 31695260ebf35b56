"""viewer.render's pure half (normals, outline) and viewer.palette: no OpenGL needed."""

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import trimesh

from viewer import palette
from viewer.render import ring_points, vertex_normals, vertex_normals_operator

ROOT = Path(__file__).resolve().parents[1]


def _rotation(seed):
    q, r = np.linalg.qr(np.random.default_rng(seed).normal(size=(3, 3)))
    q *= np.sign(np.diag(r))
    if np.linalg.det(q) < 0:
        q[:, 0] *= -1
    return q


def test_single_triangle_normals_hand_case():
    # Counter-clockwise triangle in the z = 0 plane seen from +z: every normal is +z (by hand).
    v = np.array([[0.0, 0, 0], [1, 0, 0], [0, 1, 0]])
    f = np.array([[0, 1, 2]])
    n = vertex_normals(vertex_normals_operator(f, 3), v, f)
    np.testing.assert_allclose(n, [[0, 0, 1]] * 3)


def test_fold_is_area_weighted_hand_case():
    # Two triangles on the edge (0, 1) along the x axis: one in the z = 0 plane (area 1/2,
    # normal +z), one in the y = 0 plane ((1,0,0) x (0,0,4) = (0,-4,0): area 2, normal -y).
    # At the shared vertices the area-weighted sum is 2*(1/2)*z + 2*2*(-y) = (0, -4, 1), normalised by sqrt(17) (by hand).
    v = np.array([[0.0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 4]])
    f = np.array([[0, 1, 2], [0, 1, 3]])
    n = vertex_normals(vertex_normals_operator(f, 4), v, f)
    shared = np.array([0, -4, 1]) / np.sqrt(17)
    np.testing.assert_allclose(n[0], shared, atol=1e-12)
    np.testing.assert_allclose(n[1], shared, atol=1e-12)
    np.testing.assert_allclose(n[2], [0, 0, 1], atol=1e-12)
    np.testing.assert_allclose(n[3], [0, -1, 0], atol=1e-12)


def test_matches_trimesh_area_weighted_normals():
    # Reference: trimesh.geometry.mean_vertex_normals sums the face normals it is given at each
    # vertex and normalises; given trimesh's own unit face normals times trimesh's face areas,
    # that is the area-weighted vertex normal, computed entirely by trimesh.
    mesh = trimesh.creation.annulus(r_min=0.4, r_max=1.0, height=0.7, sections=24)
    mesh.vertices = mesh.vertices * [1.0, 0.6, 1.3] + 0.05 * np.sin(7 * mesh.vertices)
    reference = trimesh.geometry.mean_vertex_normals(
        len(mesh.vertices), mesh.faces, mesh.face_normals * mesh.area_faces[:, None])
    ours = vertex_normals(vertex_normals_operator(mesh.faces, len(mesh.vertices)),
                          mesh.vertices, mesh.faces)
    np.testing.assert_allclose(ours, reference, atol=1e-10)


def test_close_to_trimesh_default_normals_on_smooth_sphere():
    # trimesh's Trimesh.vertex_normals weights by corner angle, not area; on a fine, nearly
    # uniform sphere both weightings approach the radial direction (analytic normal of a
    # sphere) as the edges shrink, so the gaps shrink about in proportion to the edge length.
    gaps = []
    for level in (3, 4):
        mesh = trimesh.creation.icosphere(subdivisions=level)
        ours = vertex_normals(vertex_normals_operator(mesh.faces, len(mesh.vertices)),
                              mesh.vertices, mesh.faces)
        radial = mesh.vertices / np.linalg.norm(mesh.vertices, axis=1, keepdims=True)
        gaps.append((np.abs(ours - mesh.vertex_normals).max(), np.abs(ours - radial).max()))
    assert max(gaps[1]) < 1e-2
    assert gaps[1][0] < 0.6 * gaps[0][0] and gaps[1][1] < 0.6 * gaps[0][1]


def test_float32_path_agrees_with_float64():
    mesh = trimesh.creation.icosphere(subdivisions=3)
    op = vertex_normals_operator(mesh.faces, len(mesh.vertices))
    n64 = vertex_normals(op, mesh.vertices, mesh.faces)
    out = np.empty((len(mesh.vertices), 3), dtype=np.float32)
    n32 = vertex_normals(op, mesh.vertices.astype(np.float32), mesh.faces, out=out)
    assert n32 is out and n32.dtype == np.float32
    np.testing.assert_allclose(n32, n64, atol=1e-5)


def test_rotating_and_moving_the_mesh_rotates_the_normals():
    mesh = trimesh.creation.capsule(height=1.0, radius=0.4)
    op = vertex_normals_operator(mesh.faces, len(mesh.vertices))
    rot = _rotation(3)
    before = vertex_normals(op, mesh.vertices, mesh.faces)
    after = vertex_normals(op, mesh.vertices @ rot.T + [3.0, -2.0, 0.5], mesh.faces)
    np.testing.assert_allclose(after, before @ rot.T, atol=1e-10)


def test_operator_structure_and_isolated_vertex():
    f = np.array([[0, 1, 2], [0, 2, 3]])
    op = vertex_normals_operator(f, 5)
    assert op.shape == (5, 2) and op.nnz == 6
    # Row sums are valences (faces per vertex), counted by hand.
    np.testing.assert_array_equal(np.asarray(op.sum(axis=1)).ravel(), [2, 1, 2, 1, 0])
    v = np.array([[0.0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0], [5, 5, 5]])
    n = vertex_normals(op, v, f)
    np.testing.assert_array_equal(n[4], [0, 0, 0])  # no faces: zero, as documented


def test_bad_input_names_the_argument():
    with pytest.raises(ValueError, match="^faces"):
        vertex_normals_operator(np.zeros((2, 4), int), 3)
    with pytest.raises(ValueError, match="^faces"):
        vertex_normals_operator([[0, 1, 7]], 3)
    with pytest.raises(ValueError, match="^faces"):
        vertex_normals_operator([[0.0, 1.0, 2.0]], 3)
    op = vertex_normals_operator([[0, 1, 2]], 3)
    with pytest.raises(ValueError, match="^vertices"):
        vertex_normals(op, np.zeros((3, 2)), [[0, 1, 2]])
    with pytest.raises(ValueError, match="^op"):
        vertex_normals(op, np.zeros((4, 3)), [[0, 1, 2]])
    with pytest.raises(ValueError, match="^out"):
        vertex_normals(op, np.eye(3), [[0, 1, 2]], out=np.zeros((3, 3), np.float32))


def test_ring_points_lie_on_the_circle_in_the_view_plane():
    right, up = np.array([1.0, 0, 0]), np.array([0, 0.6, 0.8])
    pts = ring_points([1, 2, 3], 0.25, right, up, segments=40)
    assert pts.shape == (40, 3) and pts.dtype == np.float32
    rel = pts - [1, 2, 3]
    np.testing.assert_allclose(np.linalg.norm(rel, axis=1), 0.25, rtol=1e-6)
    np.testing.assert_allclose(rel @ np.cross(right, up), 0, atol=1e-6)
    with pytest.raises(ValueError, match="^radius"):
        ring_points([0, 0, 0], 0, right, up)


def test_ramp_hits_its_stops_and_clips():
    stops = [s for s, _ in palette.RAMP]
    colours = np.array([c for _, c in palette.RAMP])
    np.testing.assert_allclose(palette.ramp(stops), colours)
    np.testing.assert_allclose(palette.ramp([-1.0, 2.0]), colours[[0, -1]])
    mid = 0.5 * (stops[0] + stops[1])
    np.testing.assert_allclose(palette.ramp([mid])[0], 0.5 * (colours[0] + colours[1]))
    with pytest.raises(ValueError, match="^values"):
        palette.ramp(np.zeros((2, 2)))


def test_importing_the_gl_layer_does_not_import_pyglet():
    # The engine and the pure viewer modules must import on a machine with no display.
    code = ("import sys, viewer.render, viewer.snapshot, viewer.palette;"
            "print('pyglet' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True,
                         text=True, check=True)
    assert out.stdout.strip() == "False"


def test_face_cross_products_numba_agrees_with_numpy():
    from viewer.render import _face_cross_numba, face_cross_products
    mesh = trimesh.creation.icosphere(subdivisions=3)
    rng = np.random.default_rng(1)
    vertices = mesh.vertices + 0.05 * rng.normal(size=mesh.vertices.shape)
    # Reference for both: trimesh's triangles cross products, (b - a) x (c - a).
    reference = trimesh.triangles.cross(vertices[mesh.faces])
    numpy_result = face_cross_products(vertices, mesh.faces, backend="numpy")
    np.testing.assert_allclose(numpy_result, reference, atol=1e-14)
    if _face_cross_numba() is None:
        pytest.skip("numba is not importable here, so only the numpy backend was checked")
    faces_f = np.asfortranarray(mesh.faces)
    numba_result = face_cross_products(vertices.astype(np.float32), faces_f, backend="numba")
    np.testing.assert_allclose(numba_result, reference, atol=1e-6)
    np.testing.assert_array_equal(face_cross_products(vertices, mesh.faces, backend="numba"),
                                  numpy_result)
    with pytest.raises(ValueError, match="^backend"):
        face_cross_products(vertices, mesh.faces, backend="gpu")


def test_bench_drag_runs_headless():
    # A tiny run of the drag benchmark in a fresh process (pyglet headless must come first).
    code = ("from benchmarks.drag import bench_drag;"
            "r = bench_drag(3000, repeats=3);"
            "print(r['n_vertices'], r['reach_fraction'], r['total_ms'] > 0)")
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True,
                         text=True, timeout=300)
    assert out.returncode == 0, out.stderr[-2000:]
    n, fraction, positive = out.stdout.split()
    assert int(n) >= 3000 and 0 < float(fraction) <= 1 and positive == "True"
