"""Tests for brushes.quality: the edit quality report."""

import json

import numpy as np
import pytest
import trimesh

from brushes.quality import REPORT_KEYS, format_quality, quality

# A unit right tetrahedron, faces wound counter-clockwise seen from outside.
# Outward normals by hand: (0,2,1) -> -z, (0,1,3) -> -y, (0,3,2) -> -x, (1,2,3) -> (1,1,1).
TET_V = np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])
TET_F = np.array([[0, 2, 1], [0, 1, 3], [0, 3, 2], [1, 2, 3]])


def sphere():
    m = trimesh.creation.icosphere(subdivisions=3, radius=1.3)
    return np.array(m.vertices), np.array(m.faces)


def box():
    m = trimesh.creation.box(extents=(2.0, 0.5, 1.25))
    return np.array(m.vertices), np.array(m.faces)


def grid(nx, ny, size=1.0):
    """Flat (nx+1) x (ny+1) vertex grid in z = 0, two triangles per cell, normals +z."""
    xs, ys = np.meshgrid(np.linspace(0, size, nx + 1), np.linspace(0, size, ny + 1), indexing="ij")
    v = np.stack([xs.ravel(), ys.ravel(), np.zeros(xs.size)], axis=1)
    i, j = np.meshgrid(np.arange(nx), np.arange(ny), indexing="ij")
    a = (i * (ny + 1) + j).ravel()
    b, c, d = a + (ny + 1), a + 1, a + (ny + 1) + 1
    f = np.concatenate([np.stack([a, b, d], 1), np.stack([a, d, c], 1)])
    return v, f


# --- tiny hand-computed cases ---------------------------------------------------------------


def test_identity_is_clean():
    r = quality(TET_V, TET_V, TET_F)
    assert r["closed"] is True
    assert r["volume_rest"] == pytest.approx(1 / 6)  # hand: unit right tetrahedron, 1/6
    assert r["volume_change"] == 0.0
    assert r["flipped_faces"] == 0
    assert r["moved_vertices"] == 0 and r["max_displacement"] == 0.0
    assert r["edge_stretch_min"] == r["edge_stretch_max"] == 1.0
    assert (r["vertex_count"], r["triangle_count"], r["edge_count"]) == (4, 4, 6)  # hand: tetrahedron
    assert r["verdict"] == ["no vertex moved"]


def test_tetrahedron_fold_counts_flipped_faces():
    # Move the apex (0,0,1) through the opposite base face to (0,0,-1). By hand: the three faces
    # around the apex turn over (normals -y -> +y, -x -> +x, (1,1,1) -> (-1,-1,1)), the base
    # face is untouched, and the volume goes from +1/6 to -1/6.
    posed = TET_V.copy()
    posed[3] = [0.0, 0.0, -1.0]
    r = quality(TET_V, posed, TET_F)
    assert r["flipped_faces"] == 3
    assert r["flipped_fraction"] == 0.75
    assert r["volume_posed"] == pytest.approx(-1 / 6)
    assert r["volume_change"] == pytest.approx(-2.0)
    assert r["max_displacement"] == 2.0 and r["max_displacement_vertex"] == 3
    assert r["mean_displacement"] == 0.5
    assert r["moved_vertices"] == 1
    assert "3 triangles turned over (75% of triangles)" in r["verdict"]
    assert "volume changed by -200.0%" in r["verdict"]
    assert "posed mesh turned inside out (volume changed sign)" in r["verdict"]


