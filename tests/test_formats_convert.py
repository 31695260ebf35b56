"""Tests for brushes.formats.convert: conversions keep what the target holds and say what not.

Test assets are made here: a cube whose texture coordinates are indexed apart from its
positions (every face has its own four ``vt``), with per-face normals, two groups and two
materials, as quads. Converted files are read back with independent readers: trimesh (OBJ,
PLY, GLB), the Khronos glTF validator, and pxr (USD) with OpenUSD's own validators.
"""

import json
import os
import shutil
import subprocess

import numpy as np
import pytest
import trimesh

from brushes.formats import load_mesh, save_mesh
from brushes.formats.convert import split_vertices

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

CUBE_V = np.array([[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0],
                   [0, 0, 1], [1, 0, 1], [1, 1, 1], [0, 1, 1]], float)
CUBE_Q = [[0, 3, 2, 1], [4, 5, 6, 7], [0, 1, 5, 4], [1, 2, 6, 5], [2, 3, 7, 6], [3, 0, 4, 7]]
CUBE_N = [[0, 0, -1], [0, 0, 1], [0, -1, 0], [1, 0, 0], [0, 1, 0], [-1, 0, 0]]


def _cube_obj(path, seed=0):
    """The test cube; returns the (24, 2) texture coordinates, one row per face corner."""
    uv = np.random.default_rng(seed).random((24, 2)).round(6)
    lines = ["# workshop test cube", "mtllib cube.mtl"]
    lines += ["v %r %r %r" % tuple(v) for v in CUBE_V.tolist()]
    lines += ["vt %r %r" % tuple(t) for t in uv.tolist()]
    lines += ["vn %d %d %d" % tuple(n) for n in CUBE_N]
    lines += ["g lid", "usemtl paint"]
    for i, q in enumerate(CUBE_Q):
        if i == 2:
            lines += ["g sides", "usemtl wood"]
        lines.append("f " + " ".join(f"{a + 1}/{4 * i + k + 1}/{i + 1}" for k, a in enumerate(q)))
    path.write_text("\n".join(lines) + "\n")
    return uv


def _corner_rows(doc, shift=(0, 0, 0)):
    """(c, 5) position and texture coordinate of every polygon corner: what a viewer draws."""
    p = doc.polygons
    return np.concatenate([doc.vertices[p.corners] + shift, p.uv[p.uv_index]], axis=1)


def _assert_same_corners(a, b, atol=1e-5):
    """Every distinct corner row of ``a`` is one of ``b`` and the reverse (float32 files)."""
    from scipy.spatial import cKDTree

    a, b = np.unique(a, axis=0), np.unique(b, axis=0)
    assert cKDTree(b).query(a)[0].max() < atol and cKDTree(a).query(b)[0].max() < atol


def _validator():
    node = shutil.which("node")
    package = os.path.join(REPO, "node_modules", "gltf-validator")
    if node is None:
        pytest.skip("node is not installed, so the Khronos glTF validator cannot run")
    if not os.path.isdir(package):
        pytest.skip("npm package gltf-validator is not installed (run `npm ci` in the repo root)")
    return node, os.path.join(REPO, "tests", "gltf_validate.mjs")


