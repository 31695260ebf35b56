"""The ``pliant`` command, run as a user runs it: a subprocess of this Python.

References used here, none produced by the command itself:
- mesh files are made and read back with trimesh (an independent reader and writer);
- the posed positions a command must write are computed by calling the engine API
  (``brushes.Grab`` / ``brushes.Twist`` ``.apply``) stroke by stroke in the test;
- volumes come from trimesh (``Trimesh.volume``), displacements from numpy;
- ``.npz`` and ``.glb`` corrective files are opened with numpy and a few lines of ``struct``
  following the glTF 2.0 specification (Khronos, section "GLB File Format Specification").
"""

from __future__ import annotations

import json
import os
import re
import shutil
import signal
import struct
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import trimesh

ROOT = Path(__file__).resolve().parents[1]

CENTER = [0.0, 0.6, 0.0]
RECIPE = {
    "format": "pliant-recipe", "version": 1,
    "strokes": [
        {"brush": "grab", "center": CENTER, "radius": 0.6, "move": [0.15, 0.1, 0.0]},
        {"brush": "twist", "center": [0.0, -0.5, 0.0], "radius": 0.7, "axis": [0, 1, 0],
         "degrees": 25.0},
    ],
}


def env() -> dict:
    e = dict(os.environ)
    e["PYTHONPATH"] = str(ROOT) + (os.pathsep + e["PYTHONPATH"] if e.get("PYTHONPATH") else "")
    return e


def pliant(*args, timeout=300, **kwargs) -> subprocess.CompletedProcess:
    """Run ``python -m brushes.cli ARGS``."""
    return subprocess.run([sys.executable, "-m", "brushes.cli", *map(str, args)],
                          capture_output=True, text=True, timeout=timeout, env=env(), **kwargs)


def assert_error(proc, code=2, *, mentions=()):
    """A failed run: the exit code, one line on stderr, no traceback."""
    assert proc.returncode == code, (proc.returncode, proc.stdout, proc.stderr)
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1, proc.stderr
    assert lines[0].startswith("pliant: error: "), lines[0]
    assert "Traceback" not in proc.stderr
    for text in mentions:
        assert text in lines[0], (text, lines[0])


def reference_pose(points):
    """The recipe replayed through the engine API directly, stroke by stroke."""
    import brushes

    g, t = RECIPE["strokes"]
    out = brushes.Grab(g["center"], g["radius"], g["move"]).apply(points)
    return brushes.Twist(t["center"], t["radius"], t["axis"], t["degrees"]).apply(out)


def read_obj(path):
    """Vertices and faces of an OBJ as written, in file order (trimesh, no processing)."""
    mesh = trimesh.load(path, file_type="obj", process=False, maintain_order=True,
                        force="mesh")
    return np.asarray(mesh.vertices), np.asarray(mesh.faces)


def no_temporaries(folder) -> bool:
    # brushes.atomic names its temporary files ".<name>.<random>.tmp"
    return not [p for p in Path(folder).iterdir() if p.name.endswith(".tmp")]


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    """A small closed sphere (trimesh icosphere, 642 vertices) as OBJ, and the recipe."""
    d = tmp_path_factory.mktemp("cli")
    sphere = trimesh.creation.icosphere(subdivisions=3, radius=1.0)
    mesh = d / "ball.obj"
    mesh.write_text(trimesh.exchange.obj.export_obj(sphere, include_normals=False,
                                                    include_texture=False))
    recipe = d / "pose.json"
    recipe.write_text(json.dumps(RECIPE))
    rest, faces = read_obj(mesh)
    return {"dir": d, "mesh": mesh, "recipe": recipe, "rest": rest, "faces": faces,
            "posed": reference_pose(rest)}


# --------------------------------------------------------------------------- help and usage

COMMANDS = ["apply", "batch", "delta", "report", "demo", "view", "snapshot"]


def test_top_level_help_names_every_command_and_the_scope():
    proc = pliant("--help")
    assert proc.returncode == 0, proc.stderr
    for name in COMMANDS:
        assert re.search(rf"^\s+{name}\s", proc.stdout, re.M), name
    text = " ".join(proc.stdout.split())
    assert "visual posing tool" in text
    assert "not an engineering, structural or medical analysis" in text
    assert "licensed professionals" in text
    assert "exit codes:" in text and "examples:" in text


@pytest.mark.parametrize("name", COMMANDS)
def test_every_command_has_help_with_examples(name):
    proc = pliant(name, "--help")
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.startswith(f"usage: pliant {name}")
    examples = proc.stdout.split("examples:", 1)
    assert len(examples) == 2, proc.stdout
    assert f"pliant {name}" in examples[1]


