"""viewer.render's pure half (normals, outline) and viewer.palette: no OpenGL needed."""

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import trimesh

from viewer import palette
from viewer.render import NormalField, moved_rows, ring_points

ROOT = Path(__file__).resolve().parents[1]


def _rotation(seed):
    q, r = np.linalg.qr(np.random.default_rng(seed).normal(size=(3, 3)))
    q *= np.sign(np.diag(r))
    if np.linalg.det(q) < 0:
        q[:, 0] *= -1
    return q


def _unit(n):
    n = np.asarray(n, dtype=np.float64)
    length = np.linalg.norm(n, axis=1, keepdims=True)
    return np.divide(n, length, out=np.zeros_like(n), where=length > 0)


def test_single_triangle_normals_hand_case():
    # Counter-clockwise triangle in the z = 0 plane seen from +z: every normal is +z (by hand).
    v = np.array([[0.0, 0, 0], [1, 0, 0], [0, 1, 0]])
    f = np.array([[0, 1, 2]])
    n = NormalField(f, 3).full(v)
    np.testing.assert_allclose(_unit(n), [[0, 0, 1]] * 3)


def test_fold_is_area_weighted_hand_case():
    # Two triangles on the edge (0, 1) along the x axis: one in the z = 0 plane (area 1/2,
    # normal +z), one in the y = 0 plane ((1,0,0) x (0,0,4) = (0,-4,0): area 2, normal -y).
    # At the shared vertices the area-weighted sum is 2*(1/2)*z + 2*2*(-y) = (0, -4, 1) (by hand).
    v = np.array([[0.0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 4]])
    f = np.array([[0, 1, 2], [0, 1, 3]])
    n = NormalField(f, 4).full(v)
    np.testing.assert_array_equal(n[0], [0, -4, 1])
    np.testing.assert_array_equal(n[1], [0, -4, 1])
    np.testing.assert_array_equal(n[2], [0, 0, 1])
    np.testing.assert_array_equal(n[3], [0, -4, 0])


def test_matches_trimesh_area_weighted_normals():
    # Reference: trimesh.geometry.mean_vertex_normals sums the face normals it is given at each
    # vertex and normalises; given trimesh's own unit face normals times trimesh's face areas,
    # that is the area-weighted vertex normal, computed entirely by trimesh.
    mesh = trimesh.creation.annulus(r_min=0.4, r_max=1.0, height=0.7, sections=24)
    mesh.vertices = mesh.vertices * [1.0, 0.6, 1.3] + 0.05 * np.sin(7 * mesh.vertices)
    reference = trimesh.geometry.mean_vertex_normals(
        len(mesh.vertices), mesh.faces, mesh.face_normals * mesh.area_faces[:, None])
    ours = _unit(NormalField(mesh.faces, len(mesh.vertices)).full(mesh.vertices))
    np.testing.assert_allclose(ours, reference, atol=2e-6)  # float32 buffers


def test_close_to_trimesh_default_normals_on_smooth_sphere():
    # trimesh's Trimesh.vertex_normals weights by corner angle, not area; on a fine, nearly
    # uniform sphere both weightings approach the radial direction (analytic normal of a
    # sphere) as the edges shrink, so the gaps shrink about in proportion to the edge length.
    gaps = []
    for level in (3, 4):
        mesh = trimesh.creation.icosphere(subdivisions=level)
        ours = _unit(NormalField(mesh.faces, len(mesh.vertices)).full(mesh.vertices))
        radial = mesh.vertices / np.linalg.norm(mesh.vertices, axis=1, keepdims=True)
        gaps.append((np.abs(ours - mesh.vertex_normals).max(), np.abs(ours - radial).max()))
    assert max(gaps[1]) < 1e-2
    assert gaps[1][0] < 0.6 * gaps[0][0] and gaps[1][1] < 0.6 * gaps[0][1]


def test_local_update_equals_a_full_recompute():
    # Move a patch of vertices; update() recomputes only around them. Reference: trimesh's
    # area-weighted normals (as above) of the moved mesh, and a fresh full() of the same positions.
    mesh = trimesh.creation.icosphere(subdivisions=3)
    field = NormalField(mesh.faces, len(mesh.vertices))
    field.full(mesh.vertices)
    moved = np.flatnonzero(mesh.vertices[:, 0] > 0.6)
    posed = mesh.vertices.copy()
    posed[moved] += 0.1 * np.sin(5 * posed[moved])
    changed = field.update(posed, moved)
    # Changed: every corner of every face that uses a moved vertex (the one-ring), nothing else.
    ring = np.unique(mesh.faces[np.isin(mesh.faces, moved).any(axis=1)])
    np.testing.assert_array_equal(changed, ring)
    fresh = NormalField(mesh.faces, len(mesh.vertices)).full(posed)
    np.testing.assert_allclose(field.normals, fresh, rtol=0, atol=1e-6)
    moved_mesh = trimesh.Trimesh(posed, mesh.faces, process=False)
    reference = trimesh.geometry.mean_vertex_normals(
        len(posed), mesh.faces, moved_mesh.face_normals * moved_mesh.area_faces[:, None])
    np.testing.assert_allclose(_unit(field.normals), reference, atol=2e-6)
    assert len(field.update(posed, [])) == 0


