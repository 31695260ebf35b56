"""Tests for brushes.formats.usd: OpenUSD stages posed in world space, written back in local space.

The stages are built here with pxr (OpenUSD's own package). Values are read back with pxr,
and every written file passes every validator OpenUSD registers (pxr.UsdValidation).
"""

import numpy as np
import pytest
import trimesh
from scipy.spatial.transform import Rotation

from brushes.formats import MeshError, load_mesh, save_mesh

pxr = pytest.importorskip("pxr", reason="usd-core (a dependency in pyproject) is not installed")
from pxr import Gf, Sdf, Usd, UsdGeom, UsdShade, UsdValidation, Vt  # noqa: E402


def _assert_usd_valid(path):
    # outside reference: every validator OpenUSD registers, no errors
    registry = UsdValidation.ValidationRegistry()
    context = UsdValidation.ValidationContext(registry.GetOrLoadAllValidators())
    errors = [e for e in context.Validate(Usd.Stage.Open(str(path)))
              if e.GetType() == UsdValidation.ValidationErrorType.Error]
    assert not errors, [e.GetMessage() for e in errors]


def _mesh(stage, path, tm, *, normals=None):
    m = UsdGeom.Mesh.Define(stage, path)
    m.CreatePointsAttr(Vt.Vec3fArray.FromNumpy(np.asarray(tm.vertices, np.float32)))
    m.CreateFaceVertexCountsAttr(Vt.IntArray.FromNumpy(np.full(len(tm.faces), 3, np.int32)))
    m.CreateFaceVertexIndicesAttr(Vt.IntArray.FromNumpy(np.asarray(tm.faces, np.int32).ravel()))
    m.CreateExtentAttr(Vt.Vec3fArray.FromNumpy(np.asarray(tm.bounds, np.float32)))
    if normals == "vertex":
        m.CreateNormalsAttr(Vt.Vec3fArray.FromNumpy(np.asarray(tm.vertex_normals, np.float32)))
        m.SetNormalsInterpolation(UsdGeom.Tokens.vertex)
    return m


def _workshop(folder):
    """A stage in two layers: body.usda (a sphere, moved and turned, with vertex normals and a
    GeomSubset 'belly') sublayered by scene.usda (a key box animated along z, a variant set, a
    camera). Z up, centimetres."""
    body = Usd.Stage.CreateNew(str(folder / "body.usda"))
    UsdGeom.SetStageUpAxis(body, UsdGeom.Tokens.z)
    UsdGeom.SetStageMetersPerUnit(body, 0.01)
    root = UsdGeom.Xform.Define(body, "/Tock")
    body.SetDefaultPrim(root.GetPrim())
    ball = trimesh.creation.icosphere(subdivisions=2)
    m = _mesh(body, "/Tock/Body", ball, normals="vertex")
    xf = UsdGeom.Xformable(m)
    xf.AddTranslateOp().Set(Gf.Vec3d(0, 0, 2))
    xf.AddRotateZOp().Set(30.0)
    xf.AddScaleOp().Set(Gf.Vec3f(1, 1, 1.5))
    belly = np.flatnonzero(ball.triangles_center[:, 2] < -0.5)
    UsdGeom.Subset.CreateGeomSubset(m, "belly", UsdGeom.Tokens.face,
                                    Vt.IntArray.FromNumpy(belly.astype(np.int32)))
    body.GetRootLayer().Save()
    scene = Usd.Stage.CreateNew(str(folder / "scene.usda"))
    scene.GetRootLayer().subLayerPaths.append("./body.usda")
    UsdGeom.SetStageUpAxis(scene, UsdGeom.Tokens.z)
    UsdGeom.SetStageMetersPerUnit(scene, 0.01)
    scene.SetDefaultPrim(scene.GetPrimAtPath("/Tock"))
    key = _mesh(scene, "/Tock/Key", trimesh.creation.box())
    op = UsdGeom.Xformable(key).AddTranslateOp()
    op.Set(Gf.Vec3d(3, 0, 0))
    op.Set(Gf.Vec3d(3, 0, 1), 10)
    look = scene.GetPrimAtPath("/Tock").GetVariantSets().AddVariantSet("look")
    look.AddVariant("plain")
    look.SetVariantSelection("plain")
    UsdGeom.Camera.Define(scene, "/Bench")
    scene.GetRootLayer().Save()
    return folder / "scene.usda", ball, belly