@pytest.mark.parametrize("argv", [
    [],                                            # no command
    ["pose"],                                      # unknown command
    ["apply", "r.json", "m.obj"],                  # -o missing
    ["batch", "r.json", "m.obj", "--out", "d", "--jobs", "0"],
    ["snapshot", "m.obj", "-o", "a.png", "--size", "800"],
])
def test_usage_errors_exit_2(argv):
    # argparse's own usage errors exit 2 (Python documentation, argparse.ArgumentParser.error)
    proc = pliant(*argv)
    assert proc.returncode == 2
    assert "usage: pliant" in proc.stderr
    assert "Traceback" not in proc.stderr


def test_console_script_is_installed():
    script = shutil.which("pliant")
    if script is None:
        pytest.skip("the console script is not installed (run: pip install -e . --no-deps)")
    proc = subprocess.run([script, "apply", "--help"], capture_output=True, text=True,
                          timeout=120, env=env())
    assert proc.returncode == 0 and proc.stdout.startswith("usage: pliant apply")


def test_main_returns_the_exit_code_instead_of_exiting():
    from brushes.cli import main

    assert main(["demo", "--help"]) == 0
    assert main(["no-such-command"]) == 2


# --------------------------------------------------------------------------- apply

def test_apply_writes_what_the_api_gives_and_keeps_the_obj(files, tmp_path):
    out, delta = tmp_path / "posed.obj", tmp_path / "posed.npz"
    before = files["mesh"].read_bytes()
    proc = pliant("apply", files["recipe"], files["mesh"], "-o", out, "--delta", delta)
    assert proc.returncode == 0, proc.stderr
    assert files["mesh"].read_bytes() == before                 # the input is untouched
    v, f = read_obj(out)
    np.testing.assert_array_equal(f, files["faces"])
    np.testing.assert_allclose(v, files["posed"], rtol=0, atol=1e-9)
    assert np.abs(v - files["rest"]).max() > 0.05               # the recipe did move it
    # OBJ -> OBJ keeps the structure: every line that is not a position is unchanged
    keep = [ln for ln in before.decode().splitlines() if not ln.startswith("v ")]
    assert [ln for ln in out.read_text().splitlines() if not ln.startswith("v ")] == keep
    with np.load(delta) as z:
        deltas = z["deltas"]
    # the deltas are stored as float32 (glTF morph targets are float32)
    np.testing.assert_allclose(deltas, files["posed"] - files["rest"], rtol=0, atol=1e-6)
    assert no_temporaries(tmp_path)


def test_apply_writes_the_format_of_the_output_extension(files, tmp_path):
    out = tmp_path / "posed.ply"
    proc = pliant("apply", files["recipe"], files["mesh"], "-o", out)
    assert proc.returncode == 0, proc.stderr
    mesh = trimesh.load(out, process=False)
    np.testing.assert_array_equal(mesh.faces, files["faces"])
    np.testing.assert_allclose(mesh.vertices, files["posed"], rtol=0, atol=1e-5)


def test_apply_masks_by_the_obj_groups(files, tmp_path):
    # faces with a centroid above y = 0 form group "top"; the rest "bottom" (written by hand)
    v, f = files["rest"], files["faces"]
    top = v[f].mean(axis=1)[:, 1] > 0
    lines = [f"v {x!r} {y!r} {z!r}" for x, y, z in v.tolist()]
    for name, sel in (("top", top), ("bottom", ~top)):
        lines.append(f"g {name}")
        lines += [f"f {a + 1} {b + 1} {c + 1}" for a, b, c in f[sel]]
    mesh = tmp_path / "grouped.obj"
    mesh.write_text("\n".join(lines) + "\n")
    stroke = {"brush": "grab", "center": [0.0, 0.0, 0.0], "radius": 1.0,
              "move": [0.3, 0.0, 0.0], "mask": {"group": "top"}}
    recipe = tmp_path / "masked.json"
    recipe.write_text(json.dumps({"format": "pliant-recipe", "version": 1, "strokes": [stroke]}))
    out = tmp_path / "posed.obj"
    proc = pliant("apply", recipe, mesh, "-o", out)
    assert proc.returncode == 0, proc.stderr
    import brushes

    weights = np.zeros(len(v))
    weights[np.unique(f[top])] = 1.0              # a group's vertices: those of its faces
    want = brushes.Grab(stroke["center"], stroke["radius"], stroke["move"]).apply(v, mask=weights)
    np.testing.assert_allclose(read_obj(out)[0], want, rtol=0, atol=1e-9)
    only_bottom = np.setdiff1d(np.arange(len(v)), np.unique(f[top]))
    np.testing.assert_array_equal(read_obj(out)[0][only_bottom], v[only_bottom])
    stroke["mask"] = {"group": "tail"}
    recipe.write_text(json.dumps({"format": "pliant-recipe", "version": 1, "strokes": [stroke]}))
    assert_error(pliant("apply", recipe, mesh, "-o", out), mentions=["tail"])


