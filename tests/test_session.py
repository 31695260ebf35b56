"""viewer.session: the viewer's interaction state driven by events, without a window."""

import math

import numpy as np
import pytest
import trimesh

from viewer import session as session_module
from viewer.session import (BINDINGS, LEFT, MOD_CTRL, MOD_SHIFT, MOUSE_ACTIONS, RIGHT,
                            Session, chord)

W, H = 640, 480


@pytest.fixture
def sphere():
    mesh = trimesh.creation.icosphere(subdivisions=3)
    return np.asarray(mesh.vertices), np.asarray(mesh.faces)


@pytest.fixture
def session(sphere, tmp_path):
    return Session(*sphere, size=(W, H), out_dir=tmp_path)


def test_bindings_table_is_consistent(session):
    keys = [k for k, _, _ in BINDINGS]
    assert len(keys) == len(set(keys)), "a key is bound twice"
    assert MOUSE_ACTIONS == {"stroke", "orbit", "pan", "zoom", "radius"}
    runnable = session.actions()
    for key, action, description in BINDINGS:
        assert description
        if action not in MOUSE_ACTIONS:
            assert action in runnable, action
    # Every registered tool is selected by a key of the table.
    assert {f"tool_{name}" for name in session.tools} <= {a for _, a, _ in BINDINGS}
    # House rule: no bare letter keys (the big suites' single-letter transform shortcuts).
    assert not [k for k in keys if len(k) == 1 and k.isalpha()]


def test_volume_of_the_loaded_mesh_matches_trimesh(tmp_path):
    # Reference: trimesh.Trimesh.volume (its own mass-properties integration).
    for mesh in (trimesh.creation.icosphere(subdivisions=3), trimesh.creation.box([1, 2, 3]),
                 trimesh.creation.capsule(height=1.0, radius=0.3)):
        s = Session(mesh.vertices, mesh.faces, size=(W, H), out_dir=tmp_path)
        assert s.volume_rest == pytest.approx(mesh.volume, rel=1e-12)
    # Hand case: the unit cube has volume 1 wherever it sits.
    cube = trimesh.creation.box([1, 1, 1])
    s = Session(cube.vertices + 5.0, cube.faces, size=(W, H), out_dir=tmp_path)
    assert s.volume_rest == pytest.approx(1.0)
    with pytest.raises(ValueError, match="^vertices"):
        Session(np.zeros((3, 2)), [[0, 1, 2]])


def test_key_settings(session):
    r = session.radius
    assert session.key("PERIOD") == "radius_up"
    assert session.radius == pytest.approx(1.25 * r)
    session.key("COMMA")
    assert session.radius == pytest.approx(r)
    assert session.falloff == "wide"
    session.key("SEMICOLON")
    session.key("SEMICOLON")
    assert session.falloff == "tight"
    session.key("SEMICOLON")
    assert session.falloff == "wide"
    # Poisson's ratio is per brush and stays within [0, 0.5].
    session.key("_3")
    assert session.tool == "scale" and session.status()["poisson"] == pytest.approx(0.3)
    session.key("EQUAL")
    assert session.poisson["scale"] == pytest.approx(0.35)
    session.key("_1")
    session.key("EQUAL")
    assert session.poisson["grab"] == pytest.approx(0.5)
    for _ in range(20):
        session.key("MINUS")
    assert session.poisson["grab"] == pytest.approx(0.0)
    assert session.mirror_plane() is None
    session.key("BACKSLASH")
    normal, point = session.mirror_plane()
    np.testing.assert_array_equal(normal, [1, 0, 0])
    session.key("SLASH")
    np.testing.assert_array_equal(session.mirror_plane()[0], [0, 1, 0])
    assert session.key("F1") == "help_toggle" and session.show_help
    assert session.key("F2") == "overlay_toggle" and session.show_magnitude
    assert session.key("Q") is None  # unbound


