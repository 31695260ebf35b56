"""viewer.snapshot: off-screen PNGs through pyglet's headless (EGL) mode.

pyglet picks headless or windowed OpenGL when ``pyglet.gl`` is first imported, so every
rendering here runs in a fresh subprocess and this test process never imports pyglet; other
test files that import pyglet are unaffected.
"""

import json
import math
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
import trimesh
from PIL import Image

from viewer import palette
from viewer.snapshot import VIEW_PRESETS, ViewSpecError, parse_size, parse_view

ROOT = Path(__file__).resolve().parents[1]


def _python(code, *, timeout=1800):  # a hang guard, not a speed limit
    """Run ``code`` in a fresh interpreter at the project root; return the completed process."""
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    return subprocess.run([sys.executable, "-c", textwrap.dedent(code)], cwd=ROOT, env=env,
                          capture_output=True, text=True, timeout=timeout)


def _background_rgb():
    return np.round(np.array(palette.BACKGROUND) * 255).astype(int)


def _mesh_mask(image):
    """True where a pixel differs from the background colour by more than rounding."""
    return np.abs(image.astype(int) - _background_rgb()).max(axis=2) > 2


@pytest.fixture(scope="module")
def pictures(tmp_path_factory):
    """Render the test scenes once, in one subprocess, and load them as (h, w, 3) uint8."""
    folder = tmp_path_factory.mktemp("snapshots")
    sphere = trimesh.creation.icosphere(subdivisions=4)
    np.save(folder / "sphere_v.npy", sphere.vertices)
    np.save(folder / "sphere_f.npy", sphere.faces)
    box = trimesh.creation.box(extents=[2.0, 1.0, 0.5])
    np.save(folder / "box_v.npy", box.vertices)
    np.save(folder / "box_f.npy", box.faces)
    result = _python(f"""
        import numpy as np
        from pathlib import Path
        from viewer.snapshot import snapshot
        d = Path({str(folder)!r})
        v, f = np.load(d / "sphere_v.npy"), np.load(d / "sphere_f.npy")
        bounds = np.array([v.min(0), v.max(0)])
        snapshot(v, f, d / "sphere.png", size=(160, 120), view="front")
        edited = v.copy()
        top = edited[:, 1] > 0.3
        edited[top, 1] += 0.5   # lift the cap of the sphere
        snapshot(edited, f, d / "edited.png", size=(160, 120), view="front",
                 bounds=bounds)
        snapshot(v, f, d / "overlay.png", size=(160, 120), view="front",
                 magnitude=np.linalg.norm(edited - v, axis=1))
        bv, bf = np.load(d / "box_v.npy"), np.load(d / "box_f.npy")
        snapshot(bv, bf, d / "box_front.png", size=(200, 200), view="front,fov=30")
        snapshot(bv, bf, d / "box_side.png", size=(200, 200), view="side,fov=30")
        print("done")
    """)
    assert result.returncode == 0, result.stderr
    names = ["sphere", "edited", "overlay", "box_front", "box_side"]
    images = {n: np.asarray(Image.open(folder / f"{n}.png").convert("RGB")) for n in names}
    images["folder"] = folder
    return images


def test_png_has_requested_size_and_background_where_no_mesh(pictures):
    image = pictures["sphere"]
    assert image.shape == (120, 160, 3)
    # The sphere sits in the middle; the corners show the palette's ground colour.
    for corner in (image[0, 0], image[0, -1], image[-1, 0], image[-1, -1]):
        np.testing.assert_allclose(corner, _background_rgb(), atol=1)
    # ...and the middle is not the background.
    assert np.abs(image[60, 80].astype(int) - _background_rgb()).max() > 30


def test_sphere_covers_the_area_a_pinhole_camera_predicts(pictures):
    # Independent prediction by hand (pinhole projection): the frame-all rule documented in
    # viewer.camera backs off until every corner of the box fits inside the view shrunk by
    # 1.05. Seen from the front, the unit sphere's box [-1, 1]^3 has its near corners 1 closer
    # than the centre and 1 above it, and the 160 x 120 picture is limited by its height, so
    # D = 1 + 1.05 / tan(fov/2). A unit sphere at distance D looks like a disc of angular
    # radius asin(1/D), i.e. tan(asin(1/D)) / tan(fov/2) half picture heights.
    fov = math.radians(40.0)
    distance = 1 + 1.05 / math.tan(fov / 2)
    radius_px = 60 * math.tan(math.asin(1 / distance)) / math.tan(fov / 2)
    expected = math.pi * radius_px**2
    covered = _mesh_mask(pictures["sphere"]).sum()
    assert covered / (160 * 120) > 0.25  # a good part of the frame
    assert abs(covered - expected) / expected < 0.04  # polygon silhouette and edge smoothing


def test_an_edit_changes_the_picture(pictures):
    before, after = pictures["sphere"], pictures["edited"]
    changed = np.abs(before.astype(int) - after.astype(int)).max(axis=2) > 10
    assert changed.sum() > 200
    # The lifted cap makes the silhouette reach higher up the picture (rows count downward).
    top_before = np.nonzero(_mesh_mask(before).any(axis=1))[0][0]
    top_after = np.nonzero(_mesh_mask(after).any(axis=1))[0][0]
    assert top_after < top_before - 5
    # The bottom half was not edited and the framing was held by `bounds`.
    np.testing.assert_array_equal(before[80:], after[80:])