def _assert_khronos_clean(path):
    # outside reference: the Khronos glTF validator, 0 errors and 0 warnings (issue 11)
    node, script = _validator()
    proc = subprocess.run([node, script, str(path)], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    issues = json.loads(proc.stdout)["issues"]
    assert issues["numErrors"] == 0 and issues["numWarnings"] == 0, issues["messages"]


def _assert_usd_valid(path):
    # outside reference: every validator OpenUSD registers (pxr.UsdValidation), no errors
    from pxr import Usd, UsdValidation

    registry = UsdValidation.ValidationRegistry()
    context = UsdValidation.ValidationContext(registry.GetOrLoadAllValidators())
    errors = [e for e in context.Validate(Usd.Stage.Open(str(path)))
              if e.GetType() == UsdValidation.ValidationErrorType.Error]
    assert not errors, [e.GetMessage() for e in errors]


def test_split_vertices_by_hand():
    # two triangles sharing an edge (vertices 1, 2) whose corners disagree on vertex 2's uv
    from brushes.formats import Polygons

    polys = Polygons(np.array([3, 3]), np.array([0, 1, 2, 2, 1, 3]),
                     uv=np.array([[0, 0], [1, 0], [0, 1], [0.5, 1], [1, 1]], float),
                     uv_index=np.array([0, 1, 2, 3, 1, 4]))
    v = np.arange(12, dtype=float).reshape(4, 3)
    out_v, out, source = split_vertices(v, polys)
    assert source.tolist() == [0, 1, 2, 2, 3]          # vertex 2 is split in two, in order
    assert out.corners.tolist() == [0, 1, 2, 3, 1, 4]
    np.testing.assert_array_equal(out_v, v[source])
    np.testing.assert_array_equal(out.uv[out.corners], polys.uv[polys.uv_index])


@pytest.mark.parametrize("ext", ["glb", "gltf"])
def test_uv_indexed_obj_to_gltf_keeps_uvs_normals_groups_materials(tmp_path, ext):
    src = tmp_path / "cube.obj"
    _cube_obj(src)
    doc = load_mesh(src)
    out = tmp_path / f"cube.{ext}"
    written = save_mesh(doc, out, doc.vertices + [0.5, 0, 0])
    _assert_khronos_clean(out)
    # the one line says what glTF cannot hold, and only that
    line = written.summary()
    assert "polygons (6 polygons written as 12 triangles)" in line
    assert "material definitions" in line
    assert written.dropped == ("polygons (6 polygons written as 12 triangles)",
                               "material definitions (the .mtl file; names are kept)")
    assert written.vertices == (8, 24)
    back = load_mesh(out)
    _assert_same_corners(_corner_rows(back), _corner_rows(doc, [0.5, 0, 0]))
    # independent reader: trimesh sees 24 vertices (split at every seam) and the same uvs (it
    # turns glTF's top-left texture origin back to OBJ's bottom-left one, as pliant does)
    scene = trimesh.load(out, process=False)
    uvs = np.concatenate([g.visual.uv for g in scene.geometry.values()])
    assert len(uvs) == 24
    _assert_same_corners(uvs, doc.polygons.uv)
    # normals: each split vertex carries its face's normal (a flat-shaded cube)
    n = back.polygons.normals[back.polygons.normal_index].reshape(12, 3, 3)[:, 0]
    tri_normals = trimesh.Trimesh(back.vertices, back.faces, process=False).face_normals
    np.testing.assert_allclose(n, tri_normals, atol=1e-6)
    assert sorted(back.groups) == ["lid", "sides"] and back.polygons.materials == ("paint", "wood")
    gltf = json.loads(out.read_text()) if ext == "gltf" else None
    if gltf is not None:
        assert [n["name"] for n in gltf["nodes"]] == ["lid", "sides"]
        assert [m["name"] for m in gltf["materials"]] == ["paint", "wood"]
    # the source vertex of each written vertex maps back to the OBJ's 8
    assert back.source_vertex is not None and set(back.source_vertex.tolist()) == set(range(8))
    np.testing.assert_allclose(back.vertices, doc.vertices[back.source_vertex] + [0.5, 0, 0],
                               atol=1e-6)


def test_uv_indexed_obj_to_ply_keeps_uvs_and_groups(tmp_path):
    src = tmp_path / "cube.obj"
    _cube_obj(src)
    doc = load_mesh(src)
    out = tmp_path / "cube.ply"
    written = save_mesh(doc, out)
    assert written.summary().endswith("not kept: material definitions (the .mtl file; names are kept)")
    back = load_mesh(out)
    assert back.polygon_count == 6 and len(back.vertices) == 24
    _assert_same_corners(_corner_rows(back), _corner_rows(doc))
    assert sorted(back.groups) == ["lid", "sides"] and back.polygons.materials == ("paint", "wood")
    # independent reader: trimesh reads the PLY's positions, uv and triangulated faces
    ref = trimesh.load(out, process=False)
    np.testing.assert_allclose(ref.vertices, back.vertices, atol=1e-6)
    np.testing.assert_allclose(ref.visual.uv, back.polygons.uv, atol=1e-6)
    assert len(ref.faces) == 12


@pytest.mark.parametrize("ext", ["usda", "usdc", "usd"])
def test_obj_to_usd_keeps_everything_but_the_mtl(tmp_path, ext):
    from pxr import Usd, UsdGeom, UsdShade

    src = tmp_path / "cube.obj"
    uv = _cube_obj(src)
    doc = load_mesh(src)
    out = tmp_path / f"cube.{ext}"
    written = save_mesh(doc, out)
    assert written.dropped == ("material definitions (the .mtl file; names are kept)",)
    _assert_usd_valid(out)
    # read back with pxr itself
    stage = Usd.Stage.Open(str(out))
    mesh = UsdGeom.Mesh(next(p for p in stage.Traverse() if p.IsA(UsdGeom.Mesh)))
    assert list(mesh.GetFaceVertexCountsAttr().Get()) == [4] * 6
    assert np.array(mesh.GetFaceVertexIndicesAttr().Get()).tolist() == sum(CUBE_Q, [])
    st = UsdGeom.PrimvarsAPI(mesh).GetPrimvar("st")
    assert st.GetInterpolation() == "faceVarying"
    np.testing.assert_allclose(np.array(st.ComputeFlattened()), uv, atol=1e-6)
    subsets = {s.GetPrim().GetName(): list(s.GetIndicesAttr().Get())
               for s in UsdGeom.Subset.GetAllGeomSubsets(mesh)}
    assert subsets["lid"] == [0, 1] and subsets["sides"] == [2, 3, 4, 5]
    bound = {s.GetPrim().GetName(): UsdShade.MaterialBindingAPI(s.GetPrim()).ComputeBoundMaterial()[0]
             .GetPrim().GetName() for s in UsdGeom.Subset.GetAllGeomSubsets(mesh)
             if s.GetFamilyNameAttr().Get() == "materialBind"}
    assert sorted(bound.values()) == ["paint", "wood"]
    back = load_mesh(out)
    assert sorted(back.groups) == ["cube", "lid", "sides"]  # the prim's name is a group too
    _assert_same_corners(_corner_rows(back), _corner_rows(doc))


@pytest.mark.parametrize("ext", ["stl", "off"])
def test_targets_without_attributes_list_them(tmp_path, ext):
    src = tmp_path / "cube.obj"
    _cube_obj(src)
    doc = load_mesh(src)
    written = save_mesh(doc, tmp_path / f"cube.{ext}")
    line = written.summary()
    for item in ("texture coordinates", "normals", "groups (lid, sides)", "materials (paint, wood)"):
        assert item in line, line
    assert ("polygons (6 polygons written as 12 triangles)" in line) == (ext == "stl")
    ref = trimesh.load(tmp_path / f"cube.{ext}")  # independent reader (merges STL corners)
    assert ref.is_watertight and ref.volume == pytest.approx(1.0)


def test_gltf_to_obj_keeps_node_names_as_groups(tmp_path):
    # a two-node glTF written by trimesh (independent writer), converted to OBJ
    a = trimesh.creation.box()
    b = trimesh.creation.icosphere(subdivisions=1)
    b.apply_translation([3, 0, 0])
    scene = trimesh.Scene()
    scene.add_geometry(a, node_name="crate", geom_name="crate")
    scene.add_geometry(b, node_name="ball", geom_name="ball")
    src = tmp_path / "two.glb"
    src.write_bytes(scene.export(file_type="glb"))
    doc = load_mesh(src)
    out = tmp_path / "two.obj"
    written = save_mesh(doc, out)
    assert "node hierarchy and transforms (meshes written in world space)" in written.summary()
    back = load_mesh(out)
    assert sorted(back.groups) == ["ball", "crate"]
    np.testing.assert_allclose(back.vertices[back.groups["ball"]].mean(axis=0)[0], 3.0, atol=1e-6)
    ref = trimesh.load(out, process=False, force="mesh", group_material=False)
    assert len(ref.faces) == len(a.faces) + len(b.faces)


def test_seam_split_gltf_keeps_its_splits_on_reconversion(tmp_path):
    src = tmp_path / "cube.obj"
    _cube_obj(src)
    glb = tmp_path / "cube.glb"
    save_mesh(load_mesh(src), glb)
    ply = tmp_path / "cube.ply"
    save_mesh(load_mesh(glb), ply)
    back = load_mesh(ply)
    # the PLY's source vertices still name the OBJ's vertices, not the GLB's
    assert set(back.source_vertex.tolist()) == set(range(8))
    np.testing.assert_allclose(back.vertices, CUBE_V[back.source_vertex], atol=1e-6)