def test_camera_drags_and_wheel(session):
    cam = session.camera
    yaw, pitch = cam.yaw, cam.pitch
    session.press(5, 5, RIGHT)
    session.drag(15, 5, 10, 0, RIGHT)
    session.release(15, 5, RIGHT)
    # viewer.camera documents orbit(dx, dy): yaw decreases by 0.01 rad per window unit.
    assert cam.yaw == pytest.approx((yaw - 0.1) % (2 * math.pi))
    assert cam.pitch == pytest.approx(pitch)
    target = cam.target.copy()
    session.press(5, 5, RIGHT, MOD_CTRL)
    session.drag(5, 25, 0, 20, RIGHT, MOD_CTRL)
    session.release(5, 25, RIGHT, MOD_CTRL)
    shift = cam.target - target
    assert np.linalg.norm(shift) > 0
    np.testing.assert_allclose(shift / np.linalg.norm(shift), -cam.up(), atol=1e-12)
    d = cam.distance
    session.scroll(0, 0, 2)
    assert cam.distance == pytest.approx(d / 1.1**2)
    r = session.radius
    session.scroll(0, 0, 1, MOD_SHIFT)
    assert session.radius == pytest.approx(1.1 * r) and cam.distance == pytest.approx(d / 1.1**2)


def test_left_drag_off_the_model_orbits(session):
    yaw = session.camera.yaw
    assert not session.pick(2, 2).hit
    session.press(2, 2, LEFT)
    session.drag(12, 2, 10, 0, LEFT)
    session.release(12, 2, LEFT)
    assert session.camera.yaw != yaw
    assert session.history.position == 0


def test_pick_agrees_with_trimesh_ray(session, sphere):
    # Reference: trimesh's ray-mesh intersector on the same camera ray.
    mesh = trimesh.Trimesh(*sphere, process=False)
    origin, direction = session.camera.ray(W / 2 + 40, H / 2 - 30, W, H)
    points, _, _ = mesh.ray.intersects_location([origin], [direction])
    nearest = points[np.argmin(np.linalg.norm(points - origin, axis=1))]
    hit = session.pick(W / 2 + 40, H / 2 - 30)
    assert hit.hit
    np.testing.assert_allclose(hit.point, nearest, atol=1e-9)


def test_pins_are_placed_and_removed_by_clicking(session):
    session.key("_5")
    x, y = W / 2 + 20, H / 2 + 10
    session.press(x, y, LEFT)
    session.release(x, y, LEFT)
    assert len(session.pins) == 1
    np.testing.assert_allclose(session.pins[0], session.pick(x, y).point)
    # A second click within a few pixels of the pin's screen position removes it.
    session.press(x + 3, y - 2, LEFT)
    session.release(x + 3, y - 2, LEFT)
    assert session.pins == []
    session.press(x, y, LEFT)
    session.key("DELETE")
    assert session.pins == []


def test_mask_painting_and_erasing(session, sphere):
    vertices = sphere[0]
    session.key("_6")
    x, y = W / 2, H / 2
    point = session.pick(x, y).point
    session.press(x, y, LEFT)
    session.release(x, y, LEFT)
    d = np.linalg.norm(vertices - point, axis=1)
    inside, outside = d < 0.5 * session.radius, d > session.radius
    assert inside.any()
    # One paint event: hold = 0.5 * (1 - (d/r)^2)^2 (the documented bump) inside the radius.
    expected = 0.5 * (1 - (d[inside] / session.radius) ** 2) ** 2
    np.testing.assert_allclose(session.hold[inside], expected, rtol=1e-12)
    assert np.all(session.hold[outside] == 0)
    session.press(x, y, LEFT, MOD_SHIFT)
    session.release(x, y, LEFT, MOD_SHIFT)
    assert np.all(session.hold == 0)
    session.press(x, y, LEFT)
    session.release(x, y, LEFT)
    session.key("DELETE", MOD_SHIFT)
    assert np.all(session.hold == 0)