def test_rotating_and_moving_the_mesh_rotates_the_normals():
    mesh = trimesh.creation.capsule(height=1.0, radius=0.4)
    rot = _rotation(3)
    before = _unit(NormalField(mesh.faces, len(mesh.vertices)).full(mesh.vertices))
    after = _unit(NormalField(mesh.faces, len(mesh.vertices)).full(
        mesh.vertices @ rot.T + [3.0, -2.0, 0.5]))
    # float32 positions 3 units from the origin carry ~2e-7 * 3 of round-off per coordinate,
    # against edges of ~0.05: normals agree to about 1e-5, well inside 1e-4.
    np.testing.assert_allclose(after, before @ rot.T, atol=1e-4)


def test_operator_structure_and_isolated_vertex():
    f = np.array([[0, 1, 2], [0, 2, 3]])
    field = NormalField(f, 5)
    assert field.operator.shape == (5, 2) and field.operator.nnz == 6
    # Row sums are valences (faces per vertex), counted by hand.
    np.testing.assert_array_equal(np.asarray(field.operator.sum(axis=1)).ravel(), [2, 1, 2, 1, 0])
    v = np.array([[0.0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0], [5, 5, 5]])
    n = field.full(v)
    np.testing.assert_array_equal(n[4], [0, 0, 0])  # no faces: zero, as documented


def test_bad_input_names_the_argument():
    with pytest.raises(ValueError, match="^faces"):
        NormalField(np.zeros((2, 4), int), 3)
    with pytest.raises(ValueError, match="^faces"):
        NormalField([[0, 1, 7]], 3)
    with pytest.raises(ValueError, match="^faces"):
        NormalField([[0.0, 1.0, 2.0]], 3)
    field = NormalField([[0, 1, 2]], 3)
    with pytest.raises(ValueError, match="^vertices"):
        field.full(np.zeros((3, 2)))
    with pytest.raises(ValueError, match="^vertices"):
        field.full(np.zeros((4, 3)))
    with pytest.raises(ValueError, match="^vertices"):
        field.update(np.zeros((4, 3)), [0])


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


def test_bench_drag_runs_headless():
    # A tiny run of the drag benchmark in a fresh process (pyglet headless must come first).
    code = ("from benchmarks.drag import bench_drag;"
            "r = bench_drag(3000, repeats=3);"
            "print(r['n_vertices'], r['exact'], r['brush_ratio'] > 0)")
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True,
                         text=True, timeout=1800)  # a hang guard, not a speed limit
    assert out.returncode == 0, out.stderr[-2000:]
    n, exact, positive = out.stdout.split()
    # The benchmark's own check: the last preview is the committed stroke (to 1e-6 of the motion).
    assert int(n) >= 3000 and float(exact) <= 1e-6 and positive == "True"


def test_bench_tools_times_every_stroke_on_a_small_mesh():
    # A tiny run of `python -m benchmarks.drag --tools`: every tool's stroke, each with its steps.
    from benchmarks.drag import bench_tools
    rows = bench_tools(3000, repeats=1)
    names = [name for name, _, _, _ in rows]
    assert names[:4] == ["grab", "twist", "scale", "pinch"] and "grab + mirror" in names
    assert "grab + 1 pin" in names and "handles, 2 + 1 pin" in names
    assert all(ms > 0 and ratio > 0 and steps >= 0 for _, ms, ratio, steps in rows)
    steps = dict((name, s) for name, _, _, s in rows)
    assert steps["twist"] == 0 and steps["scale"] == 0  # closed forms: no RK4 steps


def test_moved_rows_hand_case():
    a = np.array([[0.0, 0, 0], [1, 0, 0], [0, 2, 0]])
    b = np.array([[0.0, 0, 0], [1, 0, 0.5], [0, 2.09, 0]])
    # Distances 0, 0.5 and 0.09 (by hand); above 0.1 only the second row.
    np.testing.assert_array_equal(moved_rows(a, b, 0.1), [1])
    np.testing.assert_array_equal(moved_rows(a, b, 0.05), [1, 2])


def test_moved_rows_numba_and_numpy_agree(monkeypatch):
    rng = np.random.default_rng(4)
    a = rng.normal(size=(5000, 3)).astype(np.float32)
    b = a + rng.normal(scale=0.01, size=a.shape).astype(np.float32)
    fast = moved_rows(a, b, 0.015)
    monkeypatch.setenv("PLIANT_BACKEND", "numpy")
    slow = moved_rows(a, b, 0.015)
    # reference: the distances by numpy's own norm
    np.testing.assert_array_equal(fast, np.flatnonzero(np.linalg.norm(a.astype(float) - b, axis=1) > 0.015))
    np.testing.assert_array_equal(fast, slow)


def test_partial_update_on_the_numpy_path_equals_numba(monkeypatch):
    mesh = trimesh.creation.icosphere(subdivisions=3)
    posed = mesh.vertices.copy()
    moved = np.flatnonzero(posed[:, 1] < -0.4)
    posed[moved] *= 1.1

    def run():
        field = NormalField(mesh.faces, len(mesh.vertices))
        field.full(mesh.vertices)
        return field.update(posed, moved), field.normals.copy()

    fast = run()
    monkeypatch.setenv("PLIANT_BACKEND", "numpy")
    slow = run()
    np.testing.assert_array_equal(fast[0], slow[0])
    np.testing.assert_allclose(fast[1], slow[1], rtol=0, atol=1e-6)