def test_missing_file_exits_2(files, tmp_path):
    proc = pliant("apply", files["recipe"], tmp_path / "absent.obj", "-o", tmp_path / "x.obj")
    assert_error(proc, mentions=["absent.obj"])
    proc = pliant("apply", tmp_path / "absent.json", files["mesh"], "-o", tmp_path / "x.obj")
    assert_error(proc, mentions=["absent.json"])
    assert not (tmp_path / "x.obj").exists()


@pytest.mark.parametrize("name,data", [
    ("noise.obj", bytes(range(256)) * 8),
    ("words.obj", b"v 1 2\nf 1 2 3 4 5\nthis is not a mesh\n"),
    ("noise.ply", b"ply\nformat binary_little_endian 1.0\nelement vertex 9\nend_header\n\x01"),
    ("empty.stl", b""),
])
def test_garbage_mesh_exits_2(files, tmp_path, name, data):
    bad = tmp_path / name
    bad.write_bytes(data)
    out = tmp_path / ("out" + bad.suffix)
    assert_error(pliant("apply", files["recipe"], bad, "-o", out), mentions=[name])
    assert not out.exists() and no_temporaries(tmp_path)


def test_bad_recipe_exits_2_naming_every_problem(files, tmp_path):
    broken = tmp_path / "broken.json"
    broken.write_text('{"format": "pliant-recipe", "version": 1, "strokes": [')
    assert_error(pliant("apply", broken, files["mesh"], "-o", tmp_path / "x.obj"),
                 mentions=["broken.json"])
    wrong = tmp_path / "wrong.json"
    bad = json.loads(json.dumps(RECIPE))
    bad["strokes"][0]["radius"] = -1
    bad["strokes"][1]["degrees"] = "a lot"
    wrong.write_text(json.dumps(bad))
    proc = pliant("apply", wrong, files["mesh"], "-o", tmp_path / "x.obj")
    assert_error(proc, mentions=["strokes[0].radius", "strokes[1].degrees"])


def test_writing_over_an_input_needs_force(files, tmp_path):
    mesh = tmp_path / "ball.obj"
    shutil.copyfile(files["mesh"], mesh)
    before = mesh.read_bytes()
    proc = pliant("apply", files["recipe"], mesh, "-o", mesh)
    assert_error(proc, mentions=["--force"])
    assert mesh.read_bytes() == before
    # the same file under another name is still the input
    assert_error(pliant("apply", files["recipe"], mesh, "-o", tmp_path / "." / "ball.obj"))
    proc = pliant("apply", files["recipe"], mesh, "-o", mesh, "--force")
    assert proc.returncode == 0, proc.stderr
    np.testing.assert_allclose(read_obj(mesh)[0], files["posed"], rtol=0, atol=1e-9)
    assert no_temporaries(tmp_path)


def test_debug_shows_the_traceback(files, tmp_path):
    bad = tmp_path / "bad.obj"
    bad.write_bytes(b"\x00\xff garbage")
    proc = pliant("--debug", "apply", files["recipe"], bad, "-o", tmp_path / "x.obj")
    assert proc.returncode == 2
    assert "Traceback" in proc.stderr
    assert proc.stderr.strip().splitlines()[-1].startswith("pliant: error: ")
    late = pliant("apply", files["recipe"], bad, "-o", tmp_path / "x.obj", "--debug")
    assert late.returncode == 2 and "Traceback" in late.stderr


def test_an_unexpected_error_is_one_line_and_exit_1(monkeypatch, capsys):
    from brushes import cli

    def broken(args):
        raise RuntimeError("kaboom")

    monkeypatch.setattr(cli, "cmd_report", broken)
    assert cli.main(["report", "a.obj", "b.obj"]) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "kaboom" in err[0]
    assert err[0].startswith("pliant: error: internal error")


# --------------------------------------------------------------------------- delta and report

def test_delta_from_two_meshes(files, tmp_path):
    posed = tmp_path / "posed.obj"
    assert pliant("apply", files["recipe"], files["mesh"], "-o", posed).returncode == 0
    out = tmp_path / "pose.npz"
    proc = pliant("delta", files["mesh"], posed, "-o", out)
    assert proc.returncode == 0, proc.stderr
    with np.load(out) as z:
        np.testing.assert_allclose(z["deltas"], read_obj(posed)[0] - files["rest"], atol=1e-6)
    glb = tmp_path / "pose.glb"
    assert pliant("delta", files["mesh"], posed, "-o", glb).returncode == 0
    np.testing.assert_allclose(glb_morph_target(glb), read_obj(posed)[0] - files["rest"],
                               atol=1e-6)