def test_undo_and_redo_with_empty_history_only_say_so(session):
    assert session.key("Z", MOD_CTRL) == "undo"
    assert session.message == "nothing to undo"
    session.key("Y", MOD_CTRL)
    assert session.message == "nothing to redo"


def test_frame_all_and_status(session):
    session.camera.zoom(5.0)
    session.key("HOME")
    status = session.status()
    assert status["vertices"] == 642 and status["strokes"] == 0
    assert status["volume_change"] == pytest.approx(0.0)
    # Frame all fits the bounding box (viewer.camera.frame's rule): every corner of the box is
    # in the window and the outermost sits on the 5% margin.
    lo, hi = session.rest.min(axis=0), session.rest.max(axis=0)
    corners = np.array([[x, y, z] for x in (lo[0], hi[0]) for y in (lo[1], hi[1]) for z in (lo[2], hi[2])])
    xy = session.camera.project(corners, W, H)
    half = np.array([W, H]) / 2
    assert (np.abs(xy - half) / half).max() == pytest.approx(1 / 1.05, rel=1e-6)


def test_no_mesh_file_means_no_journal(session):
    assert session.journal is None and session.pending_recovery is None


def test_bad_input(sphere):
    with pytest.raises(ValueError, match="^vertices"):
        Session(np.zeros((0, 3)), sphere[1])
    with pytest.raises(ValueError, match="^faces"):
        Session(sphere[0], np.zeros((0, 3), int))


def test_sphere_fallback_is_closed():
    v, f = session_module.sphere_mesh(2)
    assert trimesh.Trimesh(v, f, process=False).is_watertight


# ---------------------------------------------------------------------------- strokes

def _drag(session, start, end, steps=4, modifiers=0):
    (x0, y0), (x1, y1) = start, end
    session.press(x0, y0, LEFT, modifiers)
    px, py = x0, y0
    for i in range(1, steps + 1):
        x, y = x0 + (x1 - x0) * i / steps, y0 + (y1 - y0) * i / steps
        session.drag(x, y, x - px, y - py, LEFT, modifiers)
        px, py = x, y


def _mirror_map(vertices, axis=0):
    """Index of each vertex's mirror image across the plane x_axis = 0 (by nearest point)."""
    from scipy.spatial import cKDTree
    reflected = vertices.copy()
    reflected[:, axis] *= -1
    distance, index = cKDTree(vertices).query(reflected)
    assert distance.max() < 1e-9  # the mesh is symmetric
    return index


def _paint_hold(session, x, y, dabs=2):
    session.key("_6")
    for _ in range(dabs):
        session.press(x, y, LEFT)
        session.release(x, y, LEFT)


@pytest.mark.parametrize("tool, falloff, extras", [
    ("_1", "wide", ()), ("_1", "tight", ("mask",)), ("_2", "medium", ()),
    ("_3", "wide", ("pins",)), ("_4", "tight", ("mirror",)),
    ("_1", "wide", ("pins", "mask", "mirror")), ("_2", "wide", ("pins", "mask", "mirror")),
    ("_3", "medium", ("mask", "mirror")), ("_4", "wide", ("pins", "mask")),
])
def test_the_last_preview_is_the_committed_stroke(session, sphere, tool, falloff, extras):
    # What the user saw before letting go is what is committed, to 1e-6 of the motion, for
    # every brush with pins, mask and mirror. Reference: the recipe's own replay
    # (brushes.recipe.apply_stroke) of the recorded stroke on the rest mesh.
    from brushes.recipe import apply_stroke
    if "mask" in extras:
        _paint_hold(session, W / 2 - 40, H / 2 + 30)
    if "pins" in extras:
        session.key("_5")
        session.press(W / 2 - 70, H / 2 - 50, LEFT)
        session.release(W / 2 - 70, H / 2 - 50, LEFT)
        assert len(session.pins) == 1
    if "mirror" in extras:
        session.key("BACKSLASH")
    session.key(tool)
    while session.falloff != falloff:
        session.key("SEMICOLON")
    end = (W / 2 + 45, H / 2 + 35)
    _drag(session, (W / 2 + 15, H / 2 + 5), end, steps=5)
    session.settle()
    preview = session.shown().copy()
    session.release(*end, LEFT)
    committed = np.asarray(session.vertices)
    (stroke,) = session.history.applied
    for key in extras:
        assert key in stroke
    replay = apply_stroke(sphere[0], stroke)
    motion = np.abs(replay - sphere[0]).max()
    assert motion > 1e-3
    assert np.abs(preview - replay).max() <= 1e-6 * motion
    np.testing.assert_array_equal(committed, replay)
    np.testing.assert_array_equal(session.shown(), committed)


