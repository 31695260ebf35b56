"""Tests for brushes.correctives: npz deltas with checksum refusal, glTF morph targets."""

import base64
import hashlib
import json
import os
import shutil
import struct
import subprocess

import numpy as np
import pytest
import trimesh

from brushes.correctives import FORMAT_TAG, apply_delta, write_delta
from brushes.formats import MeshDoc

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _rest(with_uv=True):
    sphere = trimesh.creation.icosphere(subdivisions=2)
    v = np.asarray(sphere.vertices, dtype=np.float64)
    uv = np.stack([np.arctan2(v[:, 1], v[:, 0]) / (2 * np.pi) + 0.5, v[:, 2] * 0.5 + 0.5], 1)
    return MeshDoc.from_arrays(v, sphere.faces, uv=uv if with_uv else None)


def _posed(rest):
    v = rest.vertices
    return v + np.stack([0.2 * v[:, 2] ** 2, 0.1 * v[:, 0], -0.05 * np.ones(len(v))], 1)


# --------------------------------------------------------------------------- npz


def test_npz_round_trip_and_layout(tmp_path):
    rest = _rest()
    posed = _posed(rest)
    out = tmp_path / "c.npz"
    write_delta(out, rest, posed)
    # layout, read with numpy directly
    with np.load(out, allow_pickle=False) as z:
        assert str(z["format"]) == FORMAT_TAG
        assert z["deltas"].dtype == np.float32 and z["deltas"].shape == rest.vertices.shape
        assert int(z["count"]) == len(rest.vertices)
        # checksum defined in the module docstring, recomputed here with hashlib directly
        expected = hashlib.sha256(rest.vertices.astype("<f8").tobytes()).hexdigest()
        assert str(z["checksum"]) == expected
    got = apply_delta(rest.vertices, out)
    # deltas are float32: error at most half an ulp of the largest delta (IEEE 754 rounding)
    tol = np.abs(posed - rest.vertices).max() * 2.0**-24
    np.testing.assert_allclose(got, posed, rtol=0, atol=tol)


def test_npz_refuses_other_rest(tmp_path):
    rest = _rest()
    out = tmp_path / "c.npz"
    write_delta(out, rest, _posed(rest))
    with pytest.raises(ValueError, match="vertices"):
        apply_delta(rest.vertices[:-1], out)
    with pytest.raises(ValueError, match="checksum"):
        apply_delta(rest.vertices[::-1], out)  # same count, other vertex order
    moved = rest.vertices.copy()
    moved[5, 1] += 1e-12
    with pytest.raises(ValueError, match="checksum"):
        apply_delta(moved, out)


def test_npz_refuses_foreign_files(tmp_path):
    other = tmp_path / "other.npz"
    np.savez(other, deltas=np.zeros((3, 3), np.float32))
    with pytest.raises(ValueError, match="format tag"):
        apply_delta(np.zeros((3, 3)), other)
    junk = tmp_path / "junk.npz"
    junk.write_bytes(b"not a zip at all")
    with pytest.raises(ValueError, match="path"):
        apply_delta(np.zeros((3, 3)), junk)
    with pytest.raises(ValueError, match="no such file"):
        apply_delta(np.zeros((3, 3)), tmp_path / "missing.npz")


def test_write_delta_checks_arguments(tmp_path):
    rest = _rest()
    with pytest.raises(ValueError, match="posed_vertices"):
        write_delta(tmp_path / "c.npz", rest, rest.vertices[:10])
    with pytest.raises(ValueError, match="posed_vertices"):
        write_delta(tmp_path / "c.npz", rest, np.full(rest.vertices.shape, np.nan))
    with pytest.raises(ValueError, match="extension"):
        write_delta(tmp_path / "c.obj", rest, rest.vertices)
    with pytest.raises(ValueError, match="rest"):
        write_delta(tmp_path / "c.npz", rest.vertices, rest.vertices)
    assert os.listdir(tmp_path) == []


# --------------------------------------------------------------------------- glTF


def _read_gltf(path):
    """Minimal independent reader for the test: JSON plus accessor arrays."""
    data = open(path, "rb").read()
    if data[:4] == b"glTF":
        jlen = struct.unpack_from("<I", data, 12)[0]
        gltf = json.loads(data[20:20 + jlen])
        blen = struct.unpack_from("<I", data, 20 + jlen)[0]
        binary = data[28 + jlen:28 + jlen + blen]
    else:
        gltf = json.loads(data)
        binary = base64.b64decode(gltf["buffers"][0]["uri"].split(",", 1)[1])
    ncomp = {"SCALAR": 1, "VEC2": 2, "VEC3": 3}
    ctype = {5126: "<f4", 5123: "<u2", 5125: "<u4"}

    def accessor(i):
        a = gltf["accessors"][i]
        bv = gltf["bufferViews"][a["bufferView"]]
        n = ncomp[a["type"]]
        arr = np.frombuffer(binary, ctype[a["componentType"]], a["count"] * n,
                            bv.get("byteOffset", 0) + a.get("byteOffset", 0))
        return arr.reshape(-1, n)

    return gltf, accessor


