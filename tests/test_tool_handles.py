"""viewer.tools.handles: placing handles, dragging one while the others hold, turning one, undo,
the journal, the help panel; driven through the Session without a window."""

import numpy as np
import pytest
import trimesh

import brushes
from brushes.recipe import Stroke
from viewer.session import BINDINGS, LEFT, MOD_SHIFT, Session

W, H = 640, 480


@pytest.fixture
def sphere():
    mesh = trimesh.creation.icosphere(subdivisions=3)
    return np.asarray(mesh.vertices), np.asarray(mesh.faces)


@pytest.fixture
def session(sphere, tmp_path):
    s = Session(*sphere, size=(W, H), out_dir=tmp_path)
    s.key("_7")
    assert s.tool == "handles"
    return s


def screen(session, point):
    xy = session.camera.project(np.asarray([point], dtype=np.float64), session.width, session.height)[0]
    return float(xy[0]), float(xy[1])


def place(session, x, y):
    session.press(x, y, LEFT)
    session.release(x, y, LEFT)


def test_clicks_place_handles_on_the_surface(session):
    tool = session.tools["handles"]
    place(session, W / 2, H / 2)
    place(session, W / 2 + 60, H / 2 + 40)
    assert len(tool.centers) == 2
    # each handle lies on the unit sphere's surface (icosphere vertices are on it; faces within
    # the chord sag, 1 - cos(half the edge angle) < 0.01 at subdivision 3)
    for c in tool.centers:
        assert 0.98 < np.linalg.norm(c) <= 1.0 + 1e-9
    assert len(tool.markers(session)) == 2
    assert session.history.position == 0  # placing handles is not a stroke
    assert session.key("END") == "handles_clear" and tool.markers(session) is None


def test_dragging_one_handle_commits_one_stroke_that_replays(session, sphere):
    tool = session.tools["handles"]
    place(session, W / 2, H / 2)
    place(session, W / 2 + 90, H / 2 - 70)
    held = tool.centers[1].copy()
    x, y = screen(session, tool.centers[0])
    session.press(x, y, LEFT)
    session.drag(x + 40, y + 25, 40, 25, LEFT)
    preview = session.shown().copy()
    session.release(x + 40, y + 25, LEFT)
    assert session.history.position == 1
    committed = np.asarray(session.history.points)
    motion = np.abs(committed - sphere[0]).max()
    # the last preview is the committed result (issue 9: release changes nothing)
    assert np.abs(preview - committed).max() <= 1e-6 * motion
    stroke = session.recipe().strokes[-1]
    assert stroke.kind == "handles"
    # the recorded stroke replays exactly through the engine's own API
    replay = Stroke.from_brush(stroke.brush()).apply(sphere[0]) if stroke.pins is None else None
    np.testing.assert_allclose(replay, committed, rtol=0, atol=1e-12)
    moves = np.asarray(stroke.params["moves"])
    assert np.linalg.norm(moves[0]) > 0 and not np.any(moves[1])
    # the held handle's material point did not move: the nearest vertex to it stays put to
    # within the flow's accuracy (definition of a zero-move handle)
    i = int(np.argmin(np.linalg.norm(sphere[0] - held, axis=1)))
    d = np.linalg.norm(committed[i] - sphere[0][i])
    assert d < 0.05 * np.linalg.norm(moves[0])
    # the dragged handle now sits at its target
    np.testing.assert_allclose(tool.centers[0], np.asarray(stroke.params["centers"][0]) + moves[0])


def test_shift_drag_turns_the_handle(session):
    tool = session.tools["handles"]
    place(session, W / 2, H / 2)
    place(session, W / 2 + 100, H / 2)
    x, y = screen(session, tool.centers[0])
    session.press(x, y, LEFT, MOD_SHIFT)
    session.drag(x + W / 8, y, W / 8, 0, LEFT, MOD_SHIFT)
    session.release(x + W / 8, y, LEFT, MOD_SHIFT)
    stroke = session.recipe().strokes[-1]
    rotations = np.asarray(stroke.params["rotations"])
    # an eighth of the window turns 22.5 degrees (the twist gesture's rate, 180 per width)
    assert np.linalg.norm(rotations[0]) == pytest.approx(22.5, rel=1e-9)
    assert not np.any(rotations[1]) and not np.any(stroke.params["moves"])
    # the skew part of the committed field's Jacobian at the handle is that rotation
    # (definition of the handle target; checked on the brush the stroke records)
    brush = stroke.brush()
    J = brush.jacobian(np.asarray(stroke.params["centers"][:1]))[0]
    spin = 0.5 * np.array([J[2, 1] - J[1, 2], J[0, 2] - J[2, 0], J[1, 0] - J[0, 1]])
    np.testing.assert_allclose(np.degrees(spin), rotations[0], atol=1e-9)


def test_undo_and_journal_take_the_handles_stroke(sphere, tmp_path):
    from viewer.journal import find_journal, read_journal
    path = tmp_path / "ball.obj"
    trimesh.Trimesh(*sphere, process=False).export(path)
    session = Session(*sphere, size=(W, H), mesh_path=path)
    session.key("_7")
    tool = session.tools["handles"]
    place(session, W / 2, H / 2)
    place(session, W / 2 + 90, H / 2)
    before = np.asarray(session.history.points).copy()
    x, y = screen(session, tool.centers[0])
    session.press(x, y, LEFT)
    session.drag(x, y - 30, 0, -30, LEFT)
    session.release(x, y - 30, LEFT)
    assert session.history.position == 1
    # the journal holds the stroke, and a new session recovers the same pose from it
    saved = read_journal(find_journal(path))
    assert [s["brush"] for s in saved] == ["handles"]
    posed = np.asarray(session.history.points).copy()
    again = Session(*sphere, size=(W, H), mesh_path=path)
    assert again.key("RETURN") == "recover"
    np.testing.assert_allclose(np.asarray(again.history.points), posed, rtol=0, atol=1e-12)
    session.key("Z", 2)  # Ctrl+Z
    np.testing.assert_array_equal(np.asarray(session.history.points), before)
    session.close()
    again.close()


def test_help_panel_lists_the_handles_keys():
    rows = {k: (a, d) for k, a, d in BINDINGS}
    assert rows["7"][0] == "tool_handles" and "handle" in rows["7"][1]
    assert rows["End"][0] == "handles_clear"


def test_handles_too_close_are_refused_with_a_message(session):
    tool = session.tools["handles"]
    place(session, W / 2, H / 2)
    tool.centers.append(tool.centers[0] + 1e-9)  # a second handle on top of the first
    x, y = screen(session, tool.centers[0])
    session.press(x, y, LEFT)
    session.drag(x + 30, y, 30, 0, LEFT)
    session.release(x + 30, y, LEFT)
    assert session.history.position == 0
    assert "refused" in session.status()["message"]