@pytest.mark.parametrize("tool", ["_5", "_6"])
def test_pin_and_mask_tools_change_no_vertices(session, sphere, tool):
    # The other tools have no shape preview: a press, drag and release leaves the shape as it
    # was, shown and committed alike.
    session.key(tool)
    _drag(session, (W / 2, H / 2), (W / 2 + 30, H / 2 + 10), steps=3)
    session.release(W / 2 + 30, H / 2 + 10, LEFT)
    np.testing.assert_array_equal(session.shown(), sphere[0])
    np.testing.assert_array_equal(session.vertices, sphere[0])
    assert session.history.position == 0


def test_a_threaded_preview_drops_stale_requests_and_commits_the_last(sphere, tmp_path):
    # Requests arrive faster than the worker computes: those not started when a newer one
    # comes are dropped, and release waits (on the worker's condition) for its own position.
    from brushes.recipe import apply_stroke
    session = Session(*sphere, size=(W, H), out_dir=tmp_path, threaded=True)
    try:
        _drag(session, (W / 2, H / 2), (W / 2 + 40, H / 2 + 20), steps=25)
        session.release(W / 2 + 40, H / 2 + 20, LEFT)
        workers = session.previews
        # 25 drag events, and release at the last one's position reuses its request.
        assert workers.submitted == 25
        assert workers.computed + workers.dropped == workers.submitted
        (stroke,) = session.history.applied
        np.testing.assert_array_equal(session.vertices, apply_stroke(sphere[0], stroke))
    finally:
        session.close()


def test_release_commits_exactly_the_recipe_stroke(session, sphere):
    from brushes.recipe import apply_stroke, load_recipe
    _drag(session, (W / 2, H / 2), (W / 2 + 30, H / 2 - 20))
    preview = session.shown().copy()
    session.release(W / 2 + 30, H / 2 - 20, LEFT)
    stroke = session.history.applied[0]
    assert stroke["brush"] == "grab" and stroke.get("flow", True) is True
    expected = apply_stroke(sphere[0], stroke)
    np.testing.assert_array_equal(session.vertices, expected)
    np.testing.assert_array_equal(session.shown(), expected)
    np.testing.assert_array_equal(preview, expected)  # what was shown is what was committed
    assert session.key("S", MOD_CTRL) == "save_recipe"
    path = session.message.split(": ", 1)[1]
    np.testing.assert_array_equal(load_recipe(path).apply(sphere[0]), expected)
    # Reference: trimesh's volumes of the posed and rest meshes.
    assert session.status()["volume_change"] == pytest.approx(
        trimesh.Trimesh(expected, sphere[1], process=False).volume
        / trimesh.Trimesh(*sphere, process=False).volume - 1, abs=1e-12)


def test_click_without_motion_and_cancel_make_no_stroke(session, sphere):
    session.press(W / 2, H / 2, LEFT)
    session.release(W / 2, H / 2, LEFT)
    _drag(session, (W / 2, H / 2), (W / 2 + 30, H / 2))
    session.key("ESCAPE")
    session.release(W / 2 + 30, H / 2, LEFT)
    assert session.history.position == 0
    np.testing.assert_array_equal(session.shown(), sphere[0])