def test_plane_patch_fold_counts_flipped_faces():
    # A 2 x 2 cell patch in z = 0 (nine vertices, index 3 i + j at (0.5 i, 0.5 j)). Push the
    # centre vertex 4 from (0.5, 0.5) in +x through its right-hand neighbour 7 at (1, 0.5) to
    # (1.5, 0.5). Hand count: the triangles around the centre are (0,3,4), (0,4,1), (3,7,4),
    # (1,4,5), (4,7,8), (4,8,5); their posed 2D cross products (p1 - p0) x (p2 - p0) are
    # 0.25, 0.75, -0.25, 0.75, -0.25, 0.25 (all +0.25 at rest), so exactly two turn over.
    v, f = grid(2, 2, size=1.0)
    assert np.allclose(v[4], [0.5, 0.5, 0.0]) and np.allclose(v[7], [1.0, 0.5, 0.0])
    around = {tuple(t) for t in f if 4 in t}
    assert around == {(0, 3, 4), (0, 4, 1), (3, 7, 4), (1, 4, 5), (4, 7, 8), (4, 8, 5)}
    posed = v.copy()
    posed[4, 0] = 1.5
    r = quality(v, posed, f)
    assert r["flipped_faces"] == 2
    assert r["flipped_fraction"] == 0.25  # 2 of 8 triangles
    assert r["closed"] is False and r["volume_change"] is None
    assert "2 triangles turned over (25% of triangles)" in r["verdict"]


def test_collapsed_faces_are_degenerate():
    # Move vertex 3 onto vertex 0: faces (0,1,3) and (0,3,2) collapse to segments (area 0),
    # edge 0-3 collapses to a point (stretch 0). Hand-computed.
    posed = TET_V.copy()
    posed[3] = TET_V[0]
    r = quality(TET_V, posed, TET_F)
    assert r["degenerate_faces"] == 2 and r["degenerate_faces_rest"] == 0
    assert r["flipped_faces"] == 0  # a collapsed face has no normal: not counted as turned over
    assert r["edge_stretch_min"] == 0.0
    assert r["area_ratio_min"] == 0.0
    assert "2 triangles collapsed to near-zero area" in r["verdict"]
    assert "an edge shrank to 0 of its rest length" in r["verdict"]


def test_degenerate_rest_is_left_out_of_ratios():
    # The reverse edit: at rest vertex 3 sits on vertex 0, posed is the proper tetrahedron.
    # By hand: rest edge 0-3 has length 0 and is skipped; the other five edges go from
    # (1, 1, sqrt2, 1, 1) to (1, 1, sqrt2, sqrt2, sqrt2), so stretch is 1 .. sqrt2. Rest faces
    # (0,1,3) and (0,3,2) have area 0 and are skipped; (0,2,1) keeps area 1/2 and (1,2,3) goes
    # from 1/2 to sqrt3/2, so the area ratio is 1 .. sqrt3. The rest volume is 0.
    rest = TET_V.copy()
    rest[3] = TET_V[0]
    r = quality(rest, TET_V, TET_F)
    assert r["edge_stretch_min"] == pytest.approx(1.0)
    assert r["edge_stretch_max"] == pytest.approx(np.sqrt(2))
    assert r["area_ratio_min"] == pytest.approx(1.0)
    assert r["area_ratio_max"] == pytest.approx(np.sqrt(3))
    assert r["degenerate_faces_rest"] == 2 and r["degenerate_faces"] == 0
    assert r["volume_rest"] == 0.0 and r["volume_change"] is None
    assert "rest volume is zero: volume change not measured" in r["verdict"]
    json.dumps(r, allow_nan=False)  # no NaN from the skipped 0/0 ratios


# --- outside references ----------------------------------------------------------------------


@pytest.mark.parametrize("make", [sphere, box])
def test_volume_matches_trimesh(make):
    v, f = make()
    r = quality(v, v, f)
    # independent library: trimesh.Trimesh.volume
    assert r["closed"] is True
    assert r["volume_rest"] == pytest.approx(trimesh.Trimesh(v, f, process=False).volume, rel=1e-12)
    if make is box:
        assert r["volume_rest"] == pytest.approx(2.0 * 0.5 * 1.25, rel=1e-12)  # hand: box extents


