"""viewer.app: a headless window driven by synthetic pyglet events.

pyglet chooses headless (EGL) or windowed OpenGL when ``pyglet.gl`` is first imported, so each
scenario runs in a fresh subprocess that sets ``pyglet.options["headless"]`` first; this test
process never imports pyglet's window or GL modules. Events go through
``window.dispatch_event`` exactly as pyglet's event loop delivers them.
"""

import json
import os
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
import trimesh

ROOT = Path(__file__).resolve().parents[1]
W, H = 320, 240

# Shared prelude of every scenario: a headless viewer on MESH and helpers to send events.
PRELUDE = f"""
import json, sys
import numpy as np
import pyglet
pyglet.options["headless"] = True
pyglet.options["debug_gl"] = False
from pyglet.window import key, mouse
from viewer.app import open_viewer

W, H = {W}, {H}

def send(viewer, *event):
    viewer.window.dispatch_event(*event)
    viewer.window.dispatch_events()   # outside pyglet.app.run events wait in a queue

def drag(viewer, start, end, steps=6, button=mouse.LEFT, modifiers=0):
    (x0, y0), (x1, y1) = start, end
    send(viewer, "on_mouse_motion", x0, y0, 0, 0)
    send(viewer, "on_mouse_press", x0, y0, button, modifiers)
    px, py = x0, y0
    for i in range(1, steps + 1):
        x = x0 + (x1 - x0) * i / steps
        y = y0 + (y1 - y0) * i / steps
        send(viewer, "on_mouse_drag", x, y, x - px, y - py, button, modifiers)
        send(viewer, "on_draw")
        px, py = x, y
    send(viewer, "on_mouse_release", x1, y1, button, modifiers)

def camera_state(viewer):
    c = viewer.session.camera
    return {{"target": c.target.tolist(), "distance": c.distance, "yaw": c.yaw,
            "pitch": c.pitch, "fov_y": c.fov_y}}

def frame(viewer):
    viewer.window.switch_to()
    send(viewer, "on_draw")
    data = pyglet.image.get_buffer_manager().get_color_buffer().get_image_data()
    rgba = np.frombuffer(data.get_data("RGBA", data.width * 4), np.uint8)
    return rgba.reshape(data.height, data.width, 4)[::-1, :, :3].copy()
"""


# Subprocess time limits only guard against a hang; they are far above any slow machine's time.
HANG_GUARD = 1800


def _run(body, *, timeout=HANG_GUARD, cwd=ROOT):
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    code = PRELUDE + textwrap.dedent(body)
    result = subprocess.run([sys.executable, "-c", code], cwd=cwd, env=env,
                            capture_output=True, text=True, timeout=timeout)
    assert result.returncode == 0, result.stderr[-3000:]
    return result.stdout


def _camera(state):
    from viewer.camera import OrbitCamera
    return OrbitCamera(target=state["target"], distance=state["distance"], yaw=state["yaw"],
                       pitch=state["pitch"], fov_y=state["fov_y"])


@pytest.fixture
def ball(tmp_path):
    """A small closed mesh file in a fresh folder (journals and outputs land beside it)."""
    path = tmp_path / "ball.obj"
    mesh = trimesh.creation.icosphere(subdivisions=3)
    mesh.export(path)
    return path