def test_delta_refuses_different_meshes(files, tmp_path):
    small = tmp_path / "small.obj"
    trimesh.creation.icosphere(subdivisions=2).export(small)
    assert_error(pliant("delta", files["mesh"], small, "-o", tmp_path / "d.npz"),
                 mentions=["vertices"])
    flipped = tmp_path / "flipped.obj"                    # same vertices, other faces
    mesh = trimesh.Trimesh(files["rest"], files["faces"][:, ::-1], process=False)
    flipped.write_text(trimesh.exchange.obj.export_obj(mesh, include_normals=False))
    assert_error(pliant("delta", files["mesh"], flipped, "-o", tmp_path / "d.npz"),
                 mentions=["faces"])
    assert not (tmp_path / "d.npz").exists()


def test_report_json_and_table(files, tmp_path):
    posed = tmp_path / "posed.obj"
    assert pliant("apply", files["recipe"], files["mesh"], "-o", posed).returncode == 0
    proc = pliant("report", files["mesh"], posed, "--json")
    assert proc.returncode == 0, proc.stderr
    report = json.loads(proc.stdout)
    v, f = read_obj(posed)
    rest_volume = trimesh.Trimesh(files["rest"], f, process=False).volume      # trimesh
    posed_volume = trimesh.Trimesh(v, f, process=False).volume
    assert report["volume_rest"] == pytest.approx(rest_volume, rel=1e-9)
    assert report["volume_change"] == pytest.approx(posed_volume / rest_volume - 1, abs=1e-9)
    assert report["max_displacement"] == pytest.approx(
        np.linalg.norm(v - files["rest"], axis=1).max(), rel=1e-9)
    table = pliant("report", files["mesh"], posed)
    assert table.returncode == 0 and str(len(files["rest"])) in table.stdout
    with pytest.raises(json.JSONDecodeError):
        json.loads(table.stdout)


# --------------------------------------------------------------------------- demo

def glb_morph_target(path) -> np.ndarray:
    """The first morph target's POSITION deltas of a GLB, read by hand.

    Layout per the glTF 2.0 specification: 12-byte header, then chunks of
    (length u32, type u32, data); the first chunk is JSON, the second the binary buffer.
    """
    data = Path(path).read_bytes()
    magic, version, _ = struct.unpack_from("<4sII", data, 0)
    assert magic == b"glTF" and version == 2
    length, kind = struct.unpack_from("<II", data, 12)
    assert kind == 0x4E4F534A                                          # "JSON"
    gltf = json.loads(data[20:20 + length])
    offset = 20 + length
    blength, bkind = struct.unpack_from("<II", data, offset)
    assert bkind == 0x004E4942                                         # "BIN\0"
    binary = data[offset + 8:offset + 8 + blength]
    accessor = gltf["accessors"][gltf["meshes"][0]["primitives"][0]["targets"][0]["POSITION"]]
    assert accessor["componentType"] == 5126 and accessor["type"] == "VEC3"   # float32 vec3
    view = gltf["bufferViews"][accessor["bufferView"]]
    start = view.get("byteOffset", 0) + accessor.get("byteOffset", 0)
    stride = view.get("byteStride", 12)
    assert stride == 12
    return np.frombuffer(binary, "<f4", accessor["count"] * 3, start).reshape(-1, 3)


def test_demo_end_to_end_through_the_console_script(tmp_path):
    script = shutil.which("pliant")
    command = [script] if script else [sys.executable, "-m", "brushes.cli"]
    proc = subprocess.run([*command, "demo", "--out", "out"], cwd=tmp_path, env=env(),
                          capture_output=True, text=True, timeout=900)
    assert proc.returncode == 0, proc.stderr
    out = tmp_path / "out"
    posed_path, glb, npz, report_path = (out / "mascot-posed.obj", out / "mascot-pose.glb",
                                         out / "mascot-pose.npz", out / "mascot-report.json")
    for path in (posed_path, glb, npz, report_path):
        assert path.is_file() and str(path.relative_to(tmp_path)) in proc.stdout, path
    rest, faces = read_obj(ROOT / "models" / "mascot.obj")
    posed, posed_faces = read_obj(posed_path)
    np.testing.assert_array_equal(posed_faces, faces)
    report = json.loads(report_path.read_text())
    # trimesh volumes and numpy displacements as the outside reference
    v0 = trimesh.Trimesh(rest, faces, process=False).volume
    v1 = trimesh.Trimesh(posed, faces, process=False).volume
    assert report["volume_change"] == pytest.approx(v1 / v0 - 1, abs=1e-6)
    moved = np.linalg.norm(posed - rest, axis=1)
    assert report["max_displacement"] == pytest.approx(moved.max(), rel=1e-6)
    assert moved.max() > 0.01
    with np.load(npz) as z:
        np.testing.assert_allclose(z["deltas"], posed - rest, atol=1e-5)
    np.testing.assert_allclose(glb_morph_target(glb), posed - rest, atol=1e-5)
    # the printed summary agrees with the report
    assert f"{100 * report['volume_change']:+.3g} %" in proc.stdout
    assert re.search(rf"flipped faces:\s+{report['flipped_faces']}\b", proc.stdout)
    assert "max displacement" in proc.stdout