@pytest.mark.parametrize("make", [sphere, box])
def test_affine_map_scales_volume_by_determinant(make):
    v, f = make()
    # Upper triangular, so det A = 2 * 1.5 * 0.8 = 2.4 by hand.
    a = np.array([[2.0, 0.5, -0.3], [0.0, 1.5, 0.7], [0.0, 0.0, 0.8]])
    posed = v @ a.T + [3.0, -1.0, 0.5]
    r = quality(v, posed, f)
    # textbook fact (linear algebra): a linear map scales volume by det A; translation adds nothing
    assert r["volume_change"] == pytest.approx(2.4 - 1.0, rel=1e-10)
    # independent library: trimesh.Trimesh.volume of the mapped mesh
    assert r["volume_posed"] == pytest.approx(trimesh.Trimesh(posed, f, process=False).volume, rel=1e-12)
    assert r["flipped_faces"] == 0  # det A > 0: an orientation-preserving map turns no face over
    assert "volume changed by +140.0%" in r["verdict"]


def test_reflection_reverses_volume_sign():
    v, f = sphere()
    posed = v * [-1.0, 1.0, 1.0]
    r = quality(v, posed, f)
    # textbook fact: det of a reflection is -1, so the signed volume changes sign
    assert r["volume_change"] == pytest.approx(-2.0, rel=1e-12)
    assert "posed mesh turned inside out (volume changed sign)" in r["verdict"]


def test_open_mesh_has_no_volume():
    v, f = sphere()
    f_open = f[1:]
    r = quality(v, v * 1.1, f_open)
    # independent library: trimesh agrees the surface is not watertight
    assert not trimesh.Trimesh(v, f_open, process=False).is_watertight
    assert r["closed"] is False
    assert r["volume_rest"] is None and r["volume_posed"] is None and r["volume_change"] is None
    assert r["boundary_edges"] == 3  # hand: removing one triangle from a closed surface opens 3 edges
    assert r["nonmanifold_edges"] == 0
    assert "surface is not closed (3 boundary edges): volume change not measured" in r["verdict"]


def test_inconsistent_orientation_is_not_closed():
    v, f = sphere()
    f_bad = f.copy()
    f_bad[0] = f_bad[0, ::-1]
    # independent library: trimesh sees the winding as inconsistent
    assert not trimesh.Trimesh(v, f_bad, process=False).is_winding_consistent
    r = quality(v, v, f_bad)
    assert r["closed"] is False and r["volume_change"] is None
    assert r["boundary_edges"] == 0 and r["nonmanifold_edges"] == 0
    assert any("triangles wound inconsistently" in w for w in r["verdict"])


def test_nonmanifold_edge_is_counted():
    # Two tetrahedra glued along edge 0-1 only: that edge is shared by four faces (hand count).
    v = np.vstack([TET_V, [[0.0, 0.0, -1.0], [0.0, -1.0, 0.0]]])
    f = np.vstack([TET_F, [[0, 1, 4], [0, 5, 1], [0, 4, 5], [1, 5, 4]]])
    r = quality(v, v, f)
    assert r["nonmanifold_edges"] == 1 and r["boundary_edges"] == 0
    assert r["closed"] is False


def test_uniform_scale_stretches_edges_exactly():
    v, f = sphere()
    # Scaling by a power of two is exact in binary floating point, so every ratio is exactly 2.
    r = quality(v, 2.0 * v, f)
    assert r["edge_stretch_min"] == r["edge_stretch_max"] == 2.0
    assert r["area_ratio_min"] == r["area_ratio_max"] == 4.0
    assert r["volume_change"] == 7.0  # det(2 I) = 8, exact
    s = 1.7
    r = quality(v, s * v, f)
    assert r["edge_stretch_min"] == pytest.approx(s, rel=1e-14)
    assert r["edge_stretch_max"] == pytest.approx(s, rel=1e-14)
    assert r["area_ratio_min"] == pytest.approx(s * s, rel=1e-14)
    assert r["volume_change"] == pytest.approx(s**3 - 1, rel=1e-12)


def test_edge_count_matches_trimesh():
    v, f = sphere()
    r = quality(v, v, f)
    # independent library: trimesh.Trimesh.edges_unique
    assert r["edge_count"] == len(trimesh.Trimesh(v, f, process=False).edges_unique)
    # hand: Euler characteristic of a sphere, V - E + F = 2
    assert r["vertex_count"] - r["edge_count"] + r["triangle_count"] == 2


