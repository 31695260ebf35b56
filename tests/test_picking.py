import math
import os
import subprocess
import sys

import numpy as np
import pytest
import trimesh
from trimesh.ray.ray_triangle import RayMeshIntersector

from viewer.picking import Picker, backend_name, morton_codes

BACKENDS = ["numpy"] + (["numba"] if backend_name() == "numba" else [])
NUMBA_MISSING = "numba is not importable here (or PLIANT_BACKEND=numpy), so only numpy is checked"


def lumpy_sphere(subdivisions=3, seed=0):
    """A closed, non-convex test surface: an icosphere with radial noise."""
    rng = np.random.default_rng(seed)
    s = trimesh.creation.icosphere(subdivisions=subdivisions)
    v = s.vertices * (1 + 0.15 * rng.uniform(-1, 1, size=(len(s.vertices), 1)))
    return v, np.asarray(s.faces)


def random_rays(rng, n, spread=1.3):
    """Rays from a shell of radius 4 aimed at random points within ``spread`` of the origin."""
    origins = rng.normal(size=(n, 3))
    origins *= 4 / np.linalg.norm(origins, axis=1, keepdims=True)
    aims = rng.uniform(-spread, spread, size=(n, 3))
    return origins, aims - origins


def brute_force(vertices, faces, origin, direction):
    """Closest hit over all triangles, written directly from Moller & Trumbore (J. Graphics
    Tools 2(1), 1997), two-sided: (face, t) or (-1, inf)."""
    d = direction / np.linalg.norm(direction)
    best = (-1, math.inf)
    for i, (a, b, c) in enumerate(vertices[faces]):
        edge1, edge2 = b - a, c - a
        pvec = np.cross(d, edge2)
        det = edge1 @ pvec
        if abs(det) < 1e-15:
            continue
        tvec = origin - a
        u = (tvec @ pvec) / det
        if u < 0 or u > 1:
            continue
        qvec = np.cross(tvec, edge1)
        v = (d @ qvec) / det
        if v < 0 or u + v > 1:
            continue
        t = (edge2 @ qvec) / det
        if 0 <= t < best[1]:
            best = (i, t)
    return best


def trimesh_closest(vertices, faces, origins, directions):
    """Per ray: distance to the nearest hit from trimesh's ray_triangle module (inf if none)."""
    mesh = trimesh.Trimesh(vertices, faces, process=False)
    tri, ray, loc = RayMeshIntersector(mesh).intersects_id(
        origins, directions, multiple_hits=True, return_locations=True
    )
    dist = np.full(len(origins), np.inf)
    face = np.full(len(origins), -1)
    t = np.linalg.norm(loc - origins[ray], axis=1)
    for i, (r, f) in enumerate(zip(ray, tri)):
        if t[i] < dist[r]:
            dist[r], face[r] = t[i], f
    return dist, face


@pytest.mark.parametrize("backend", BACKENDS)
def test_agrees_with_trimesh_ray_tools(backend):
    v, f = lumpy_sphere(3)
    rng = np.random.default_rng(10)
    origins, directions = random_rays(rng, 300)
    ref_dist, ref_face = trimesh_closest(v, f, origins, directions)
    assert 50 < np.isfinite(ref_dist).sum() < 300  # both hits and misses are exercised
    picker = Picker(v, f, backend=backend)
    for o, d, rd, rf in zip(origins, directions, ref_dist, ref_face):
        hit = picker.pick(o, d)
        assert hit.hit == np.isfinite(rd)
        if hit.hit:
            assert hit.distance == pytest.approx(rd, rel=1e-9)
            assert hit.face == rf
            np.testing.assert_allclose(hit.point, o + rd * d / np.linalg.norm(d), atol=1e-9)


@pytest.mark.parametrize("backend", BACKENDS)
def test_agrees_with_brute_force_after_refit(backend):
    v, f = lumpy_sphere(2, seed=1)
    picker = Picker(v, f, backend=backend)
    # Deform strongly (a twist about Y plus a stretch) and refit without rebuilding.
    angle = 1.5 * v[:, 1]
    c, s = np.cos(angle), np.sin(angle)
    moved = np.c_[c * v[:, 0] - s * v[:, 2], 1.6 * v[:, 1], s * v[:, 0] + c * v[:, 2]]
    picker.refit(moved)
    rng = np.random.default_rng(11)
    origins, directions = random_rays(rng, 80, spread=1.6)
    hits = 0
    for o, d in zip(origins, directions):
        face, t = brute_force(moved, f, o, d)
        hit = picker.pick(o, d)
        assert hit.face == face
        if face >= 0:
            hits += 1
            assert hit.distance == pytest.approx(t, rel=1e-9)
    assert hits > 20