def test_demo_says_clearly_when_the_model_is_missing(tmp_path, monkeypatch):
    from brushes import demo

    with pytest.raises(demo.DemoError, match="bundled model not found"):
        demo.run_demo(tmp_path / "out", models=[tmp_path])
    assert not (tmp_path / "out").exists()


# --------------------------------------------------------------------------- batch

@pytest.fixture()
def batch_inputs(files, tmp_path):
    """Three good copies of the sphere and one corrupt asset."""
    inputs = tmp_path / "in"
    inputs.mkdir()
    good = []
    for name in ("a.obj", "b.obj", "c.obj"):
        shutil.copyfile(files["mesh"], inputs / name)
        good.append(inputs / name)
    corrupt = inputs / "corrupt.obj"
    corrupt.write_bytes(files["mesh"].read_bytes()[:2000] + b"\nf 1 2 99999\n\x00\x00")
    return good, corrupt


def check_batch(proc, files, good, corrupt, out):
    assert proc.returncode == 1, (proc.stdout, proc.stderr)
    named = [ln for ln in proc.stderr.splitlines() if ln.startswith("pliant: error:")]
    assert len(named) == 1 and "corrupt.obj" in named[0], proc.stderr
    assert "Traceback" not in proc.stderr
    summary = proc.stdout.strip().splitlines()[-1]
    assert re.fullmatch(r"batch: 3 posed, 1 failed, \d+\.\d s", summary), summary
    for src in good:
        np.testing.assert_allclose(read_obj(out / src.name)[0], files["posed"], rtol=0,
                                   atol=1e-9)
    assert not (out / corrupt.name).exists()
    assert no_temporaries(out)


def test_batch_with_a_corrupt_asset_on_local_processes(files, batch_inputs, tmp_path):
    good, corrupt = batch_inputs
    out = tmp_path / "out"
    proc = pliant("batch", files["recipe"], *good, corrupt, "--out", out, "--jobs", "2")
    check_batch(proc, files, good, corrupt, out)
    # not a terminal: no progress line, only whole message lines (issue 11)
    assert proc.stderr.splitlines() == [ln for ln in proc.stderr.splitlines()
                                        if ln.startswith("pliant: error:")]
    assert "\r" not in proc.stderr and "failed: corrupt.obj" in proc.stdout
    proc = pliant("batch", files["recipe"], *good, "--out", tmp_path / "out1", "--jobs", "1",
                  "--quiet")
    assert proc.returncode == 0 and proc.stderr == ""
    assert proc.stdout.startswith("batch: 3 posed, 0 failed, ")


def test_batch_on_a_dask_cluster(files, batch_inputs, tmp_path):
    distributed = pytest.importorskip("distributed", reason="dask.distributed not installed")
    good, corrupt = batch_inputs
    out = tmp_path / "out"
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  host="127.0.0.1", protocol="tcp://", dashboard_address=None,
                                  worker_dashboard_address=None) as cluster:
        address = cluster.scheduler_address
        assert address.startswith("tcp://127.0.0.1:")     # loopback only
        proc = pliant("batch", files["recipe"], *good, corrupt, "--out", out,
                      "--scheduler", address)
    check_batch(proc, files, good, corrupt, out)


def test_batch_without_dask_says_what_to_install(files, tmp_path):
    code = ("import sys; sys.modules['distributed'] = None\n"       # import fails as if absent
            "from brushes.cli import main; sys.exit(main(sys.argv[1:]))")
    proc = subprocess.run([sys.executable, "-c", code, "batch", str(files["recipe"]),
                           str(files["mesh"]), "--out", str(tmp_path / "o"),
                           "--scheduler", "tcp://127.0.0.1:8786"],
                          capture_output=True, text=True, env=env(), timeout=120)
    assert_error(proc, mentions=["pip install pliant[cluster]"])


def test_batch_unreachable_scheduler_exits_2(files, tmp_path):
    e = env()
    e["DASK_DISTRIBUTED__COMM__TIMEOUTS__CONNECT"] = "1s"    # dask config by environment
    proc = subprocess.run([sys.executable, "-m", "brushes.cli", "batch", str(files["recipe"]),
                           str(files["mesh"]), "--out", str(tmp_path / "o"),
                           "--scheduler", "tcp://127.0.0.1:9"],
                          capture_output=True, text=True, env=e, timeout=120)
    assert_error(proc, mentions=["tcp://127.0.0.1:9"])