def test_scripted_drag_gives_the_recipe_and_mesh_of_the_api(ball, tmp_path):
    out = _run(f"""
        viewer = open_viewer({str(ball)!r}, size=(W, H), visible=False)
        s = viewer.session
        camera = camera_state(viewer)
        radius = s.radius
        drag(viewer, (W / 2 + 10, H / 2 + 5), (W / 2 + 50, H / 2 + 30))
        send(viewer, "on_key_press", key.S, key.MOD_CTRL)     # save the recipe
        send(viewer, "on_key_press", key.E, key.MOD_CTRL)     # export the posed mesh
        np.save({str(tmp_path / "viewer.npy")!r}, np.asarray(s.vertices))
        print(json.dumps({{"camera": camera, "radius": radius, "size": [s.width, s.height],
                          "strokes": s.history.applied, "message": s.message}}))
    """)
    state = json.loads(out.strip().splitlines()[-1])
    assert state["size"] == [W, H]

    # The same stroke through the public API, computed here from the camera at the press.
    from brushes.formats import load_mesh
    from brushes.recipe import Stroke, load_recipe
    from viewer import gesture
    from viewer.picking import Picker
    doc = load_mesh(ball)
    camera = _camera(state["camera"])
    x0, y0, x1, y1 = W / 2 + 10, H / 2 + 5, W / 2 + 50, H / 2 + 30
    hit = Picker(doc.vertices, doc.faces).pick(*camera.ray(x0, y0, W, H))
    assert hit.hit
    params = gesture.grab(camera, hit.point, state["radius"], (x0, y0), (x1, y1), W, H)
    params.pop("kind")
    stroke = Stroke("grab", {**params, "poisson": 0.5, "falloff": "wide"})
    expected = stroke.apply(doc.vertices)

    assert len(state["strokes"]) == 1
    recorded = state["strokes"][0]
    assert recorded["brush"] == "grab"
    np.testing.assert_allclose(recorded["move"], params["move"], rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(recorded["center"], params["center"], rtol=1e-12, atol=1e-15)
    viewer_vertices = np.load(tmp_path / "viewer.npy")
    np.testing.assert_allclose(viewer_vertices, expected, rtol=0, atol=1e-12)
    assert np.abs(viewer_vertices - doc.vertices).max() > 1e-3  # the drag did move the mesh

    # The saved recipe replays to the same mesh; the exported mesh holds it.
    recipe = load_recipe(tmp_path / "ball-recipe.json")
    np.testing.assert_array_equal(recipe.apply(doc.vertices), viewer_vertices)
    exported = load_mesh(tmp_path / "ball-posed.obj")
    np.testing.assert_allclose(exported.vertices, viewer_vertices, atol=1e-6)


def test_undo_redo_round_trip(ball, tmp_path):
    out = _run(f"""
        viewer = open_viewer({str(ball)!r}, size=(W, H), visible=False)
        s = viewer.session
        rest = np.array(s.vertices)
        send(viewer, "on_key_press", key._2, 0)               # twist
        drag(viewer, (W / 2, H / 2), (W / 2 + 60, H / 2))
        send(viewer, "on_key_press", key._1, 0)               # grab
        drag(viewer, (W / 2 - 20, H / 2 + 20), (W / 2 - 40, H / 2 + 60))
        two = np.array(s.vertices)
        send(viewer, "on_key_press", key.Z, key.MOD_CTRL)
        send(viewer, "on_key_press", key.Z, key.MOD_CTRL)
        back = np.array(s.vertices)
        send(viewer, "on_key_press", key.Z, key.MOD_CTRL | key.MOD_SHIFT)
        send(viewer, "on_key_press", key.Y, key.MOD_CTRL)
        again = np.array(s.vertices)
        np.savez({str(tmp_path / "undo.npz")!r}, rest=rest, two=two, back=back, again=again)
        print(json.dumps({{"kinds": [x["brush"] for x in s.history.applied],
                          "position": s.history.position}}))
    """)
    state = json.loads(out.strip().splitlines()[-1])
    assert state == {"kinds": ["twist", "grab"], "position": 2}
    a = np.load(tmp_path / "undo.npz")
    assert np.abs(a["two"] - a["rest"]).max() > 1e-3
    np.testing.assert_array_equal(a["back"], a["rest"])
    np.testing.assert_array_equal(a["again"], a["two"])


def test_journal_recovery_after_the_process_is_killed(ball, tmp_path):
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    ready = tmp_path / "ready.npy"
    body = PRELUDE + textwrap.dedent(f"""
        viewer = open_viewer({str(ball)!r}, size=(W, H), visible=False)
        drag(viewer, (W / 2, H / 2), (W / 2 + 40, H / 2 + 20))
        send(viewer, "on_key_press", key._3, 0)               # scale
        drag(viewer, (W / 2 - 30, H / 2 - 10), (W / 2 - 30, H / 2 + 40))
        send(viewer, "on_key_press", key._1, 0)
        drag(viewer, (W / 2 + 30, H / 2 - 30), (W / 2 + 50, H / 2 - 50))
        send(viewer, "on_key_press", key.Z, key.MOD_CTRL)     # the last grab is undone
        np.save({str(tmp_path / "state.npy")!r}, np.asarray(viewer.session.vertices))
        import os, threading
        os.replace({str(tmp_path / "state.npy")!r}, {str(ready)!r})
        print("ready", flush=True)
        threading.Event().wait()                              # killed here, mid-session
    """)
    proc = subprocess.Popen([sys.executable, "-c", body], cwd=ROOT, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        # Wait for the child's word (an event, however slow the machine), not a clock.
        line = proc.stdout.readline()
        assert line.strip() == "ready", proc.stderr.read()[-3000:]
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait()
    expected = np.load(ready)
    assert (tmp_path / "ball.obj.pliant-journal").exists()

    # recover=True replays at once; without it the journal is offered and Enter replays.
    out = _run(f"""
        viewer = open_viewer({str(ball)!r}, recover=True, size=(W, H), visible=False)
        np.save({str(tmp_path / "recovered.npy")!r}, np.asarray(viewer.session.vertices))
        print(json.dumps([viewer.session.history.position, len(viewer.session.history.strokes)]))
        offered = open_viewer({str(ball)!r}, size=(W, H), visible=False)
        before = offered.session.pending_recovery is not None
        send(offered, "on_key_press", key.ENTER, 0)
        np.save({str(tmp_path / "offered.npy")!r}, np.asarray(offered.session.vertices))
        print(json.dumps([before, offered.session.message]))
    """)
    lines = out.strip().splitlines()
    assert json.loads(lines[-2]) == [2, 3]  # two applied, the undone grab in the redo tail
    before, message = json.loads(lines[-1])
    assert before and message == "recovered 2 strokes"
    np.testing.assert_array_equal(np.load(tmp_path / "recovered.npy"), expected)
    np.testing.assert_array_equal(np.load(tmp_path / "offered.npy"), expected)


def test_window_draws_the_model_help_and_keeps_esc(ball):
    out = _run(f"""
        from viewer import palette
        viewer = open_viewer({str(ball)!r}, size=(W, H), visible=False)
        plain = frame(viewer)
        bg = np.round(np.array(palette.BACKGROUND) * 255)
        covered = float((np.abs(plain.astype(int) - bg).max(axis=2) > 3).mean())
        send(viewer, "on_key_press", key.F1, 0)
        helped = frame(viewer)
        changed = float((np.abs(helped.astype(int) - plain.astype(int)).max(axis=2) > 10).mean())
        send(viewer, "on_key_press", key.ESCAPE, 0)
        send(viewer, "on_key_press", key._4, 0)
        print(json.dumps({{"covered": covered, "help_changed": changed,
                          "closed": viewer.window.has_exit, "tool": viewer.session.tool,
                          "corner": plain[0, -1].tolist(), "bg": bg.tolist()}}))
    """)
    state = json.loads(out.strip().splitlines()[-1])
    assert state["covered"] > 0.1       # the model fills a good part of the window
    assert state["help_changed"] > 0.05  # the panel covers a visible area
    assert state["closed"] is False      # Esc cancels a stroke, it does not close the window
    assert state["tool"] == "pinch"
    assert state["corner"] == state["bg"]  # top-right corner: no model, no text


def test_no_mesh_opens_the_bundled_model_and_writes_only_to_the_current_folder(tmp_path):
    models = ROOT / "models"
    if not (models / "mascot.obj").is_file():
        pytest.skip("the bundled model models/mascot.obj is not in this checkout")
    before = sorted(os.listdir(models))
    out = _run("""
        viewer = open_viewer(None, size=(W, H), visible=False)
        s = viewer.session
        drag(viewer, (W / 2, H / 2), (W / 2 + 15, H / 2 + 15))
        send(viewer, "on_key_press", key.S, key.MOD_CTRL)
        print(json.dumps([len(s.rest), s.history.position, s.message]))
    """, cwd=tmp_path)
    n, position, message = json.loads(out.strip().splitlines()[-1])
    assert n > 1000 and position == 1
    assert sorted(os.listdir(models)) == before  # nothing written into the package
    assert (tmp_path / "mascot.obj.pliant-journal").is_file()
    assert (tmp_path / "mascot-recipe.json").is_file() and "mascot-recipe.json" in message


def test_without_a_display_the_viewer_says_so(ball):
    if os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY"):
        pytest.skip("a display is available here, so the no-display message cannot be provoked")
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    code = textwrap.dedent(f"""
        from viewer.app import ViewerError, open_viewer
        try:
            open_viewer({str(ball)!r}, visible=False)
        except ViewerError as exc:
            print("ViewerError:", exc)
    """)
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, env=env, capture_output=True,
                         text=True, timeout=HANG_GUARD)
    assert out.returncode == 0, out.stderr[-2000:]
    assert out.stdout.startswith("ViewerError: the viewer window cannot open")
    assert "pliant snapshot" in out.stdout


def test_bindings_markdown_lists_every_binding():
    from viewer.overlay import bindings_markdown
    from viewer.session import BINDINGS
    table = bindings_markdown(BINDINGS)
    assert table.count("\n") == len(BINDINGS) + 1
    plain = table.replace("\\<", "<").replace("\\>", ">")
    for key, _, description in BINDINGS:
        assert f"| `{key}` | {description} |" in plain


def test_run_as_the_command_does_survives_garbage_collection(ball):
    # `pliant view` calls viewer.app.run(), which must keep its window and handlers alive:
    # pyglet 2.1 holds both weakly (pyglet.app.windows is a WeakSet, pushed handlers are weak
    # methods). The probe runs inside run()'s event loop after a forced collection.
    out = _run(f"""
        import gc
        from viewer import app, palette
        result = {{}}

        def pixels(window):
            window.switch_to()
            window.dispatch_event("on_draw")
            data = pyglet.image.get_buffer_manager().get_color_buffer().get_image_data()
            rgba = np.frombuffer(data.get_data("RGBA", data.width * 4), np.uint8)
            return rgba.reshape(data.height, data.width, 4)[..., :3].astype(int)

        def probe(dt):
            gc.collect()
            windows = list(pyglet.app.windows)
            result["windows"] = len(windows)
            if windows:
                window = windows[0]
                bg = np.round(np.array(palette.BACKGROUND) * 255)
                plain = pixels(window)
                result["model"] = float((np.abs(plain - bg).max(axis=2) > 3).mean())
                window.dispatch_event("on_key_press", key.F1, 0)     # the help panel
                result["help"] = float((np.abs(pixels(window) - plain).max(axis=2) > 10).mean())
                window.dispatch_event("on_key_press", key.Q, key.MOD_CTRL)
                result["closed"] = bool(window.has_exit)
            if not result.get("closed"):
                pyglet.app.exit()   # the handlers are gone: stop the loop so the test can fail

        pyglet.clock.schedule_once(probe, 0.0)
        result["returned"] = app.run({str(ball)!r})
        print(json.dumps(result))
    """)
    result = json.loads(out.strip().splitlines()[-1])
    assert result["windows"] == 1            # the window outlived the collection
    assert result["model"] > 0.05            # a frame with the model in it was drawn
    assert result["help"] > 0.05             # F1 was handled: the help panel appeared
    assert result["closed"] is True and result["returned"] == 0  # Ctrl+Q closed it; run() returned


def _relative_luminance(rgb):
    """WCAG 2.1 relative luminance of 8-bit sRGB (written out here from the W3C definition)."""
    c = np.asarray(rgb, dtype=np.float64) / 255.0
    linear = np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)
    return linear @ np.array([0.2126, 0.7152, 0.0722])