def test_numba_and_numpy_agree():
    if "numba" not in BACKENDS:
        pytest.skip(NUMBA_MISSING)
    v, f = lumpy_sphere(4, seed=2)
    a, b = Picker(v, f, backend="numpy"), Picker(v, f, backend="numba")
    np.testing.assert_array_equal(a.lo, b.lo)
    np.testing.assert_array_equal(a.hi, b.hi)
    rng = np.random.default_rng(12)
    for o, d in zip(*random_rays(rng, 200)):
        ha, hb = a.pick(o, d), b.pick(o, d)
        assert ha.face == hb.face
        if ha.hit:
            assert ha.distance == pytest.approx(hb.distance, rel=1e-12)


@pytest.mark.parametrize("backend", BACKENDS)
def test_single_triangle_hand_checked(backend):
    v = np.array([[0.0, 0, 0], [2, 0, 0], [0, 2, 0]])
    p = Picker(v, [[0, 1, 2]], backend=backend)
    # Hand-checked: the ray down -Z through (0.5, 0.5) meets the z = 0 plane after 3 units,
    # at barycentric (0.5, 0.25, 0.25), and the winding normal is +Z.
    hit = p.pick([0.5, 0.5, 3], [0, 0, -2])
    assert hit.hit and hit.face == 0 and hit.distance == pytest.approx(3.0)
    np.testing.assert_allclose(hit.point, [0.5, 0.5, 0])
    np.testing.assert_allclose(hit.barycentric, [0.5, 0.25, 0.25])
    np.testing.assert_allclose(hit.normal, [0, 0, 1])
    assert p.pick([0.5, 0.5, -3], [0, 0, 1]).hit  # back face
    assert not p.pick([0.5, 0.5, 3], [0, 0, 1]).hit  # pointing away
    assert not p.pick([1.5, 1.5, 3], [0, 0, -1]).hit  # outside the hypotenuse
    assert not p.pick([-1, 0.5, 0], [1, 0, 0]).hit  # in the plane: parallel
    assert not p.pick([0.5, 0.5, 3], [0, 0, -1], max_distance=2.5).hit
    miss = p.pick([5, 5, 5], [0, 0, 1])
    assert miss.face == -1 and miss.distance == math.inf and np.all(np.isnan(miss.point))


@pytest.mark.parametrize("backend", BACKENDS)
def test_nearest_of_stacked_layers(backend):
    # Ten parallel unit squares at z = 0..9; a ray from above must stop at the top one.
    quads = []
    for z in range(10):
        quads.append([[0, 0, z], [1, 0, z], [1, 1, z], [0, 1, z]])
    v = np.array(quads, dtype=float).reshape(-1, 3)
    f = np.array([[4 * k, 4 * k + 1, 4 * k + 2] for k in range(10)] + [[4 * k, 4 * k + 2, 4 * k + 3] for k in range(10)])
    p = Picker(v, f, leaf_size=1, backend=backend)
    hit = p.pick([0.7, 0.2, 20], [0, 0, -1])
    assert hit.distance == pytest.approx(11.0) and hit.face == 9
    hit = p.pick([0.2, 0.7, -5], [0, 0, 1])
    assert hit.distance == pytest.approx(5.0) and hit.face == 10


@pytest.mark.parametrize("backend", BACKENDS)
def test_rigid_motion_moves_the_answer(backend):
    v, f = lumpy_sphere(3, seed=3)
    rng = np.random.default_rng(13)
    q, _ = np.linalg.qr(rng.normal(size=(3, 3)))
    if np.linalg.det(q) < 0:
        q[:, 0] *= -1
    shift = rng.normal(size=3) * 5
    a = Picker(v, f, backend=backend)
    b = Picker(v @ q.T + shift, f, backend=backend)
    for o, d in zip(*random_rays(rng, 100)):
        ha, hb = a.pick(o, d), b.pick(q @ o + shift, q @ d)
        assert ha.face == hb.face
        if ha.hit:
            assert hb.distance == pytest.approx(ha.distance, rel=1e-9)
            np.testing.assert_allclose(hb.normal, q @ ha.normal, atol=1e-9)


def test_refit_boxes_enclose_their_triangles():
    v, f = lumpy_sphere(3, seed=4)
    for backend in BACKENDS:
        p = Picker(v, f, leaf_size=3, backend=backend)
        p.refit(v * [1, 2, 0.5])
        tri = (v * [1, 2, 0.5])[f[p.order]]
        m = len(f)
        for k in range(0, m, 37):
            leaf = p.n_leaves + k // 3
            assert np.all(p.lo[leaf] <= tri[k].min(axis=0)) and np.all(tri[k].max(axis=0) <= p.hi[leaf])
            node = leaf // 8  # an ancestor
            assert np.all(p.lo[node] <= p.lo[leaf]) and np.all(p.hi[leaf] <= p.hi[node])