def _pxr_world_points(path, prim):
    stage = Usd.Stage.Open(str(path))
    p = stage.GetPrimAtPath(prim)
    local = np.array(UsdGeom.Mesh(p).GetPointsAttr().Get(), np.float64)
    m = np.array(UsdGeom.Xformable(p).ComputeLocalToWorldTransform(Usd.TimeCode.Default()))
    return local @ m[:3, :3] + m[3, :3]  # USD row vectors


def test_world_space_matches_pxr_and_groups_come_from_prims_and_subsets(tmp_path):
    path, ball, belly = _workshop(tmp_path)
    doc = load_mesh(path)
    assert [p.name for p in doc.parts] == ["Body", "Key"]
    # outside reference: pxr's own local-to-world transform
    body, key = doc.parts
    np.testing.assert_allclose(doc.vertices[body.start:body.stop],
                               _pxr_world_points(path, "/Tock/Body"), atol=1e-6)
    np.testing.assert_allclose(doc.vertices[key.start:key.stop],
                               _pxr_world_points(path, "/Tock/Key"), atol=1e-6)
    assert sorted(doc.groups) == ["Body", "Key", "belly"]
    np.testing.assert_array_equal(doc.groups["belly"], np.unique(ball.faces[belly]))
    assert doc.groups["Key"].tolist() == list(range(key.start, key.stop))


def test_posed_stage_keeps_layers_samples_variants_and_validates(tmp_path):
    path, ball, _ = _workshop(tmp_path)
    doc = load_mesh(path)
    rot = Rotation.from_euler("z", 25, degrees=True)
    posed = rot.apply(doc.vertices) * [1.0, 1.2, 0.9] + [0.1, 0, 0]
    out_dir = tmp_path / "posed"
    out_dir.mkdir()
    out = out_dir / "scene.usda"
    sublayer_before = (tmp_path / "body.usda").read_bytes()
    written = save_mesh(doc, out, posed)
    assert written.converted is None
    _assert_usd_valid(out)
    # read back with pxr: world positions are the posed ones (float32 points)
    body, key = doc.parts
    np.testing.assert_allclose(_pxr_world_points(out, "/Tock/Body"), posed[body.start:body.stop],
                               atol=2e-6)
    np.testing.assert_allclose(_pxr_world_points(out, "/Tock/Key"), posed[key.start:key.stop],
                               atol=2e-6)
    stage = Usd.Stage.Open(str(out))
    layer = stage.GetRootLayer()
    assert list(layer.subLayerPaths) == ["../body.usda"]          # re-pointed, not copied
    assert (tmp_path / "body.usda").read_bytes() == sublayer_before    # the sublayer untouched
    assert "over \"Body\"" in layer.ExportToString()               # a local opinion in the copy
    translate = UsdGeom.Xformable(stage.GetPrimAtPath("/Tock/Key")).GetOrderedXformOps()[0]
    assert translate.GetAttr().GetTimeSamples() == [10.0]          # animation left as it was
    assert stage.GetPrimAtPath("/Tock").GetVariantSets().GetNames() == ["look"]
    assert stage.GetPrimAtPath("/Bench").IsA(UsdGeom.Camera)
    assert UsdGeom.GetStageUpAxis(stage) == "Z" and UsdGeom.GetStageMetersPerUnit(stage) == 0.01
    # extent and normals recomputed in local space: normals against trimesh's area-weighted
    # vertex normals of the posed local points
    mesh = UsdGeom.Mesh(stage.GetPrimAtPath("/Tock/Body"))
    local = np.array(mesh.GetPointsAttr().Get(), np.float64)
    np.testing.assert_allclose(np.array(mesh.GetExtentAttr().Get()),
                               [local.min(axis=0), local.max(axis=0)], atol=1e-6)
    tm = trimesh.Trimesh(local, ball.faces, process=False)
    reference = trimesh.geometry.mean_vertex_normals(len(local), tm.faces,
                                                     tm.face_normals * tm.area_faces[:, None])
    np.testing.assert_allclose(np.array(mesh.GetNormalsAttr().Get()), reference, atol=1e-5)