def test_batch_refuses_clashing_or_overwriting_outputs(files, batch_inputs, tmp_path):
    good, _ = batch_inputs
    other = tmp_path / "other"
    other.mkdir()
    shutil.copyfile(good[0], other / good[0].name)
    assert_error(pliant("batch", files["recipe"], good[0], other / good[0].name,
                        "--out", tmp_path / "o"), mentions=["distinct file names"])
    before = good[0].read_bytes()
    assert_error(pliant("batch", files["recipe"], *good, "--out", good[0].parent),
                 mentions=["--force"])
    assert good[0].read_bytes() == before
    assert_error(pliant("batch", files["recipe"], *good, "--out", tmp_path / "o2",
                        "--scheduler", "tcp://127.0.0.1:8786", "--jobs", "2"),
                 mentions=["--jobs"])


def test_batch_bad_recipe_stops_before_any_work(files, batch_inputs, tmp_path):
    good, _ = batch_inputs
    bad = tmp_path / "bad.json"
    bad.write_text('{"format": "pliant-recipe", "version": 1, "strokes": [{"brush": "smudge"}]}')
    assert_error(pliant("batch", bad, *good, "--out", tmp_path / "o"), mentions=["strokes[0]"])
    assert not (tmp_path / "o").exists()


def _ignore_sigint():
    # what a non-interactive shell does for a job started with `&` (POSIX): SIGINT ignored
    signal.signal(signal.SIGINT, signal.SIG_IGN)