def test_magnitude_overlay_uses_the_ramp(pictures):
    plain, overlay = pictures["sphere"], pictures["overlay"]
    # Unmoved lower half: ramp's cold end (slate-blue) in place of clay, so blue exceeds red.
    lower = overlay[85, 80].astype(int)
    assert lower[2] > lower[0]
    assert plain[85, 80, 0] > plain[85, 80, 2]  # clay is red-dominant
    # Most moved part (the cap, seen at the top of the disc): the ramp's hot end, red-dominant.
    cap_row = np.nonzero(_mesh_mask(overlay).any(axis=1))[0][0] + 4
    hot = overlay[cap_row, 80].astype(int)
    assert hot[0] > hot[2] + 40


def test_yaw_turns_the_model(pictures):
    # A 2 x 1 x 0.5 box: seen from the front (+z) the silhouette is 2 wide and 1 tall; from the
    # side (+x) it is 0.5 wide and 1 tall (plus perspective of the near face), so the
    # width/height ratio drops from about 2 to about 0.5.
    def ratio(image):
        mask = _mesh_mask(image)
        rows, cols = np.nonzero(mask)
        return (cols.max() - cols.min() + 1) / (rows.max() - rows.min() + 1)
    front, side = ratio(pictures["box_front"]), ratio(pictures["box_side"])
    assert 1.6 < front < 2.4
    assert 0.35 < side < 0.75


def test_write_is_atomic_and_no_temporary_is_left(pictures):
    folder = pictures["folder"]
    assert not [p for p in os.listdir(folder) if p.endswith(".tmp")]


def test_bad_arguments_leave_an_existing_file_untouched(tmp_path):
    target = tmp_path / "keep.png"
    target.write_bytes(b"old")
    result = _python(f"""
        import numpy as np
        from viewer.snapshot import snapshot
        for kwargs in ({{"size": (0, 10)}}, {{"view": "zoom=-1"}}):
            try:
                snapshot(np.eye(3), [[0, 1, 2]], {str(target)!r}, **kwargs)
            except ValueError as err:
                print(str(err).split(":")[0])
    """)
    assert result.returncode == 0, result.stderr
    assert result.stdout.split() == ["size", "view"]
    assert target.read_bytes() == b"old"


def test_missing_egl_gives_an_install_hint(tmp_path):
    # Simulate a machine without libEGL: pyglet's library loader refuses it.
    result = _python(f"""
        import pyglet.lib
        real = pyglet.lib.load_library
        def refuse(*names, **kwargs):
            if any("EGL" in n for n in names):
                raise ImportError("Library EGL not found")
            return real(*names, **kwargs)
        pyglet.lib.load_library = refuse
        import numpy as np
        from viewer.snapshot import SnapshotError, snapshot
        try:
            snapshot(np.eye(3), [[0, 1, 2]], {str(tmp_path / "x.png")!r})
        except SnapshotError as err:
            print("ERROR", err)
    """)
    assert result.returncode == 0, result.stderr
    assert "ERROR" in result.stdout
    assert "apt-get install libegl1 libegl-mesa0 libgl1 libgl1-mesa-dri" in result.stdout
    assert not (tmp_path / "x.png").exists()


def test_parse_view_defaults_presets_and_overrides():
    assert parse_view(None) == {"yaw": 30.0, "pitch": 15.0, "zoom": 1.0, "fov": 40.0}
    assert parse_view("yaw=-40, pitch=10,zoom=1.3") == {
        "yaw": -40.0, "pitch": 10.0, "zoom": 1.3, "fov": 40.0}
    assert parse_view("side,zoom=2")["yaw"] == 90.0 and parse_view("side,zoom=2")["zoom"] == 2.0
    assert parse_view({"fov": 25}) == {"yaw": 30.0, "pitch": 15.0, "zoom": 1.0, "fov": 25.0}
    assert set(VIEW_PRESETS) == {"front", "side", "back", "top", "angle"}


@pytest.mark.parametrize("spec, word", [
    ("zoom=0", "zoom"), ("pitch=95", "pitch"), ("tilt=3", "unknown"), ("yaw", "expected"),
    ("yaw=1,yaw=2", "twice"), ("fov=wide", "number"), ("zoom=1,side", "expected"),
    ("fov=nan", "fov"),
])
def test_parse_view_rejects_bad_specs(spec, word):
    with pytest.raises(ViewSpecError, match=f"^view: .*{word}"):
        parse_view(spec)
    assert issubclass(ViewSpecError, ValueError)


def test_parse_size():
    assert parse_size("800x600") == (800, 600)
    assert parse_size("64X48") == (64, 48)
    for bad in ("800", "0x10", "axb", "10x10x10", "99999x10"):
        with pytest.raises(ValueError, match="^size"):
            parse_size(bad)


def test_cli_snapshot_call_shape(tmp_path):
    # The command calls snapshot(vertices, faces, out, size=(w, h), view=SPEC); check that
    # shape end to end with a mesh file written by trimesh.
    mesh_path = tmp_path / "ball.obj"
    trimesh.creation.icosphere(subdivisions=2).export(mesh_path)
    out = tmp_path / "ball.png"
    result = _python(f"""
        import trimesh
        from viewer.snapshot import snapshot
        m = trimesh.load({str(mesh_path)!r}, process=False)
        print(snapshot(m.vertices, m.faces, {str(out)!r}, size=(40, 30), view="top"))
    """)
    assert result.returncode == 0, result.stderr
    assert Image.open(out).size == (40, 30)
    assert json.dumps(result.stdout.strip()) == json.dumps(str(out))