def test_picker_copies_its_vertices():
    v, f = lumpy_sphere(1)
    p = Picker(v, f)
    before = p.pick([0, 0, 5], [0, 0, -1])
    v *= 10  # the caller's array changes; the picker must not
    assert p.pick([0, 0, 5], [0, 0, -1]).distance == before.distance


def test_morton_codes_hand_checked():
    # Points at the corners of their box: (max, 0, 0) sets every x bit, which is bit 3k + 2.
    pts = np.array([[0.0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1], [1, 1, 1]])
    codes = morton_codes(pts)
    x_bits = sum(1 << (3 * k + 2) for k in range(21))
    assert codes[0] == 0
    assert codes[1] == x_bits and codes[2] == x_bits >> 1 and codes[3] == x_bits >> 2
    assert codes[4] == (1 << 63) - 1


def test_backend_env_forces_numpy():
    code = "from viewer.picking import backend_name; print(backend_name())"
    env = dict(os.environ, PLIANT_BACKEND="numpy")
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "numpy"


def test_bad_input():
    v, f = lumpy_sphere(1)
    with pytest.raises(ValueError, match="vertices"):
        Picker(v[:, :2], f)
    with pytest.raises(ValueError, match="faces"):
        Picker(v, f + len(v))
    with pytest.raises(ValueError, match="faces"):
        Picker(v, np.zeros((0, 3), int))
    with pytest.raises(ValueError, match="faces"):
        Picker(v, f.astype(float))
    with pytest.raises(ValueError, match="leaf_size"):
        Picker(v, f, leaf_size=0)
    p = Picker(v, f)
    with pytest.raises(ValueError, match="vertices"):
        p.refit(v[:-1])
    bad = v.copy()
    bad[0, 0] = np.nan
    with pytest.raises(ValueError, match="vertices"):
        p.refit(bad)
    with pytest.raises(ValueError, match="direction"):
        p.pick([0, 0, 0], [0, 0, 0])
    with pytest.raises(ValueError, match="origin"):
        p.pick([0, 0], [0, 0, 1])


def test_bench_runs_on_a_small_closed_torus():
    from benchmarks.picking import bench_picking, wavy_torus

    v, f = wavy_torus(2000)
    assert len(f) >= 2000
    assert trimesh.Trimesh(v, f, process=False).is_watertight  # trimesh's own closedness check
    r = bench_picking(2000, n_picks=20, backend="numpy")
    assert r["n_triangles"] == len(f) and r["hit_fraction"] == 1.0  # every ray aims at a face centroid
    assert r["pick_median_s"] > 0 and r["refit_s"] > 0


@pytest.mark.parametrize("backend", BACKENDS)
def test_rays_through_vertices_and_edges_never_slip_through(backend):
    # A closed surface (trimesh confirms it) must stop every ray aimed exactly at one of its
    # vertices or edge midpoints, where plain Moller-Trumbore can miss both neighbours.
    v, f = lumpy_sphere(2, seed=5)
    assert trimesh.Trimesh(v, f, process=False).is_watertight
    p = Picker(v, f, backend=backend)
    rng = np.random.default_rng(14)
    edges = trimesh.Trimesh(v, f, process=False).edges_unique
    targets = np.concatenate([v, v[edges].mean(axis=1)])
    for target in targets:
        origin = rng.normal(size=3) * 3 + target * 4
        assert p.pick(origin, target - origin).hit


def test_leaf_tables_of_both_backends_agree():
    # The numba tables (two linear passes) against the numpy ones (sorting), on a mesh with
    # an unused vertex; and every leaf's vertices are exactly the corners of its triangles.
    from viewer.picking import _leaf_tables_numpy, _numba_kernels
    mesh = trimesh.creation.icosphere(subdivisions=2)
    vertices = np.vstack([mesh.vertices, [[5.0, 5.0, 5.0]]])
    picker = Picker(vertices, mesh.faces, leaf_size=4, backend="numpy")
    rng = np.random.default_rng(2)
    faces_sorted = mesh.faces[rng.permutation(len(mesh.faces))]
    expected = _leaf_tables_numpy(faces_sorted, len(vertices), 4, picker.n_leaves)
    order, faces_local, ptr, members = expected
    np.testing.assert_array_equal(order[faces_local], faces_sorted)
    for leaf in range(picker.n_leaves):
        corners = faces_local[4 * leaf:4 * leaf + 4].ravel()
        np.testing.assert_array_equal(members[ptr[leaf]:ptr[leaf + 1]], np.unique(corners))
    kernels = _numba_kernels()
    if kernels is None:
        pytest.skip("numba is not importable here, so only the numpy tables were checked")
    for got, want in zip(kernels["tables"](faces_sorted, len(vertices), 4, picker.n_leaves), expected):
        np.testing.assert_array_equal(got, want)