def test_mirrored_stroke_is_symmetric(session, sphere):
    # The icosphere is symmetric across x = 0; a mirrored stroke must keep it so.
    index = _mirror_map(sphere[0])
    session.key("BACKSLASH")
    _drag(session, (W / 2 + 40, H / 2), (W / 2 + 70, H / 2 + 20))
    preview = session.shown().copy()
    session.release(W / 2 + 70, H / 2 + 20, LEFT)
    assert session.history.applied[0]["mirror"] == {"normal": [1.0, 0.0, 0.0],
                                                    "point": [0.0, 0.0, 0.0]}
    for positions in (preview, np.asarray(session.vertices)):
        reflected = positions[index] * [-1, 1, 1]
        np.testing.assert_allclose(positions, reflected, atol=1e-9)
        assert np.abs(positions - sphere[0]).max() > 1e-3


def test_masked_vertices_stay_and_pins_go_into_the_stroke(session, sphere):
    vertices = sphere[0]
    session.key("_6")
    for _ in range(4):  # paint the hold up to 1 around the middle of the view
        session.press(W / 2, H / 2, LEFT)
        session.release(W / 2, H / 2, LEFT)
    held = session.hold >= 1.0
    assert held.sum() >= 3
    session.key("_5")
    session.press(W / 2 - 60, H / 2 + 40, LEFT)
    session.release(W / 2 - 60, H / 2 + 40, LEFT)
    pin = session.pins[0].tolist()
    session.key("_1")
    _drag(session, (W / 2 + 20, H / 2 + 10), (W / 2 + 60, H / 2 + 30))
    session.release(W / 2 + 60, H / 2 + 30, LEFT)
    stroke = session.history.applied[0]
    assert stroke["pins"] == [pin]
    np.testing.assert_allclose(stroke["mask"]["weights"], 1 - session.hold)
    moved = np.linalg.norm(np.asarray(session.vertices) - vertices, axis=1)
    assert moved[held].max() == 0.0  # brushes scale motion by the mask: weight 0 holds still
    assert moved.max() > 1e-3


def test_exports_use_the_command_writers(session, sphere, tmp_path):
    # Read back: the .npz through the project's apply_delta, the .glb's JSON chunk by the
    # glTF 2.0 binary layout (12-byte header, then a length/type-prefixed JSON chunk).
    import json
    import struct
    from brushes.correctives import apply_delta
    from brushes.formats import load_mesh
    _drag(session, (W / 2, H / 2), (W / 2 + 25, H / 2 + 25))
    session.release(W / 2 + 25, H / 2 + 25, LEFT)
    posed = np.asarray(session.vertices)
    assert session.key("D", MOD_CTRL) == "export_delta"
    assert session.message.startswith("corrective shape written")
    np.testing.assert_allclose(apply_delta(sphere[0], tmp_path / "sphere-pose.npz"), posed,
                               atol=1e-6)  # the deltas are stored as float32
    data = (tmp_path / "sphere-pose.glb").read_bytes()
    magic, version, _ = struct.unpack_from("<4sII", data, 0)
    length, kind = struct.unpack_from("<I4s", data, 12)
    assert (magic, version, kind) == (b"glTF", 2, b"JSON")
    gltf = json.loads(data[20:20 + length])
    (primitive,) = gltf["meshes"][0]["primitives"]
    (target,) = primitive["targets"]
    assert gltf["accessors"][target["POSITION"]]["count"] == len(sphere[0])
    assert session.key("E", MOD_CTRL) == "export_mesh"
    np.testing.assert_allclose(load_mesh(tmp_path / "sphere-posed.obj").vertices, posed, atol=1e-6)


def test_settings_changed_mid_drag_apply_to_the_next_stroke(session):
    r = session.radius
    _drag(session, (W / 2, H / 2), (W / 2 + 20, H / 2))
    session.scroll(0, 0, 3, MOD_SHIFT)
    session.key("SEMICOLON")
    session.drag(W / 2 + 30, H / 2, 10, 0, LEFT)
    session.release(W / 2 + 30, H / 2, LEFT)
    stroke = session.history.applied[0]
    assert stroke["radius"] == r and stroke["falloff"] == "wide"
    assert session.radius == pytest.approx(r * 1.1**3) and session.falloff == "medium"