def test_stretch_and_area_ratios_match_trimesh():
    v, f = sphere()
    posed = v + 0.15 * np.sin(2.0 * v[:, [1, 2, 0]])
    r = quality(v, posed, f)
    a, b = trimesh.Trimesh(v, f, process=False), trimesh.Trimesh(posed, f, process=False)
    # independent library: trimesh's unique-edge lengths and face areas (same edge order in
    # both meshes, since the faces are the same)
    stretch = b.edges_unique_length / a.edges_unique_length
    area = b.area_faces / a.area_faces
    assert r["edge_stretch_min"] == pytest.approx(stretch.min(), rel=1e-12)
    assert r["edge_stretch_max"] == pytest.approx(stretch.max(), rel=1e-12)
    assert r["area_ratio_min"] == pytest.approx(area.min(), rel=1e-12)
    assert r["area_ratio_max"] == pytest.approx(area.max(), rel=1e-12)


def test_closed_agrees_with_trimesh_on_random_damage():
    # independent library: trimesh's is_watertight and is_winding_consistent, on a closed
    # surface with random relabelling, randomly reversed faces and sometimes a removed face
    m = trimesh.creation.icosphere(subdivisions=1)
    v, f0 = np.array(m.vertices), np.array(m.faces)
    rng = np.random.default_rng(7)
    seen = set()
    for _ in range(60):
        perm = rng.permutation(len(v))
        f = np.argsort(perm)[f0]
        flip = rng.random(len(f)) < rng.choice([0.0, 0.02, 0.5])
        f[flip] = f[flip, ::-1]
        if rng.random() < 0.2:
            f = f[1:]
        t = trimesh.Trimesh(v[perm], f, process=False)
        expected = bool(t.is_watertight and t.is_winding_consistent)
        assert quality(v[perm], v[perm], f)["closed"] is expected
        seen.add(expected)
    assert seen == {True, False}  # both outcomes were exercised


def test_folding_displacement_field_is_reported():
    # A hand-built edit x -> x + k sin(w x) on a flat patch. Its Jacobian determinant is
    # 1 + k w cos(w x) (hand derivation), negative where cos(w x) < -1 / (k w): the map folds.
    # Each cell [x_i, x_i+1] x [y_j, y_j+1] keeps y, so both its triangles flip exactly when
    # the mapped x_i+1 lands left of the mapped x_i.
    nx, ny = 60, 8
    v, f = grid(nx, ny, size=1.0)
    k, w = 0.2, 4 * np.pi  # k w ~ 2.5 > 1: folds
    posed = v.copy()
    posed[:, 0] += k * np.sin(w * v[:, 0])
    xs = np.linspace(0, 1, nx + 1)
    fx = xs + k * np.sin(w * xs)
    expected = 2 * ny * int(np.count_nonzero(np.diff(fx) < 0))
    assert expected > 0
    r = quality(v, posed, f)
    assert r["flipped_faces"] == expected
    assert any("turned over" in w for w in r["verdict"])
    # the same field with k w < 1 does not fold
    gentle = v.copy()
    gentle[:, 0] += 0.05 * np.sin(w * v[:, 0])
    r = quality(v, gentle, f)
    assert r["flipped_faces"] == 0
    assert not any("flipped" in w for w in r["verdict"])


def test_folding_field_on_closed_mesh_reports_flips_and_volume():
    v, f = sphere()
    posed = v.copy()
    posed[:, 0] += 0.5 * np.sin(12.0 * v[:, 2])  # shear of amplitude 0.5, frequency 12: folds
    posed[:, 2] += 0.4 * np.sin(10.0 * v[:, 2])  # 1 + 4 cos(10 z) < 0 somewhere: folds in z
    r = quality(v, posed, f)
    assert r["flipped_faces"] > 0
    # independent library: trimesh's volume of the posed mesh
    vt = trimesh.Trimesh(posed, f, process=False).volume
    assert r["volume_posed"] == pytest.approx(vt, rel=1e-10, abs=1e-12)


# --- invariance, serialisation, formatting ----------------------------------------------------