@pytest.mark.parametrize("jobs, started", [("1", "foreground"), ("2", "foreground"), ("2", "background")])
def test_ctrl_c_exits_130_and_leaves_only_whole_files(files, tmp_path, jobs, started):
    inputs = tmp_path / "in"
    inputs.mkdir()
    names = []
    for i in range(400):
        shutil.copyfile(files["mesh"], inputs / f"m{i:03d}.obj")
        names.append(str(inputs / f"m{i:03d}.obj"))
    out = tmp_path / "out"
    proc = subprocess.Popen([sys.executable, "-m", "brushes.cli", "batch", str(files["recipe"]),
                             *names, "--out", str(out), "--jobs", jobs, "--quiet"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env=env(), start_new_session=True,
                            preexec_fn=_ignore_sigint if started == "background" else None)
    try:
        # wait for the event (three finished meshes), bounded only so a broken run cannot hang
        deadline = time.monotonic() + 600
        while time.monotonic() < deadline and not (out.is_dir() and len(list(out.glob("*.obj"))) >= 3):
            if proc.poll() is not None:
                break
            time.sleep(0.05)
        # Ctrl-C in a terminal sends SIGINT to the whole foreground process group
        os.killpg(proc.pid, signal.SIGINT)
        stdout, stderr = proc.communicate(timeout=600)
    finally:
        if proc.poll() is None:  # never leave a hung batch and its workers behind
            os.killpg(proc.pid, signal.SIGKILL)
            proc.communicate()
    assert proc.returncode == 130, (stdout, stderr)
    assert stderr.strip().splitlines() == ["pliant: interrupted"]
    written = sorted(out.glob("*.obj"))
    assert 3 <= len(written) < len(names)
    assert no_temporaries(out)
    for path in written:                                    # every file that exists is whole
        np.testing.assert_allclose(read_obj(path)[0], files["posed"], rtol=0, atol=1e-9)


# --------------------------------------------------------------------------- view and snapshot

def test_view_missing_file_exits_2(tmp_path):
    assert_error(pliant("view", tmp_path / "absent.obj"), mentions=["absent.obj"])


def test_view_without_a_display_is_one_line_exit_2(files):
    e = env()
    for name in ("DISPLAY", "WAYLAND_DISPLAY"):
        e.pop(name, None)
    proc = subprocess.run([sys.executable, "-m", "brushes.cli", "view", str(files["mesh"])],
                          capture_output=True, text=True, env=e, timeout=120)
    assert_error(proc, mentions=["viewer window"])


def test_view_passes_its_arguments_to_the_viewer(monkeypatch, tmp_path, files):
    import types

    from brushes import cli

    calls = []
    fake = types.ModuleType("viewer.app")
    fake.run = lambda mesh_path=None, *, recover=False: calls.append((mesh_path, recover))
    monkeypatch.setitem(sys.modules, "viewer.app", fake)
    assert cli.main(["view", str(files["mesh"]), "--recover"]) == 0
    assert cli.main(["view"]) == 0
    assert calls == [(str(files["mesh"]), True), (None, False)]


def test_snapshot_renders_a_png_of_the_requested_size(files, tmp_path):
    from PIL import Image

    png = tmp_path / "posed.png"
    proc = pliant("snapshot", files["mesh"], "-o", png, "--recipe", files["recipe"],
                  "--size", "96x64", "--view", "side")
    if proc.returncode == 2 and "OpenGL" in proc.stderr:
        pytest.skip(f"no off-screen OpenGL on this machine: {proc.stderr.strip()}")
    assert proc.returncode == 0, proc.stderr
    with Image.open(png) as image:                      # Pillow reads what we wrote
        assert image.format == "PNG" and image.size == (96, 64)
        pixels = np.asarray(image.convert("RGB"))
    assert len(np.unique(pixels.reshape(-1, 3), axis=0)) > 10    # a shaded mesh, not a blank
    assert_error(pliant("snapshot", files["mesh"], "-o", tmp_path / "b.png", "--view", "up=3"),
                 mentions=["view"])
    assert not (tmp_path / "b.png").exists()


# --------------------------------------------------------------------------- issue 11: files in a pipeline

QUAD_OBJ = ("v 0 0 0\nv 1 0 0\nv 1 1 0\nv 0 1 0\nv 0 0 1\nv 1 0 1\nv 1 1 1\nv 0 1 1\n"
            "vt 0 0\nvt 1 0\nvt 1 1\nvt 0 1\nvt 0.5 0.5\nvt 0.25 0.75\n"
            "g lid\nusemtl paint\nf 1/1 4/2 3/3 2/4\nf 5/1 6/2 7/3 8/4\n"
            "g sides\nusemtl wood\nf 1/5 2/6 6/3 5/4\nf 2/1 3/2 7/3 6/4\nf 3/1 4/2 8/3 7/4\n"
            "f 4/5 1/6 5/3 8/4\n")


def _recipe(tmp_path, strokes, name="r.json"):
    path = tmp_path / name
    path.write_text(json.dumps({"format": "pliant-recipe", "version": 1, "strokes": strokes}))
    return path


CUBE_GRAB = {"brush": "grab", "center": [1, 1, 1], "radius": 0.8, "move": [0.1, 0.05, 0.0]}


def test_apply_converts_and_says_in_one_line_what_it_could_not_keep(tmp_path):
    cube = tmp_path / "cube.obj"
    cube.write_text(QUAD_OBJ)
    recipe = _recipe(tmp_path, [CUBE_GRAB])
    proc = pliant("apply", recipe, cube, "-o", tmp_path / "cube.glb")
    assert proc.returncode == 0, proc.stderr
    line = proc.stdout.splitlines()[0]
    assert line.startswith(f"posed: {tmp_path / 'cube.glb'} (converted OBJ to GLB; vertices 8 -> ")
    assert line.endswith("not kept: polygons (6 polygons written as 12 triangles))")
    proc = pliant("apply", recipe, cube, "-o", tmp_path / "cube.stl")
    assert "not kept: texture coordinates, groups (lid, sides), materials (paint, wood), polygons" \
        in proc.stdout
    # the group mask still finds its group in the converted file (glTF node names)
    masked = _recipe(tmp_path, [dict(CUBE_GRAB, mask={"group": "lid"})], "m.json")
    proc = pliant("apply", masked, tmp_path / "cube.glb", "-o", tmp_path / "again.glb")
    assert proc.returncode == 0, proc.stderr


def test_output_folders_are_checked_first_and_named_by_option(files, tmp_path):
    missing = tmp_path / "nowhere"
    assert_error(pliant("apply", files["recipe"], files["mesh"], "-o", missing / "p.obj"),
                 mentions=["--out:", str(missing / "p.obj")])
    assert_error(pliant("apply", files["recipe"], files["mesh"], "-o", tmp_path / "p.obj",
                        "--delta", missing / "d.npz"), mentions=["--delta:", "does not exist"])
    assert not (tmp_path / "p.obj").exists()                # nothing half done
    assert_error(pliant("delta", files["mesh"], files["mesh"], "-o", missing / "d.glb"),
                 mentions=["--out:"])


def test_mask_error_names_the_recipe_file(files, tmp_path):
    recipe = _recipe(tmp_path, [dict(RECIPE["strokes"][0], mask={"group": "tail"})])
    assert_error(pliant("apply", recipe, files["mesh"], "-o", tmp_path / "p.obj"),
                 mentions=[f"{recipe}: strokes[0].mask.group"])


def test_report_counts_polygons_and_triangles(tmp_path):
    cube = tmp_path / "cube.obj"
    cube.write_text(QUAD_OBJ)
    recipe = _recipe(tmp_path, [CUBE_GRAB])
    assert pliant("apply", recipe, cube, "-o", tmp_path / "posed.obj").returncode == 0
    report = json.loads(pliant("report", cube, tmp_path / "posed.obj", "--json").stdout)
    assert (report["polygon_count"], report["triangle_count"]) == (6, 12)
    # the seam-split GLB of the same cube is closed and has the cube's volume (1, by hand)
    assert pliant("apply", recipe, cube, "-o", tmp_path / "posed.glb").returncode == 0
    report = json.loads(pliant("report", cube, tmp_path / "posed.glb", "--json").stdout)
    assert report["closed"] is True and report["volume_rest"] == pytest.approx(1.0)


def test_report_compares_a_posed_stl_with_its_source(files, tmp_path):
    stl = tmp_path / "ball.stl"
    stl.write_bytes(trimesh.load(files["mesh"], process=False).export(file_type="stl"))
    posed = tmp_path / "posed.stl"
    assert pliant("apply", files["recipe"], stl, "-o", posed).returncode == 0
    proc = pliant("report", stl, posed, "--json")
    assert proc.returncode == 0, proc.stderr
    report = json.loads(proc.stdout)
    # outside reference: trimesh's volumes of the two STL files (it merges their corners)
    a, b = trimesh.load(stl), trimesh.load(posed)
    assert report["volume_change"] == pytest.approx(b.volume / a.volume - 1, abs=1e-6)
    assert report["max_displacement"] == pytest.approx(np.linalg.norm(
        files["posed"] - files["rest"], axis=1).max(), abs=1e-5)


def test_report_mismatch_has_its_own_wording(files, tmp_path):
    small = tmp_path / "small.obj"
    trimesh.creation.icosphere(subdivisions=1).export(small)
    proc = pliant("report", files["mesh"], small)
    assert_error(proc, mentions=["compares a mesh with a posed copy"])
    assert "corrective" not in proc.stderr


def test_strokes_at_the_wrong_scale_are_warned_of(files, tmp_path):
    far = {"brush": "grab", "center": [1e4, 0, 0], "radius": 1e-3, "move": [1e-3, 0, 0]}
    huge = {"brush": "grab", "center": [0, 0, 0], "radius": 500.0, "move": [30.0, 0, 0]}
    fine = RECIPE["strokes"][0]
    recipe = _recipe(tmp_path, [fine, far, huge])
    proc = pliant("apply", recipe, files["mesh"], "-o", tmp_path / "p.obj")
    assert proc.returncode == 0, proc.stderr
    warnings = [ln for ln in proc.stderr.splitlines() if ln.startswith("pliant: warning:")]
    assert len(warnings) == 2, proc.stderr
    assert "strokes[1]: moves the mesh by at most" in warnings[0]
    assert "strokes[2]: moves every vertex by more than the mesh's size" in warnings[1]


def test_delta_as_usd_blend_shape(files, tmp_path):
    pytest.importorskip("pxr", reason="usd-core (a dependency in pyproject) is not installed")
    from pxr import Usd, UsdSkel

    out = tmp_path / "pose.usda"
    proc = pliant("apply", files["recipe"], files["mesh"], "-o", tmp_path / "p.obj", "--delta", out)
    assert proc.returncode == 0, proc.stderr
    stage = Usd.Stage.Open(str(out))
    blends = [p for p in stage.Traverse() if p.IsA(UsdSkel.BlendShape)]
    assert len(blends) == 1
    offsets = np.array(UsdSkel.BlendShape(blends[0]).GetOffsetsAttr().Get())
    indices = UsdSkel.BlendShape(blends[0]).GetPointIndicesAttr().Get()
    full = np.zeros_like(files["rest"])
    full[np.arange(len(full)) if indices is None else np.array(indices)] = offsets
    np.testing.assert_allclose(files["rest"] + full, files["posed"], atol=1e-5)


def test_batch_progress_stays_on_one_terminal_line(files, batch_inputs, tmp_path):
    # a pseudo-terminal as stderr: the bar is redrawn in place and each message is a line above it
    import pty

    good, corrupt = batch_inputs
    master, slave = pty.openpty()
    proc = subprocess.Popen([sys.executable, "-m", "brushes.cli", "batch", str(files["recipe"]),
                             *map(str, good), str(corrupt), "--out", str(tmp_path / "o"),
                             "--jobs", "1"], stdout=subprocess.PIPE, stderr=slave, env=env())
    os.close(slave)
    chunks = []
    while True:
        try:
            data = os.read(master, 4096)
        except OSError:  # the other end closed: the child exited
            break
        if not data:
            break
        chunks.append(data)
    stdout, _ = proc.communicate(timeout=300)
    os.close(master)
    text = b"".join(chunks).decode()
    assert proc.returncode == 1
    # every full line printed to the terminal is a message; bar states only follow "\r\x1b[K"
    lines = [seg.split("\r\x1b[K")[-1] for seg in text.replace("\r\n", "\n").split("\n")]
    messages = [ln for ln in lines[:-1] if ln]
    assert len(messages) == 1 and messages[0].startswith("pliant: error: ") and "corrupt.obj" in messages[0]
    assert "batch 4/4 [" in text and lines[-1] == ""           # the bar is cleared at the end
    assert stdout.decode().strip().splitlines()[-1].startswith("batch: 3 posed, 1 failed, ")