# ---------------------------------------------------------------------------- first-use fixes

class FakeClock:
    """A clock the test moves by hand (no waiting)."""

    def __init__(self):
        self.now = 100.0

    def __call__(self):
        return self.now


def _click(session, x, y, modifiers=0):
    session.press(x, y, LEFT, modifiers)
    session.release(x, y, LEFT, modifiers)


def test_turned_faces_are_counted_flagged_and_blamed_on_the_mask(sphere, tmp_path):
    # A saturated hold in the middle of the view and a long grab beside it: the masked blend
    # x + w (phi(x) - x) turns faces over where w changes. Reference for the count: trimesh's
    # face normals of the rest and committed meshes (dot < 0: turned more than 90 degrees).
    mesh = trimesh.creation.icosphere(subdivisions=4)
    session = Session(mesh.vertices, mesh.faces, size=(W, H), out_dir=tmp_path)
    session.key("_6")
    for _ in range(4):
        _click(session, W / 2, H / 2)
    session.key("_1")
    _drag(session, (W / 2 + 40, H / 2), (W / 2 + 190, H / 2), steps=6)
    session.release(W / 2 + 190, H / 2, LEFT)
    posed = trimesh.Trimesh(np.asarray(session.vertices), mesh.faces, process=False)
    turned = np.einsum("ij,ij->i", mesh.face_normals, posed.face_normals) < 0
    assert turned.sum() > 0
    np.testing.assert_array_equal(session.flipped, turned)
    assert session.status()["flipped"] == turned.sum()
    assert "flipped faces " + f"{turned.sum():,}" in "\n".join(
        __import__("viewer.overlay", fromlist=["x"]).status_lines(session.status()))
    assert "by the mask" in session.message and "weight changes" in session.message
    flags = session.fold_flags()
    assert set(np.flatnonzero(flags)) == set(mesh.faces[turned].ravel())
    # The same stroke without the mask turns fewer faces (here none): the blame is right.
    from brushes.recipe import apply_stroke
    plain = {k: v for k, v in session.history.applied[0].items() if k != "mask"}
    unmasked = trimesh.Trimesh(apply_stroke(mesh.vertices, plain), mesh.faces, process=False)
    assert (np.einsum("ij,ij->i", mesh.face_normals, unmasked.face_normals) < 0).sum() < turned.sum()
    session.key("Z", MOD_CTRL)
    assert session.status()["flipped"] == 0 and not session.fold_flags().any()


def _two_balls():
    """A unit ball at the origin and a second one behind it along -z (hidden from +z)."""
    a = trimesh.creation.icosphere(subdivisions=3)
    b = trimesh.creation.icosphere(subdivisions=3)
    b.vertices = b.vertices + [0, 0, -2.2]
    vertices = np.vstack([a.vertices, b.vertices])
    faces = np.vstack([a.faces, b.faces + len(a.vertices)])
    return vertices, faces, len(a.vertices)


def test_mask_paints_only_the_surface_seen_around_the_cursor(tmp_path):
    vertices, faces, n_front = _two_balls()
    session = Session(vertices, faces, size=(W, H), out_dir=tmp_path)
    session.camera.yaw, session.camera.pitch = 0.0, 0.0   # looking down -z at the front ball
    session.radius = 4.0                                  # reaches the hidden ball and the back
    session.key("_6")
    hit = session.pick(W / 2, H / 2)
    assert hit.hit and hit.face < len(trimesh.creation.icosphere(subdivisions=3).faces)
    _click(session, W / 2, H / 2)
    held = session.hold > 0
    front = np.zeros(len(vertices), bool)
    front[:n_front] = True
    # Hand-checked geometry: the camera sits on +z, so the front ball's vertices with z > 0
    # face it; nothing of the ball behind and nothing of the far side may be painted.
    assert held[:n_front][vertices[:n_front, 2] > 0.2].all()
    assert not held[~front].any()
    assert not held[:n_front][vertices[:n_front, 2] < -0.2].any()


