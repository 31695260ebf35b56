"""Tests for brushes.formats.gltf: glTF/GLB world-space editing, written back in local space.

World positions are checked against trimesh's scene loader (independent) and written files
against the Khronos glTF validator.
"""

import base64
import json
import os
import shutil
import struct
import subprocess

import numpy as np
import pytest
import trimesh

from brushes.formats import MeshError, load_mesh, save_mesh

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _pose(v):
    """A non-rigid test deformation: shear plus a bend (any smooth map would do)."""
    v = np.asarray(v, dtype=np.float64)
    return np.stack([v[:, 0] + 0.3 * v[:, 1], v[:, 1] + 0.1 * v[:, 0] ** 2, v[:, 2] * 1.5 - 0.2], 1)


def _quat(axis, degrees):
    axis = np.asarray(axis, float) / np.linalg.norm(axis)
    h = np.radians(degrees) / 2
    return [*(axis * np.sin(h)), np.cos(h)]


def _build_gltf(folder, name, *, glb=True, instanced=False, external=False):
    """A two-mesh glTF written by hand: a transformed parent with a child mesh, and a second
    mesh under a matrix node. Returns (path, dict of local positions per node name)."""
    tet_v = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], np.float32)
    tet_i = np.array([0, 2, 1, 0, 1, 3, 0, 3, 2, 1, 2, 3], np.uint16)
    tet_n = np.tile(np.array([0, 0, 1], np.float32), (4, 1))
    tet_uv = np.array([[0, 0], [1, 0], [0, 1], [1, 1]], np.float32)
    quad_v = np.array([[0, 0, 0], [2, 0, 0], [2, 1, 0], [0, 1, 0]], np.float32)
    quad_i = np.array([0, 1, 2, 0, 2, 3], np.uint16)
    blobs, views, accessors = [], [], []
    offset = 0

    def add(arr, target, kind, ctype, minmax=False):
        nonlocal offset
        raw = arr.tobytes()
        raw += b"\0" * (-len(raw) % 4)
        views.append({"buffer": 0, "byteOffset": offset, "byteLength": arr.nbytes, "target": target})
        acc = {"bufferView": len(views) - 1, "componentType": ctype, "count": len(arr), "type": kind}
        if minmax:
            acc["min"] = arr.min(axis=0).tolist()
            acc["max"] = arr.max(axis=0).tolist()
        accessors.append(acc)
        blobs.append(raw)
        offset += len(raw)
        return len(accessors) - 1

    a_tv = add(tet_v, 34962, "VEC3", 5126, True)
    a_tn = add(tet_n, 34962, "VEC3", 5126)
    a_tuv = add(tet_uv, 34962, "VEC2", 5126)
    a_ti = add(tet_i, 34963, "SCALAR", 5123)
    a_qv = add(quad_v, 34962, "VEC3", 5126, True)
    a_qi = add(quad_i, 34963, "SCALAR", 5123)
    binary = b"".join(blobs)
    matrix = np.eye(4)
    matrix[:3, 3] = [0, -3, 1]
    matrix[:3, :3] = np.diag([1, 2, 1])
    gltf = {
        "asset": {"version": "2.0", "generator": "pliant test"},
        "scene": 0,
        "scenes": [{"nodes": [0, 2]}],
        "nodes": [
            {"name": "parent", "translation": [1, 2, 3], "rotation": _quat([0, 0, 1], 90),
             "scale": [2, 2, 2], "children": [1]},
            {"name": "tet", "mesh": 0, "translation": [0.5, 0, 0],
             "rotation": _quat([1, 1, 0], 30)},
            {"name": "quad", "mesh": 0 if instanced else 1,
             "matrix": matrix.T.ravel().tolist()},
        ],
        "meshes": [
            {"name": "tetra", "primitives": [{"attributes": {"POSITION": a_tv, "NORMAL": a_tn,
                                                             "TEXCOORD_0": a_tuv},
                                              "indices": a_ti}]},
            {"name": "quad", "primitives": [{"attributes": {"POSITION": a_qv}, "indices": a_qi}]},
        ],
        "accessors": accessors,
        "bufferViews": views,
        "buffers": [{"byteLength": len(binary)}],
    }
    if glb:
        path = os.path.join(folder, name + ".glb")
        j = json.dumps(gltf).encode()
        j += b" " * (-len(j) % 4)
        chunks = struct.pack("<II", len(j), 0x4E4F534A) + j + struct.pack("<II", len(binary), 0x004E4942) + binary
        with open(path, "wb") as f:
            f.write(struct.pack("<III", 0x46546C67, 2, 12 + len(chunks)) + chunks)
    else:
        path = os.path.join(folder, name + ".gltf")
        if external:
            with open(os.path.join(folder, name + ".bin"), "wb") as f:
                f.write(binary)
            gltf["buffers"][0]["uri"] = name + ".bin"
        else:
            gltf["buffers"][0]["uri"] = "data:application/octet-stream;base64," + base64.b64encode(binary).decode()
        with open(path, "w") as f:
            json.dump(gltf, f)
    return path, {"tet": tet_v.astype(float), "quad": quad_v.astype(float)}