def _contrast(a, b):
    hi, lo = sorted((_relative_luminance(a), _relative_luminance(b)), reverse=True)
    return (hi + 0.05) / (lo + 0.05)


def test_what_the_user_sees_pins_legend_turned_faces(tmp_path):
    # One picture after a first use: two pins, a saturated hold, a long grab beside it that
    # turns faces over, F2 on. Checked on the pixels, as a user would look at them.
    path = tmp_path / "ball4.obj"
    trimesh.creation.icosphere(subdivisions=4).export(path)
    out = _run(f"""
        from viewer import palette
        from viewer.app import PIN_PIXELS
        W, H = 640, 480
        viewer = open_viewer({str(path)!r}, size=(W, H), visible=False)
        s = viewer.session
        send(viewer, "on_key_press", key._6, 0)
        for _ in range(4):
            send(viewer, "on_mouse_press", W / 2, H / 2, mouse.LEFT, 0)
            send(viewer, "on_mouse_release", W / 2, H / 2, mouse.LEFT, 0)
        send(viewer, "on_key_press", key._5, 0)
        pin_at = (W / 2 - 60, H / 2 - 70)
        send(viewer, "on_mouse_press", *pin_at, mouse.LEFT, 0)
        send(viewer, "on_mouse_release", *pin_at, mouse.LEFT, 0)
        send(viewer, "on_key_press", key._1, 0)
        drag(viewer, (W / 2 + 40, H / 2), (W / 2 + 190, H / 2))
        send(viewer, "on_mouse_motion", 5, 5, 0, 0)           # cursor off the model: no ring
        warning = s.message                                   # before F2 says what it did
        send(viewer, "on_key_press", key.F2, 0)
        image = frame(viewer)
        pin = s.camera.project(s.pins[0], W, H)
        x, y, w, h = viewer.legend_box()
        print(json.dumps({{"flipped": s.status()["flipped"], "pin": pin.tolist(),
                          "legend": [x, y, w, h], "pin_pixels": PIN_PIXELS,
                          "message": warning, "status": viewer.status.text}}))
        np.save({str(tmp_path / "frame.npy")!r}, image)
    """)
    state = json.loads(out.strip().splitlines()[-1])
    image = np.load(tmp_path / "frame.npy").astype(int)
    height = image.shape[0]
    from viewer import palette
    bg = np.round(np.array(palette.BACKGROUND) * 255)

    # Turned faces: counted in the status line and tinted violet (blue and red above green).
    assert state["flipped"] > 0 and f"flipped faces {state['flipped']:,}" in state["status"]
    assert "by the mask" in state["message"]
    r, g, b = image[..., 0], image[..., 1], image[..., 2]
    violet = (b > g + 40) & (r > g + 20)
    assert violet.sum() > 30

    # Pins: a brass disc with a dark rim, at least PIN_PIXELS across where the pin projects.
    px, py = state["pin"][0], height - state["pin"][1]   # window y is up, image rows go down
    patch = image[int(py) - 12:int(py) + 13, int(px) - 12:int(px) + 13]
    brass = np.round(np.array(palette.PIN) * 255)
    disc = (np.abs(patch - brass).max(axis=2) < 40).sum()
    assert disc >= 0.6 * np.pi * (state["pin_pixels"] / 2) ** 2
    rim = (patch.max(axis=2) < 40).sum()
    assert rim > 20

    # Legend: the bar runs from the ramp's unmoved colour to its hottest colour.
    x, y, w, h = state["legend"]
    row = int(height - (y + h / 2))
    first = image[row, int(x) + 2]
    last = image[row, int(x + w) - 3]
    np.testing.assert_allclose(first, np.array(palette.RAMP[0][1]) * 255, atol=6)
    np.testing.assert_allclose(last, np.array(palette.RAMP[-1][1]) * 255, atol=6)

    # Unmoved, unheld surface in the F2 colours stands off the ground: WCAG 2.1 contrast
    # ratio (W3C formula, written out above) of the median model pixel far from the stroke
    # against the background is at least 3, the W3C minimum for graphics.
    left_half = image[:, : image.shape[1] // 2 - 80]
    model = left_half[np.abs(left_half - bg).max(axis=2) > 10]
    assert len(model) > 200
    assert _contrast(np.median(model, axis=0), bg) >= 3.0


def test_loading_bar_progress_lines_and_a_help_panel_that_leaves_the_model_visible(ball):
    out = _run(f"""
        import io, sys
        from viewer import palette
        from viewer.app import LoadingBar
        err, sys.stderr = sys.stderr, io.StringIO()
        viewer = open_viewer({str(ball)!r}, size=(640, 400), visible=False)
        printed, sys.stderr = sys.stderr.getvalue(), err
        W, H = 640, 400
        bg = np.round(np.array(palette.BACKGROUND) * 255)

        def model_mask(image):
            return np.abs(image.astype(int) - bg).max(axis=2) > 3

        bar = LoadingBar(viewer.window)
        bar.draw(0.5, "indexing the surface for picking")
        data = pyglet.image.get_buffer_manager().get_color_buffer().get_image_data()
        rgba = np.frombuffer(data.get_data("RGBA", data.width * 4), np.uint8)
        loading = rgba.reshape(data.height, data.width, 4)[::-1, :, :3].copy()
        box = bar.box()
        plain = frame(viewer)
        send(viewer, "on_key_press", key.F1, 0)
        helped = frame(viewer)
        p = viewer.panel
        np.save({str(ball.parent / "shots.npy")!r}, np.stack([loading, plain, helped]))
        print(json.dumps({{"printed": printed, "box": list(box),
                          "panel": [p.x, p.y, p.width, p.height]}}))
    """)
    state = json.loads(out.strip().splitlines()[-1])
    loading, plain, helped = np.load(ball.parent / "shots.npy").astype(int)
    height = loading.shape[0]
    from viewer import palette
    bg = np.round(np.array(palette.BACKGROUND) * 255)

    # The terminal got the bar, stage by stage, up to 100%.
    assert "pliant view: [" in state["printed"] and "100%  ready" in state["printed"]

    # The window's bar: filled (ring colour) on its left half, empty on its right half.
    x, y, w, h = state["box"]
    row = int(height - (y + h / 2))
    fill = np.round(np.array(palette.BRUSH_RING) * 255)
    assert np.abs(loading[row, int(x + 0.25 * w)] - fill).max() <= 2
    assert np.abs(loading[row, int(x + 0.75 * w)] - fill).max() > 40

    # With the help panel open the model slides clear of it: about as many model pixels are
    # seen outside the panel as without the panel, and the panel covers next to none.
    def model(image):
        return np.abs(image - bg).max(axis=2) > 3

    px, py, pw, ph = state["panel"]
    top, bottom = int(height - (py + ph)), int(height - py)
    inside = np.zeros(plain.shape[:2], bool)
    inside[top:bottom, int(px):int(px + pw)] = True
    seen_plain = model(plain).sum()
    seen_helped = (model(helped) & ~inside).sum()
    assert seen_helped >= 0.9 * seen_plain