def test_twist_drag_of_an_eighth_of_the_window_turns_22_5_degrees(session, sphere):
    # The gesture rule (viewer.gesture.twist): 180 degrees per window width, so an eighth of
    # the window turns 22.5 degrees, not the 80 a fixed half degree per pixel gave.
    session.key("_2")
    _drag(session, (W / 2, H / 2), (W / 2 + W / 8, H / 2))
    session.release(W / 2 + W / 8, H / 2, LEFT)
    stroke = session.history.applied[0]
    assert stroke["degrees"] == pytest.approx(22.5)
    np.testing.assert_allclose(stroke["axis"], session.camera.view_axis(), atol=1e-12)
    # What the user sees: the surface right at the centre turns by that angle. Reference:
    # scipy's Rotation about the recorded axis applied to the point's offset from the centre
    # (the twist's core turns rigidly, the engine's documented guarantee).
    from scipy.spatial.transform import Rotation
    center = np.array(stroke["center"])
    offsets = sphere[0] - center
    k = int(np.argmin(np.linalg.norm(offsets, axis=1)))
    turned = Rotation.from_rotvec(np.radians(22.5) * np.array(stroke["axis"])).apply(offsets[k])
    moved = np.asarray(session.vertices)[k] - center
    assert np.linalg.norm(offsets[k]) < 0.2 * stroke["radius"]
    np.testing.assert_allclose(moved, turned, atol=0.02 * np.linalg.norm(offsets[k]))


def test_brush_ring_follows_the_surface_after_undo(session):
    edge = W / 2
    while session.pick(edge, H / 2).hit:  # the ball's right rim on screen, at rest
        edge += 1
    x, y = edge + 15, H / 2
    _drag(session, (edge - 10, H / 2), (edge + 70, H / 2), steps=6)
    session.release(edge + 70, H / 2, LEFT)
    session.motion(x, y)
    assert session.hover is not None  # the pulled-out surface is under the cursor
    session.key("Z", MOD_CTRL)
    expected = session.pick(x, y)
    assert not expected.hit  # back at rest, nothing is under the cursor there
    assert session.hover is None and session.brush_outline() is None


def test_mirror_ring_sits_on_the_body(tmp_path):
    # A ball off the mirror plane: the reflection of a point on it lies in empty space.
    mesh = trimesh.creation.icosphere(subdivisions=3)
    shifted = mesh.vertices + [1.6, 0, 0]
    session = Session(shifted, mesh.faces, size=(W, H), out_dir=tmp_path)
    session.key("BACKSLASH")
    session.motion(W / 2, H / 2)
    assert session.hover is not None
    assert session.mirror_outline() is None  # nothing of the body within reach of the twin
    symmetric = Session(mesh.vertices, mesh.faces, size=(W, H), out_dir=tmp_path)
    symmetric.key("BACKSLASH")
    symmetric.motion(W / 2 + 40, H / 2 + 20)
    center, radius = symmetric.brush_outline()
    twin, twin_radius = symmetric.mirror_outline()
    # On the symmetric ball the twin is the reflected point, up to the vertex spacing, and
    # it lies on the surface (a vertex of the mesh).
    assert np.min(np.linalg.norm(mesh.vertices - twin, axis=1)) == 0.0
    assert np.linalg.norm(twin - center * [-1, 1, 1]) < 0.2 and twin_radius == radius


def test_messages_clear_and_questions_stay(sphere, tmp_path):
    clock = FakeClock()
    session = Session(*sphere, size=(W, H), out_dir=tmp_path, clock=clock)
    session.key("Z", MOD_CTRL)
    assert session.status()["message"] == "nothing to undo"
    clock.now += 7.9
    assert session.status()["message"] == "nothing to undo"
    clock.now += 0.2
    assert session.status()["message"] == ""
    session.say("answer me", sticky=True)
    clock.now += 1000
    assert session.message == "answer me"