def _trimesh_world(path):
    """World-space positions per node name, from trimesh's scene loader (independent)."""
    scene = trimesh.load(path, process=False)
    out = {}
    for node in scene.graph.nodes_geometry:
        matrix, geom = scene.graph[node]
        v = scene.geometry[geom].vertices
        out[node] = v @ matrix[:3, :3].T + matrix[:3, 3]
    return out


@pytest.mark.parametrize("glb", [True, False])
def test_gltf_world_space_matches_trimesh(tmp_path, glb):
    path, _ = _build_gltf(str(tmp_path), "scene", glb=glb)
    doc = load_mesh(path)
    assert [p.name for p in doc.parts] == ["tet", "quad"]
    ref = _trimesh_world(path)
    for p in doc.parts:
        np.testing.assert_allclose(doc.vertices[p.start:p.stop], ref[p.name], atol=1e-5)
    assert doc.uv is None  # the quad has no TEXCOORD_0
    assert doc.faces.shape == (6, 3)


@pytest.mark.parametrize("glb", [True, False])
def test_gltf_world_space_edit_round_trip(tmp_path, glb):
    path, _ = _build_gltf(str(tmp_path), "scene", glb=glb)
    doc = load_mesh(path)
    posed = _pose(doc.vertices)
    out = os.path.join(str(tmp_path), "posed." + ("glb" if glb else "gltf"))
    save_mesh(doc, out, posed)
    ref = _trimesh_world(out)  # independent reader of what we wrote
    for p in doc.parts:
        np.testing.assert_allclose(ref[p.name], posed[p.start:p.stop], atol=1e-5)
    again = load_mesh(out)
    np.testing.assert_allclose(again.vertices, posed, atol=1e-5)
    np.testing.assert_array_equal(again.faces, doc.faces)
    # everything but positions, normals and their min/max is unchanged
    src_doc, out_doc = doc._source, again._source
    g0, g1 = src_doc.gltf, out_doc.gltf
    for key in ("nodes", "meshes", "bufferViews", "scenes", "asset"):
        assert g0[key] == g1[key]
    b0, b1 = np.frombuffer(src_doc.buffers[0], np.uint8), np.frombuffer(out_doc.buffers[0], np.uint8)
    changed = np.flatnonzero(b0 != b1)
    pos_normal_views = {g0["accessors"][a]["bufferView"] for a in (0, 1, 4)}
    allowed = np.zeros(len(b0), bool)
    for v in pos_normal_views:
        bv = g0["bufferViews"][v]
        allowed[bv["byteOffset"]:bv["byteOffset"] + bv["byteLength"]] = True
    assert allowed[changed].all()
    # accessor min/max follow the stored values (glTF 2.0 spec 3.6.2.5: exact bounds)
    for a in (0, 4):
        acc = g1["accessors"][a]
        bv = g1["bufferViews"][acc["bufferView"]]
        vals = np.frombuffer(out_doc.buffers[0], "<f4", acc["count"] * 3, bv["byteOffset"]).reshape(-1, 3)
        assert acc["min"] == vals.min(0).tolist() and acc["max"] == vals.max(0).tolist()
    # normals recomputed: unit length (glTF 2.0 requires unit NORMAL vectors)
    nbv = g1["bufferViews"][g1["accessors"][1]["bufferView"]]
    n = np.frombuffer(out_doc.buffers[0], "<f4", 12, nbv["byteOffset"]).reshape(-1, 3)
    np.testing.assert_allclose(np.linalg.norm(n, axis=1), 1, atol=1e-6)
    _assert_validates(out)


def test_gltf_external_buffer_saved_elsewhere(tmp_path):
    path, _ = _build_gltf(str(tmp_path), "scene", glb=False, external=True)
    original_bin = (tmp_path / "scene.bin").read_bytes()
    doc = load_mesh(path)
    (tmp_path / "out").mkdir()
    out = tmp_path / "out" / "posed.gltf"
    save_mesh(doc, out, doc.vertices + 1)
    assert (tmp_path / "scene.bin").read_bytes() == original_bin  # source untouched
    assert (tmp_path / "out" / "posed.bin").exists()
    np.testing.assert_allclose(load_mesh(out).vertices, doc.vertices + 1, atol=1e-5)


def test_gltf_instanced_mesh_refused(tmp_path):
    path, _ = _build_gltf(str(tmp_path), "inst", instanced=True)
    with pytest.raises(MeshError, match="instanced"):
        load_mesh(path)


def _validator():
    node = shutil.which("node")
    script = os.path.join(REPO, "tests", "gltf_validate.mjs")
    package = os.path.join(REPO, "node_modules", "gltf-validator")
    if node is None:
        pytest.skip("node is not installed, so the Khronos glTF validator cannot run")
    if not os.path.isdir(package):
        pytest.skip("npm package gltf-validator is not installed (run `npm ci` in the repo root)")
    return node, script


def _assert_validates(path):
    node, script = _validator()
    proc = subprocess.run([node, script, str(path)], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    report = json.loads(proc.stdout)
    assert report["issues"]["numErrors"] == 0, report["issues"]["messages"]


# --------------------------------------------------------------------------- bad input