def test_rigid_motion_changes_nothing_but_position():
    v, f = sphere()
    c, s = np.cos(0.7), np.sin(0.7)
    rot = np.array([[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]])
    t = np.array([0.3, -2.0, 1.0])
    r = quality(v, v @ rot.T + t, f)
    assert r["flipped_faces"] == 0
    assert r["volume_change"] == pytest.approx(0.0, abs=1e-12)
    assert r["edge_stretch_min"] == pytest.approx(1.0, rel=1e-12)
    assert r["edge_stretch_max"] == pytest.approx(1.0, rel=1e-12)
    assert r["verdict"] == []


def test_moving_both_meshes_keeps_the_report():
    v, f = sphere()
    posed = v + 0.1 * np.sin(3 * v)
    r0 = quality(v, posed, f)
    t = np.array([5.0, -3.0, 2.0])
    r1 = quality(v + t, posed + t, f)
    # (not max_displacement_vertex: this field has many near-ties that rounding may reorder)
    for key in ("flipped_faces", "moved_vertices", "degenerate_faces"):
        assert r0[key] == r1[key]
    for key in ("volume_change", "max_displacement", "mean_displacement", "edge_stretch_max",
                "area_ratio_min"):
        assert r1[key] == pytest.approx(r0[key], rel=1e-9)
    assert r1["bbox_rest"][0] == pytest.approx(np.array(r0["bbox_rest"][0]) + t)


def test_pure_translation_displacement():
    v, f = box()
    t = np.array([3.0, 4.0, 0.0])  # hand: |t| = 5
    r = quality(v, v + t, f)
    assert r["max_displacement"] == pytest.approx(5.0)
    assert r["mean_displacement"] == pytest.approx(5.0)
    assert r["moved_vertices"] == len(v)


def test_report_is_json_ready():
    v, f = sphere()
    r = quality(v, v * 1.05, f)
    assert set(r) == set(REPORT_KEYS)
    back = json.loads(json.dumps(r, allow_nan=False))
    assert back == r
    r_open = quality(v, v, f[2:])
    assert json.loads(json.dumps(r_open, allow_nan=False)) == r_open


def test_format_quality_table():
    posed = TET_V.copy()
    posed[3] = [0.0, 0.0, -1.0]
    r = quality(TET_V, posed, TET_F)
    text = format_quality(json.loads(json.dumps(r)))
    assert "flipped faces" in text and "3 (75%)" in text
    assert "volume change" in text and "-200%" in text
    assert "  - 3 triangles turned over (75% of triangles)" in text
    assert text.splitlines()[0].startswith("vertices")
    clean = format_quality(quality(TET_V, TET_V * 1.001, TET_F))
    assert "warnings: none" in clean


def test_format_quality_rejects_bad_report():
    with pytest.raises(ValueError, match="^report: must be a dict"):
        format_quality([1, 2])
    with pytest.raises(ValueError, match="^report: missing keys .*verdict"):
        r = quality(TET_V, TET_V, TET_F)
        del r["verdict"]
        format_quality(r)


# --- bad input -------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "rest, posed, faces, match",
    [
        (np.zeros((4, 2)), np.zeros((4, 2)), TET_F, r"^rest: must have shape \(n, 3\)"),
        (np.zeros((0, 3)), np.zeros((0, 3)), TET_F, "^rest: must hold at least one vertex"),
        (TET_V, TET_V[:3], TET_F, "^posed: must have the same shape"),
        (TET_V, np.zeros(12), TET_F, r"^posed: must have shape \(n, 3\)"),
        (TET_V, "abc", TET_F, "^posed: must be an"),
        (np.where(TET_V == 1, np.nan, TET_V), TET_V, TET_F, "^rest: 3 vertices are not finite"),
        (TET_V, np.where(TET_V == 1, np.inf, TET_V), TET_F, "^posed: 3 vertices are not finite"),
        (TET_V, TET_V, TET_F[:, :2], r"^faces: must have shape \(m, 3\)"),
        (TET_V, TET_V, np.zeros((0, 3), int), "^faces: must hold at least one face"),
        (TET_V, TET_V, TET_F.astype(float), "^faces: must be integer"),
        (TET_V, TET_V, TET_F.astype(bool), "^faces: must be integer"),
        (TET_V, TET_V, TET_F + 1, "^faces: index 4 is out of range for 4 vertices"),
        (TET_V, TET_V, TET_F - 1, "^faces: index -1 is out of range"),
    ],
)
def test_bad_input(rest, posed, faces, match):
    with pytest.raises(ValueError, match=match):
        quality(rest, posed, faces)