def _journalled(tmp_path, sphere, **kwargs):
    path = tmp_path / "ball.obj"
    trimesh.Trimesh(*sphere, process=False).export(path)
    return Session(*sphere, size=(W, H), mesh_path=path, **kwargs), path


def test_a_normal_close_is_not_called_interrupted_later(sphere, tmp_path):
    from viewer.journal import ended_cleanly, find_journal, read_events
    session, path = _journalled(tmp_path, sphere)
    _drag(session, (W / 2, H / 2), (W / 2 + 30, H / 2))
    session.release(W / 2 + 30, H / 2, LEFT)
    session.key("Q", MOD_CTRL)
    session.close()
    session.close()  # twice is harmless
    events = read_events(find_journal(path))[1]
    assert [e["event"] for e in events] == ["stroke", "closed"] and ended_cleanly(events)
    again, _ = _journalled(tmp_path, sphere)
    assert "closed without saving a recipe" in again.message
    assert "interrupted" not in again.message


def test_a_stray_drag_at_the_recovery_question_keeps_the_strokes(sphere, tmp_path):
    from viewer.journal import find_journal, read_journal
    session, path = _journalled(tmp_path, sphere)
    _drag(session, (W / 2, H / 2), (W / 2 + 30, H / 2))
    session.release(W / 2 + 30, H / 2, LEFT)
    saved = read_journal(find_journal(path))
    # The process dies here (no close). The next start asks; a drag does not answer.
    again, _ = _journalled(tmp_path, sphere)
    assert "interrupted" in again.message and again.pending_recovery is not None
    _drag(again, (W / 2 - 20, H / 2), (W / 2 + 20, H / 2 + 30))
    again.release(W / 2 + 20, H / 2 + 30, LEFT)
    assert again.history.position == 0 and again.message.startswith("answer first")
    assert read_journal(find_journal(path)) == saved
    assert again.key("RETURN") == "recover" and again.history.position == 1
    np.testing.assert_array_equal(again.vertices, session.vertices)


def _symbol(chord_name):
    """pyglet symbol name and modifier bits of a binding's chord (the inverse of chord())."""
    names = {",": "COMMA", ".": "PERIOD", ";": "SEMICOLON", "-": "MINUS", "=": "EQUAL",
             "\\": "BACKSLASH", "/": "SLASH", "Home": "HOME", "Delete": "DELETE", "Esc": "ESCAPE",
             "Enter": "RETURN", "Backspace": "BACKSPACE"}
    *mods, key = chord_name.split("+")
    bits = (MOD_CTRL if "Ctrl" in mods else 0) | (MOD_SHIFT if "Shift" in mods else 0)
    symbol = names.get(key, f"_{key}" if key.isdigit() else key)
    assert chord(symbol, bits) == chord_name
    return symbol, bits


def test_every_key_does_something_the_user_can_see(session):
    # A key that changes nothing on screen reads as broken: each binding (Ctrl+Q closes the
    # window, which the window does) changes the status the overlay shows or a display flag.
    from viewer.overlay import status_lines

    def seen():
        return (status_lines(session.status()), session.show_help, session.show_magnitude,
                session.camera.distance, tuple(session.camera.target))

    for key, action, _ in BINDINGS:
        if action in MOUSE_ACTIONS or action == "quit":
            continue
        symbol, bits = _symbol(key)
        session.say("")
        before = seen()
        assert session.key(symbol, bits) == action
        assert seen() != before, key


def test_the_mirror_ring_follows_the_stroke_not_a_key_pressed_mid_drag(session):
    _drag(session, (W / 2 + 40, H / 2), (W / 2 + 60, H / 2))
    session.key("BACKSLASH")               # mirror on for the next stroke
    assert session.mirror_outline() is None  # this stroke has no mirror
    session.release(W / 2 + 60, H / 2, LEFT)
    assert "mirror" not in session.history.applied[0]
    session.motion(W / 2 + 40, H / 2)
    assert session.mirror_outline() is not None
