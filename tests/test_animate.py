"""Tests of `brushes.animate` and `pliant animate`: a recipe played as motion with its secondary
motion, stored as glTF morph targets animated by their weights.

Outside references: the Khronos glTF validator (`node tests/gltf_validate.mjs`, npm package
gltf-validator) and the glTF 2.0 specification (sections "Binary glTF Layout", "Accessors",
"Morph Targets", "Animations"), by which the files are read back by hand here; hashlib's SHA-256;
the recipe API (`Recipe.apply`) and `brushes.dynamic` as documented, from which frames are rebuilt
independently of the job.
"""
import base64
import hashlib
import json
import os
import re
import shutil
import struct
import subprocess

import numpy as np
import pytest
import trimesh

import brushes
from brushes import animate, cli
from brushes.checks import FieldError
from brushes.formats import load_mesh
from brushes.recipe import Recipe, Stroke, parse_recipe

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


@pytest.fixture(autouse=True)
def _passive_threads(monkeypatch):
    # OpenMP's spinning waits starve a shared two-core machine; the command sets this too
    monkeypatch.setenv("OMP_WAIT_POLICY", "PASSIVE")


def _mesh(tmp_path, subdivisions=3):
    ball = trimesh.creation.icosphere(subdivisions=subdivisions)
    path = tmp_path / "ball.obj"
    v, f = ball.vertices, ball.faces
    lines = [f"v {a:.9f} {b:.9f} {c:.9f}" for a, b, c in v]
    top = set(np.flatnonzero(v[:, 2] > 0.2))
    upper = [face for face in f if all(i in top for i in face)]
    lower = [face for face in f if not all(i in top for i in face)]
    lines.append("g cap")
    lines += [f"f {a + 1} {b + 1} {c + 1}" for a, b, c in upper]
    lines.append("g body")
    lines += [f"f {a + 1} {b + 1} {c + 1}" for a, b, c in lower]
    path.write_text("\n".join(lines) + "\n")
    return path


RECIPE = {"format": "pliant-recipe", "version": 1, "strokes": [
    {"brush": "grab", "center": [0.0, 0.0, 1.0], "radius": 0.6, "move": [0.3, 0.0, 0.1], "pins": [[0, 0, -1]]},
    {"brush": "twist", "center": [0.0, 0.0, 0.8], "radius": 0.5, "axis": [0, 0, 1], "degrees": 40.0,
     "poisson": 0.3, "mask": {"group": "cap"}},
    {"brush": "scale", "center": [0.9, 0.0, 0.0], "radius": 0.4, "factor": 1.3, "falloff": "medium", "flow": False},
]}


def _recipe():
    return parse_recipe(RECIPE)


def _recipe_file(tmp_path, data=None):
    path = tmp_path / "pose.json"
    path.write_text(json.dumps(RECIPE if data is None else data))
    return path