def _validate(path):
    node = shutil.which("node")
    if node is None:
        pytest.skip("node is not installed, so the Khronos glTF validator cannot run")
    if not os.path.isdir(os.path.join(REPO, "node_modules", "gltf-validator")):
        pytest.skip("npm package gltf-validator is not installed (run `npm ci` in the repo root)")
    proc = subprocess.run([node, os.path.join(REPO, "tests", "gltf_validate.mjs"), str(path)],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    return json.loads(proc.stdout)


@pytest.mark.parametrize("ext", [".glb", ".gltf"])
@pytest.mark.parametrize("with_uv", [True, False])
def test_gltf_morph_target_passes_khronos_validator(tmp_path, ext, with_uv):
    rest = _rest(with_uv)
    out = tmp_path / f"c{ext}"
    write_delta(out, rest, _posed(rest), name="arm_raise")
    report = _validate(out)
    # Khronos glTF-Validator: 0 errors means a valid glTF 2.0 asset
    assert report["issues"]["numErrors"] == 0, report["issues"]["messages"]
    assert report["info"]["hasMorphTargets"] is True
    assert report["issues"]["numWarnings"] == 0, report["issues"]["messages"]


@pytest.mark.parametrize("ext", [".glb", ".gltf"])
def test_gltf_morph_target_content(tmp_path, ext):
    rest = _rest()
    posed = _posed(rest)
    out = tmp_path / f"c{ext}"
    write_delta(out, rest, posed, name="arm_raise", weight=0.25)
    gltf, accessor = _read_gltf(out)
    mesh = gltf["meshes"][0]
    assert mesh["extras"]["targetNames"] == ["arm_raise"] and mesh["weights"] == [0.25]
    prim = mesh["primitives"][0]
    base = accessor(prim["attributes"]["POSITION"])
    delta = accessor(prim["targets"][0]["POSITION"])
    np.testing.assert_allclose(base, rest.vertices, atol=1e-6)
    np.testing.assert_allclose(base + delta, posed, atol=1e-6)
    np.testing.assert_array_equal(accessor(prim["indices"]).reshape(-1, 3), rest.faces)
    # glTF 2.0 puts the texture origin at the image's top left, OBJ (and pliant) at the bottom
    # left (glTF 2.0 specification, "Meshes"; trimesh flips v the same way): v becomes 1 - v
    flipped = np.stack([rest.uv[:, 0], 1 - rest.uv[:, 1]], axis=1)
    np.testing.assert_allclose(accessor(prim["attributes"]["TEXCOORD_0"]), flipped, atol=1e-7)
    for a in (prim["attributes"]["POSITION"], prim["targets"][0]["POSITION"]):
        acc = gltf["accessors"][a]
        assert acc["min"] == accessor(a).min(0).tolist() and acc["max"] == accessor(a).max(0).tolist()


def test_gltf_rest_geometry_matches_trimesh(tmp_path):
    rest = _rest()
    out = tmp_path / "c.glb"
    write_delta(out, rest, _posed(rest))
    # independent reader: trimesh's glTF loader sees the rest mesh with the same faces
    # (it reads TEXCOORD_0 only with a material, so uv is checked by _read_gltf above)
    m = trimesh.load(out, process=False, force="mesh")
    np.testing.assert_allclose(m.vertices, rest.vertices, atol=1e-6)
    np.testing.assert_array_equal(m.faces, rest.faces)


def test_gltf_uses_32_bit_indices_for_large_meshes(tmp_path):
    k = 260  # 67,600 vertices: beyond what 16-bit indices address
    u, v = np.meshgrid(np.arange(k, dtype=float), np.arange(k, dtype=float), indexing="ij")
    verts = np.stack([u.ravel(), v.ravel(), np.zeros(k * k)], 1)
    i = (np.arange(k - 1)[:, None] * k + np.arange(k - 1)[None, :]).ravel()
    faces = np.concatenate([np.stack([i, i + k, i + 1], 1), np.stack([i + 1, i + k, i + k + 1], 1)])
    rest = MeshDoc.from_arrays(verts, faces)
    posed = verts + [0, 0, 1]
    out = tmp_path / "big.glb"
    write_delta(out, rest, posed)
    gltf, accessor = _read_gltf(out)
    prim = gltf["meshes"][0]["primitives"][0]
    assert gltf["accessors"][prim["indices"]]["componentType"] == 5125  # UNSIGNED_INT
    np.testing.assert_array_equal(accessor(prim["indices"]).reshape(-1, 3), faces)
    report = _validate(out)
    assert report["issues"]["numErrors"] == 0, report["issues"]["messages"]


# --------------------------------------------------------------------------- sparse glTF targets


def _local_pose(rest):
    """Moves only the vertices above z = 0.6 (a raised cap): most offsets are zero."""
    v = rest.vertices
    posed = v.copy()
    cap = v[:, 2] > 0.6
    posed[cap] += [0.15, 0.0, 0.05]
    return posed, cap


@pytest.mark.parametrize("ext", [".glb", ".gltf"])
def test_sparse_target_when_smaller_validates_and_reads_back(tmp_path, ext):
    rest = _rest()
    posed, cap = _local_pose(rest)
    out = tmp_path / f"c{ext}"
    write_delta(out, rest, posed)
    report = _validate(out)
    # Khronos glTF-Validator: no errors or warnings, sparse accessors and min/max included
    assert report["issues"]["numErrors"] == 0 and report["issues"]["numWarnings"] == 0, \
        report["issues"]["messages"]
    gltf, accessor = _read_gltf(out)
    prim = gltf["meshes"][0]["primitives"][0]
    acc = gltf["accessors"][prim["targets"][0]["POSITION"]]
    assert "bufferView" not in acc and acc["sparse"]["count"] == int(cap.sum())
    # read the sparse parts by hand (glTF 2.0 specification, "Sparse Accessors")
    sp = acc["sparse"]
    views = gltf["bufferViews"]
    data = open(out, "rb").read()
    if ext == ".glb":
        jlen = struct.unpack_from("<I", data, 12)[0]
        binary = data[28 + jlen:]
    else:
        binary = base64.b64decode(gltf["buffers"][0]["uri"].split(",", 1)[1])
    idx = np.frombuffer(binary, "<u2", sp["count"], views[sp["indices"]["bufferView"]]["byteOffset"])
    val = np.frombuffer(binary, "<f4", 3 * sp["count"],
                        views[sp["values"]["bufferView"]]["byteOffset"]).reshape(-1, 3)
    dense = np.zeros_like(rest.vertices)
    dense[idx] = val
    np.testing.assert_allclose(rest.vertices + dense, posed, atol=1e-6)
    assert idx.tolist() == np.flatnonzero(cap).tolist()
    # and it is smaller than the same file with every vertex moved a little
    dense_out = tmp_path / f"d{ext}"
    write_delta(dense_out, rest, posed + 1e-3)
    assert os.path.getsize(out) < os.path.getsize(dense_out)


def test_unmoved_target_is_zeros_without_data(tmp_path):
    rest = _rest()
    out = tmp_path / "c.glb"
    write_delta(out, rest, rest.vertices)
    report = _validate(out)
    assert report["issues"]["numErrors"] == 0 and report["issues"]["numWarnings"] == 0
    gltf, _ = _read_gltf(out)
    acc = gltf["accessors"][gltf["meshes"][0]["primitives"][0]["targets"][0]["POSITION"]]
    assert "bufferView" not in acc and "sparse" not in acc  # all zeros by the glTF 2.0 rule


# --------------------------------------------------------------------------- USD blend shapes


@pytest.mark.parametrize("ext", [".usda", ".usdc", ".usd"])
def test_usd_blend_shape_validates_and_applies_in_pxr(tmp_path, ext):
    pytest.importorskip("pxr", reason="usd-core (a dependency in pyproject) is not installed")
    from pxr import Usd, UsdGeom, UsdSkel, UsdValidation, Vt

    rest = _rest()
    posed, cap = _local_pose(rest)
    out = tmp_path / f"pose{ext}"
    write_delta(out, rest, posed, name="cap raise", weight=0.5)
    stage = Usd.Stage.Open(str(out))
    # outside reference: every validator OpenUSD registers reports no error
    registry = UsdValidation.ValidationRegistry()
    context = UsdValidation.ValidationContext(registry.GetOrLoadAllValidators())
    errors = [e.GetMessage() for e in context.Validate(stage)
              if e.GetType() == UsdValidation.ValidationErrorType.Error]
    assert not errors
    assert UsdGeom.GetStageUpAxis(stage) == "Y" and UsdGeom.GetStageMetersPerUnit(stage) == 1.0
    mesh = next(p for p in stage.Traverse() if p.IsA(UsdGeom.Mesh))
    binding = UsdSkel.BindingAPI(mesh)
    assert list(binding.GetBlendShapesAttr().Get()) == ["cap_raise"]
    blend = UsdSkel.BlendShape(stage.GetPrimAtPath(binding.GetBlendShapeTargetsRel().GetTargets()[0]))
    assert np.array(blend.GetPointIndicesAttr().Get()).tolist() == np.flatnonzero(cap).tolist()
    # pxr applies the shape at weight 1: the rest points become the posed ones
    query = UsdSkel.BlendShapeQuery(binding)
    weights, shapes, subshapes = query.ComputeSubShapeWeights(Vt.FloatArray([1.0]))
    points = UsdGeom.Mesh(mesh).GetPointsAttr().Get()
    assert query.ComputeDeformedPoints(weights, shapes, subshapes,
                                       query.ComputeBlendShapePointIndices(),
                                       query.ComputeSubShapePointOffsets(), points)
    np.testing.assert_allclose(np.array(points), posed, atol=1e-6)
    anim = UsdSkel.Animation(stage.GetPrimAtPath("/Corrective/Skeleton/Pose"))
    assert list(anim.GetBlendShapeWeightsAttr().Get()) == [0.5]