@pytest.mark.parametrize("name", ["volume_tolerance", "stretch_tolerance"])
@pytest.mark.parametrize("value", [0.0, -1.0, float("nan"), "big"])
def test_bad_tolerance(name, value):
    with pytest.raises(ValueError, match=f"^{name}: must be a positive number"):
        quality(TET_V, TET_V, TET_F, **{name: value})


def test_tolerances_are_keyword_only():
    with pytest.raises(TypeError):
        quality(TET_V, TET_V, TET_F, 0.01)


def test_volume_tolerance_controls_warning():
    v, f = box()
    posed = v * [1.0, 1.0, 1.02]  # hand: volume grows by exactly 2%
    assert "volume changed by +2.0%" in quality(v, posed, f)["verdict"]
    assert not any("volume" in w for w in quality(v, posed, f, volume_tolerance=0.05)["verdict"])


def test_stretch_tolerance_controls_warning():
    v, f = box()
    posed = v * [3.0, 1.0, 1.0]  # hand: the x-axis edges stretch by 3
    assert quality(v, posed, f)["edge_stretch_max"] == pytest.approx(3.0)
    assert not any("stretched" in w for w in quality(v, posed, f)["verdict"])
    assert "an edge stretched 3 times its rest length" in quality(
        v, posed, f, stretch_tolerance=2.0
    )["verdict"]


# --- welded topology and polygon counts (issue 11) -----------------------------------------------


def _split_every_face(v, f):
    """Each triangle gets its own three vertices: what a file split at every seam looks like."""
    return v[f.reshape(-1)], np.arange(3 * len(f)).reshape(-1, 3)


@pytest.mark.parametrize("make", [sphere, box])
def test_seam_split_mesh_is_closed_and_has_its_volume(make):
    v, f = make()
    sv, sf = _split_every_face(v, f)
    posed = sv * [1.0, 1.1, 1.0]
    r = quality(sv, posed, sf)
    assert r["vertex_count"] == 3 * len(f) and r["position_count"] == len(v)
    assert r["closed"] is True and r["boundary_edges"] == 0
    # independent library: trimesh's volume of the unsplit mesh, and the determinant 1.1
    ref = trimesh.Trimesh(v, f, process=False).volume
    assert r["volume_rest"] == pytest.approx(ref, rel=1e-12)
    assert r["volume_change"] == pytest.approx(0.1, rel=1e-9)
    assert r["edge_count"] == len(trimesh.Trimesh(v, f, process=False).edges_unique)


def test_copies_that_part_are_not_welded():
    # two coincident copies at rest that the pose separates are two vertices (a cut, not a seam)
    v, f = box()
    sv, sf = _split_every_face(v, f)
    posed = sv.copy()
    posed[0] += [0.0, 0.0, 0.3]
    r = quality(sv, posed, sf)
    assert r["closed"] is False and r["position_count"] == len(v) + 1


def test_polygons_and_triangles_are_counted_apart():
    # a unit square as one quad (fan: two triangles) plus a triangle: 2 polygons, 3 triangles
    v = np.array([[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0], [2, 0, 0]], float)
    f = np.array([[0, 1, 2], [0, 2, 3], [1, 4, 2]])
    r = quality(v, v + [0, 0, 0.1], f, polygons=[4, 3])
    assert (r["polygon_count"], r["triangle_count"]) == (2, 3)
    assert quality(v, v, f)["polygon_count"] == 3
    with pytest.raises(ValueError, match="^polygons: 2 polygons make 4 triangles"):
        quality(v, v, f, polygons=[4, 4])