def _validate(path):
    node = shutil.which("node")
    if node is None:
        pytest.skip("node is not installed, so the Khronos glTF validator cannot run")
    if not os.path.isdir(os.path.join(REPO, "node_modules", "gltf-validator")):
        pytest.skip("npm package gltf-validator is not installed (run `npm ci` in the repo root)")
    proc = subprocess.run([node, os.path.join(REPO, "tests", "gltf_validate.mjs"), str(path)],
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    return json.loads(proc.stdout)


def _read_gltf(path):
    """JSON and a reader of float accessors, by the glTF 2.0 specification (GLB: 12-byte header,
    then chunks of (length, type, data); JSON chunk 0x4E4F534A, BIN chunk 0x004E4942)."""
    data = open(path, "rb").read()
    if str(path).endswith(".glb"):
        magic, version, length = struct.unpack_from("<III", data, 0)
        assert magic == 0x46546C67 and version == 2 and length == len(data)
        jlen, jtype = struct.unpack_from("<II", data, 12)
        assert jtype == 0x4E4F534A
        gltf = json.loads(data[20:20 + jlen])
        blen, btype = struct.unpack_from("<II", data, 20 + jlen)
        assert btype == 0x004E4942
        binary = data[28 + jlen:28 + jlen + blen]
    else:
        gltf = json.loads(data)
        uri = gltf["buffers"][0]["uri"]
        binary = base64.b64decode(uri.split(",", 1)[1])

    def accessor(i):
        acc = gltf["accessors"][i]
        view = gltf["bufferViews"][acc["bufferView"]]
        width = {"SCALAR": 1, "VEC2": 2, "VEC3": 3}[acc["type"]]
        assert acc["componentType"] == 5126                      # FLOAT
        start = view.get("byteOffset", 0) + acc.get("byteOffset", 0)
        arr = np.frombuffer(binary, dtype="<f4", count=acc["count"] * width, offset=start)
        return arr.reshape(acc["count"], width) if width > 1 else arr

    return gltf, accessor


def _rebuilt(path):
    """Frames (m, n, 3) rebuilt from the file: rest + sum_i w_i(t_j) target_i, at the sampler's
    key times (glTF 2.0, "Morph Targets" and "Animations")."""
    gltf, accessor = _read_gltf(path)
    prim = gltf["meshes"][0]["primitives"][0]
    rest = accessor(prim["attributes"]["POSITION"]).astype(np.float64)
    targets = np.stack([accessor(t["POSITION"]) for t in prim["targets"]]).astype(np.float64)
    sampler = gltf["animations"][0]["samplers"][0]
    channel = gltf["animations"][0]["channels"][0]
    assert channel["target"] == {"node": 0, "path": "weights"} and sampler["interpolation"] == "LINEAR"
    times = accessor(sampler["input"]).astype(np.float64)
    weights = accessor(sampler["output"]).astype(np.float64).reshape(len(times), len(targets))
    return times, rest[None] + np.einsum("mk,kvi->mvi", weights, targets), gltf


@pytest.fixture(scope="module")
def job(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("animate")
    doc = load_mesh(_mesh(tmp))
    out = tmp / "ball.glb"
    summary = animate.animate(_recipe(), doc, out, seconds=1.0, fps=12, frames_path=tmp / "ball.npz")
    times, exact = animate.frames(_recipe(), doc.vertices, groups=doc.groups, seconds=1.0, fps=12,
                                  shear_speed=summary.shear_speed)
    return doc, out, summary, times, exact, tmp


# --------------------------------------------------------------------------- the file

def test_glb_passes_the_khronos_validator(job):
    doc, out, summary, *_ = job
    report = _validate(out)
    # Khronos glTF-Validator: no errors and no warnings
    assert report["issues"]["numErrors"] == 0, report["issues"]["messages"]
    assert report["issues"]["numWarnings"] == 0, report["issues"]["messages"]
    assert report["info"]["hasMorphTargets"] is True and report["info"]["animationCount"] == 1


def test_gltf_text_file_passes_the_khronos_validator(job, tmp_path):
    doc, _, summary, times, exact, _ = job
    comp = animate.compress(doc.vertices, exact, tolerance=1e-3)
    out = tmp_path / "ball.gltf"
    animate.write_animation(out, doc.vertices, doc.faces, doc.uv, times, comp)
    report = _validate(out)
    assert report["issues"]["numErrors"] == 0 and report["issues"]["numWarnings"] == 0, report["issues"]["messages"]
    t, rebuilt, _ = _rebuilt(out)
    assert np.linalg.norm(rebuilt - exact, axis=2).max() <= 1e-3


def test_frames_rebuilt_from_the_morph_targets_match_the_api(job):
    doc, out, summary, times, exact, _ = job
    t, rebuilt, gltf = _rebuilt(out)
    np.testing.assert_allclose(t, times, rtol=0, atol=1e-6)
    err = np.linalg.norm(rebuilt - exact, axis=2)
    tol = 1e-3 * np.linalg.norm(doc.vertices.max(0) - doc.vertices.min(0))       # the default
    assert err.max() <= tol
    assert err.max() == pytest.approx(summary.worst_error, rel=1e-5)
    assert len(gltf["meshes"][0]["primitives"][0]["targets"]) == summary.rank
    assert len(gltf["meshes"][0]["weights"]) == summary.rank
    assert summary.frames == len(times) == 13 and summary.largest_motion > 0.1
    np.testing.assert_array_equal(gltf["accessors"][gltf["meshes"][0]["primitives"][0]["indices"]]["count"],
                                  doc.faces.size)


def test_exact_frames_file(job):
    doc, out, summary, times, exact, tmp = job
    with np.load(tmp / "ball.npz") as z:
        assert str(z["format"]) == "pliant-frames" and int(z["version"]) == 1
        np.testing.assert_array_equal(z["times"], times)
        np.testing.assert_array_equal(z["frames"], exact)
        assert float(z["shear_speed"]) == summary.shear_speed
        # hashlib SHA-256 of the rest positions as little-endian float64
        assert str(z["checksum"]) == hashlib.sha256(np.ascontiguousarray(doc.vertices, "<f8").tobytes()).hexdigest()


# --------------------------------------------------------------------------- the frames

def test_frames_start_at_rest_and_end_on_each_strokes_pose(job):
    # The recipe API is the reference: after each slot the mesh is the recipe's pose so far
    # (to the flow's accuracy, about 3e-5 of the motion), and the last frame its result.
    doc, out, summary, times, exact, _ = job
    np.testing.assert_array_equal(exact[0], doc.vertices)
    recipe = _recipe()
    slot = times[-1] / len(recipe)
    for k in range(1, len(recipe) + 1):
        j = int(np.argmin(np.abs(times - k * slot)))
        if abs(times[j] - k * slot) > 1e-9:
            continue
        want = Recipe(recipe.strokes[:k]).apply(doc.vertices, groups=doc.groups)
        moved = np.abs(want - doc.vertices).max()
        assert np.abs(exact[j] - want).max() <= 1e-4 * moved, k
    want = recipe.apply(doc.vertices, groups=doc.groups)
    assert np.abs(exact[-1] - want).max() <= 1e-4 * np.abs(want - doc.vertices).max()


def test_settling_frames_are_the_documented_sum(tmp_path):
    # In the second half of a slot the pose has arrived: frame = X_k + mask (dynamic(tau) - U)
    # with the documented ramp (half the slot) and damping (the slot), rebuilt from the API.
    doc = load_mesh(_mesh(tmp_path, subdivisions=2))
    recipe = _recipe()
    seconds, fps, speed = 1.5, 20, 3.0
    times, exact = animate.frames(recipe, doc.vertices, groups=doc.groups, seconds=seconds, fps=fps,
                                  shear_speed=speed)
    slot = seconds / len(recipe)
    checked = 0
    for j, t in enumerate(times):
        k = min(int(t / slot), len(recipe) - 1)
        tau = t - k * slot
        if not (0.55 * slot < tau < 0.95 * slot):
            continue
        start = Recipe(recipe.strokes[:k]).apply(doc.vertices, groups=doc.groups)
        end = recipe.strokes[k].apply(start, groups=doc.groups)
        s = recipe.strokes[k]
        dyn = brushes.dynamic(s.brush(), shear_speed=speed, ramp=slot / 2, damping=slot, pins=s.pins)
        w = s.weights(len(start), groups=doc.groups)
        sec = dyn.displacement(start, tau) - dyn.limit(start)
        if w is not None:
            sec *= w[:, None]
        want = end + sec
        assert np.abs(exact[j] - want).max() <= 1e-4 * np.abs(end - doc.vertices).max() + 1e-12
        assert np.abs(sec).max() > 1e-6                 # there is a secondary motion to see
        checked += 1
    assert checked >= 3


def test_instant_waves_leave_no_secondary_motion(tmp_path):
    # With a shear speed far above the motion's (waves cross the mesh in nanoseconds), the
    # response is quasi-static: the frames are the flowed poses alone.
    doc = load_mesh(_mesh(tmp_path, subdivisions=2))
    recipe = Recipe(_recipe().strokes[:1])
    times, fast = animate.frames(recipe, doc.vertices, groups=doc.groups, seconds=1.0, fps=10, shear_speed=1e9)
    _, slow = animate.frames(recipe, doc.vertices, groups=doc.groups, seconds=1.0, fps=10, shear_speed=2.0)
    moved = np.abs(fast[-1] - doc.vertices).max()
    quasi = [animate._StrokeMotion(recipe.strokes[0], doc.vertices, groups=doc.groups, where="s",
                                   shear_speed=1e9, slot=1.0)]
    for j, t in enumerate(times[:-1]):
        np.testing.assert_allclose(fast[j], quasi[0].pose(t), rtol=0, atol=1e-6 * moved)
    assert np.abs(slow - fast).max() > 1e-3 * moved                 # slow waves do add motion


# --------------------------------------------------------------------------- compression

def test_a_finer_tolerance_keeps_more_targets(job):
    doc, out, summary, times, exact, _ = job
    ranks = []
    for tol in (1e-2, 1e-3, 1e-5):
        comp = animate.compress(doc.vertices, exact, tolerance=tol)
        rebuilt = doc.vertices.astype(np.float32).astype(np.float64)[None] + np.einsum(
            "mk,kvi->mvi", comp.weights.astype(np.float64), comp.targets.astype(np.float64))
        assert np.linalg.norm(rebuilt - exact, axis=2).max() <= tol
        assert np.abs(comp.weights).max() <= 1.0
        ranks.append(comp.rank)
    assert ranks == sorted(ranks) and ranks[0] < ranks[-1]
    with pytest.raises(FieldError, match="^tolerance: .*float32"):
        animate.compress(doc.vertices, exact, tolerance=1e-12)


def test_a_still_recipe_keeps_one_zero_target():
    rest = np.random.default_rng(0).normal(size=(30, 3))
    comp = animate.compress(rest, np.stack([rest] * 4), tolerance=1e-6)
    assert comp.rank == 1 and not np.any(comp.targets) and not np.any(comp.weights)


def test_chunk_params_compose_to_the_whole_stroke():
    # The flow from 0 to 1 in two chunks is the flow from 0 to 1 (the recipe API as reference).
    pts = np.random.default_rng(1).normal(size=(200, 3)) * 0.5
    for d in RECIPE["strokes"][:2]:
        s = parse_recipe({**RECIPE, "strokes": [d]}).strokes[0]
        whole = Stroke(s.kind, s.params, pins=s.pins).apply(pts)
        a = Stroke(s.kind, animate.chunk_params(s.kind, s.params, 0.0, 0.4), pins=s.pins).apply(pts)
        b = Stroke(s.kind, animate.chunk_params(s.kind, s.params, 0.4, 1.0), pins=s.pins).apply(a)
        assert np.abs(b - whole).max() <= 1e-4 * np.abs(whole - pts).max()
    s = Stroke("scale", {"center": [0, 0, 0], "radius": 0.3, "factor": 1.5})
    assert animate.chunk_params("scale", s.params, 0.25, 0.75)["factor"] == pytest.approx(1.5 ** 0.5)


class Bump(brushes.Brush):
    """A third-party brush (registry plugin): a bump along +y with no elastic load."""

    kind = "bump"

    def __init__(self, center, radius, height):
        self.center = np.asarray(center, dtype=np.float64)
        self.radius, self.height = float(radius), float(height)

    def params(self):
        return {"center": self.center.tolist(), "radius": self.radius, "height": self.height}

    def displacement(self, points, out=None):
        u = np.zeros((len(points), 3))
        u[:, 1] = self.height * np.exp(-np.sum((points - self.center) ** 2, axis=1) / self.radius**2)
        return u


@pytest.fixture
def bump():
    from brushes import registry
    registry.register("bump", Bump)
    yield
    registry.unregister("bump")


def test_recipes_that_cannot_be_animated(bump):
    with pytest.raises(FieldError, match="^strokes: .*nothing to animate"):
        animate.check_recipe(Recipe(()))
    other = Stroke("bump", {"center": [0, 0, 0], "radius": 0.3, "height": 0.1})
    with pytest.raises(FieldError, match=r"^strokes\[1\]\.brush: 'bump' strokes cannot be animated"):
        animate.check_recipe(Recipe((_recipe().strokes[0], other)))
    with pytest.raises(FieldError, match="^fps: "):
        animate.frame_times(1.0, 0)


def test_handles_strokes_flow_in_chunks_and_settle(tmp_path):
    # Handles (several points moved and turned at once) animate too: the chunked flow is the
    # stroke's flow (the recipe API as reference) and the last frame its pose.
    doc = load_mesh(_mesh(tmp_path, subdivisions=2))
    d = {"brush": "handles", "centers": [[0, 0, 1.0], [0.7, 0, 0.7]], "radius": [0.4, 0.3],
         "moves": [[0.2, 0, 0.05], [0.0, 0.1, 0.1]], "rotations": [[0, 0, 20], [0, 0, 0]]}
    recipe = parse_recipe({**RECIPE, "strokes": [d]})
    s = recipe.strokes[0]
    whole = s.apply(doc.vertices)
    a = Stroke(s.kind, animate.chunk_params(s.kind, s.params, 0.0, 0.3)).apply(doc.vertices)
    b = Stroke(s.kind, animate.chunk_params(s.kind, s.params, 0.3, 1.0)).apply(a)
    assert np.abs(b - whole).max() <= 1e-4 * np.abs(whole - doc.vertices).max()
    times, exact = animate.frames(recipe, doc.vertices, seconds=0.5, fps=10, shear_speed=2.0)
    assert np.abs(exact[-1] - whole).max() <= 1e-4 * np.abs(whole - doc.vertices).max()
    assert np.abs(exact[3] - exact[-1]).max() > 1e-4


# --------------------------------------------------------------------------- the command

def test_command_writes_the_animation(tmp_path, capsys):
    mesh, recipe = _mesh(tmp_path, subdivisions=2), _recipe_file(tmp_path)
    out, frames = tmp_path / "out.glb", tmp_path / "frames.npz"
    code = cli.main(["animate", str(recipe), str(mesh), "-o", str(out), "--seconds", "0.6", "--fps", "10",
                     "--shear-speed", "2.5", "--tolerance", "1e-3", "--frames", str(frames)])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    assert f"animation: {out} (7 frames over 0.6 s, shear speed 2.5 units/s)" in captured.out
    assert "morph targets: " in captured.out and f"exact frames: {frames}" in captured.out
    assert "animate" not in captured.err                              # a short job shows no bar
    t, rebuilt, _ = _rebuilt(out)
    with np.load(frames) as z:
        assert np.linalg.norm(rebuilt - z["frames"], axis=2).max() <= 1e-3


def test_command_shows_progress_on_long_animations(tmp_path, capsys, monkeypatch):
    monkeypatch.setattr(animate, "LONG_ANIMATION", 100)
    mesh, recipe = _mesh(tmp_path, subdivisions=1), _recipe_file(tmp_path)
    code = cli.main(["animate", str(recipe), str(mesh), "-o", str(tmp_path / "a.glb"), "--seconds", "0.5",
                     "--fps", "8"])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    # the bar is drawn when it starts (its later updates depend on the machine's speed)
    assert "animate:" in captured.err and "0/5" in captured.err and "frame" in captured.err


@pytest.mark.parametrize("args,message", [
    (["-o", "{tmp}/a.obj"], "--out: .*unknown format .obj; use one of .glb, .gltf"),
    (["-o", "{tmp}/a.glb", "--frames", "{tmp}/f.txt"], "--frames: .*unknown format .txt"),
    (["-o", "{tmp}/nowhere/a.glb"], "--out: .*does not exist"),
    (["-o", "{tmp}/a.glb", "--seconds", "-1"], "--seconds: must be a positive number"),
    (["-o", "{tmp}/a.glb", "--fps", "nan"], "--fps: must be a positive number"),
    (["-o", "{tmp}/a.glb", "--shear-speed", "fast"], "--shear-speed: expected a number"),
    (["-o", "{tmp}/a.glb", "--tolerance", "1e-12"], "tolerance: .*float32"),
    (["-o", "{tmp}/a.glb", "--seconds", "1e7"], "--seconds/--fps: .* GiB; shorten the animation"),
])
def test_command_refuses_bad_input_with_exit_2(tmp_path, capsys, args, message):
    mesh, recipe = _mesh(tmp_path, subdivisions=1), _recipe_file(tmp_path)
    argv = ["animate", str(recipe), str(mesh)] + [a.replace("{tmp}", str(tmp_path)) for a in args]
    assert cli.main(argv) == 2
    err = capsys.readouterr().err
    last = err.strip().splitlines()[-1]            # argparse prints its usage lines above
    assert "Traceback" not in err and last.startswith("pliant")
    assert re.search(message, last), err
    assert not (tmp_path / "a.glb").exists()                   # nothing half-written is left


def test_command_names_the_stroke_that_cannot_be_animated(tmp_path, capsys, bump):
    data = {**RECIPE, "strokes": RECIPE["strokes"][:1] + [
        {"brush": "bump", "center": [0, 0, 0.5], "radius": 0.3, "height": 0.1}]}
    mesh, recipe = _mesh(tmp_path, subdivisions=1), _recipe_file(tmp_path, data)
    assert cli.main(["animate", str(recipe), str(mesh), "-o", str(tmp_path / "a.glb")]) == 2
    err = capsys.readouterr().err
    assert "strokes[1].brush: 'bump' strokes cannot be animated" in err
    assert not (tmp_path / "a.glb").exists()


def test_command_missing_files(tmp_path, capsys):
    recipe = _recipe_file(tmp_path)
    assert cli.main(["animate", str(recipe), str(tmp_path / "none.obj"), "-o", str(tmp_path / "a.glb")]) == 2
    assert "MESH: " in capsys.readouterr().err
    mesh = _mesh(tmp_path, subdivisions=1)
    assert cli.main(["animate", str(tmp_path / "none.json"), str(mesh), "-o", str(tmp_path / "a.glb")]) == 2
    assert "RECIPE: " in capsys.readouterr().err