def test_usdc_round_trip_stays_crate(tmp_path):
    stage = Usd.Stage.CreateNew(str(tmp_path / "box.usdc"))
    UsdGeom.SetStageUpAxis(stage, UsdGeom.Tokens.y)
    UsdGeom.SetStageMetersPerUnit(stage, 1.0)
    root = UsdGeom.Xform.Define(stage, "/Crate")
    stage.SetDefaultPrim(root.GetPrim())
    _mesh(stage, "/Crate/Box", trimesh.creation.box())
    stage.GetRootLayer().Save()
    doc = load_mesh(tmp_path / "box.usdc")
    for ext in ("usdc", "usd"):
        out = tmp_path / f"posed.{ext}"
        save_mesh(doc, out, doc.vertices * 2)
        assert out.read_bytes()[:8] == b"PXR-USDC"                 # crate, as the source was
        _assert_usd_valid(out)
        np.testing.assert_allclose(_pxr_world_points(out, "/Crate/Box"), doc.vertices * 2, atol=1e-6)


def test_instanced_meshes_are_refused(tmp_path):
    stage = Usd.Stage.CreateNew(str(tmp_path / "inst.usda"))
    proto = UsdGeom.Xform.Define(stage, "/Proto")
    _mesh(stage, "/Proto/Gear", trimesh.creation.box())
    for name in ("A", "B"):
        p = stage.DefinePrim(f"/World/{name}")
        p.GetReferences().AddInternalReference(proto.GetPath())
        p.SetInstanceable(True)
    stage.GetRootLayer().Save()
    with pytest.raises(MeshError, match="instanced"):
        load_mesh(tmp_path / "inst.usda")


def test_point_instancer_prototypes_are_refused(tmp_path):
    stage = Usd.Stage.CreateNew(str(tmp_path / "pi.usda"))
    inst = UsdGeom.PointInstancer.Define(stage, "/Crowd")
    _mesh(stage, "/Crowd/Protos/Peg", trimesh.creation.box())
    inst.CreatePrototypesRel().SetTargets([Sdf.Path("/Crowd/Protos/Peg")])
    inst.CreateProtoIndicesAttr([0, 0])
    inst.CreatePositionsAttr([(0, 0, 0), (2, 0, 0)])
    stage.GetRootLayer().Save()
    with pytest.raises(MeshError, match="PointInstancer"):
        load_mesh(tmp_path / "pi.usda")


def test_animated_points_are_refused(tmp_path):
    stage = Usd.Stage.CreateNew(str(tmp_path / "anim.usda"))
    m = _mesh(stage, "/Wobble", trimesh.creation.box())
    m.GetPointsAttr().Set(Vt.Vec3fArray.FromNumpy(np.zeros((8, 3), np.float32)), 5)
    stage.GetRootLayer().Save()
    with pytest.raises(MeshError, match="time samples"):
        load_mesh(tmp_path / "anim.usda")


def test_materials_uvs_and_left_handed_orientation(tmp_path):
    stage = Usd.Stage.CreateNew(str(tmp_path / "lh.usda"))
    UsdGeom.SetStageUpAxis(stage, UsdGeom.Tokens.y)
    UsdGeom.SetStageMetersPerUnit(stage, 1.0)
    box = trimesh.creation.box()
    m = _mesh(stage, "/Box", box)
    m.CreateFaceVertexIndicesAttr(Vt.IntArray.FromNumpy(box.faces[:, ::-1].astype(np.int32).ravel()))
    m.CreateOrientationAttr(UsdGeom.Tokens.leftHanded)
    st = UsdGeom.PrimvarsAPI(m).CreatePrimvar("st", Sdf.ValueTypeNames.TexCoord2fArray,
                                              UsdGeom.Tokens.vertex)
    uv = np.random.default_rng(3).random((8, 2)).astype(np.float32)
    st.Set(Vt.Vec2fArray.FromNumpy(uv))
    mat = UsdShade.Material.Define(stage, "/Looks/brass")
    UsdShade.MaterialBindingAPI.Apply(m.GetPrim()).Bind(mat)
    stage.GetRootLayer().Save()
    doc = load_mesh(tmp_path / "lh.usda")
    # left-handed winding reversed on read: the volume is positive, as trimesh's of the box
    from brushes import surface

    assert surface.signed_volume(doc.vertices, doc.faces) == pytest.approx(box.volume)
    np.testing.assert_allclose(doc.uv, uv, atol=1e-7)
    assert doc.polygons.materials == ("brass",)


def test_not_a_stage_is_one_line(tmp_path):
    bad = tmp_path / "bad.usda"
    bad.write_text("#usda 1.0\n( this is not a layer\n")
    with pytest.raises(MeshError) as info:
        load_mesh(bad)
    assert str(bad) in str(info.value) and "\n" not in str(info.value)
