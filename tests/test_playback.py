"""viewer.tools.playback: the strokes so far, or the settle of the last one, played as motion;
driven through a headless Session (no window, no GL) as tests/test_session.py does.

The reference for every frame shown is the engine's own API used as documented
(`brushes.animate.frames` for a recipe, `brushes.dynamic` for the settle), and the recipe API
(`Recipe.apply`) for the committed shapes; time comes from a clock the test sets, and the one
threaded run waits on the player's event, not on a clock.
"""
import numpy as np
import pytest
import trimesh

import brushes
from brushes import animate
from brushes.recipe import Recipe, parse_stroke
from viewer.session import BINDINGS, Session
from viewer.tools import playback
from viewer.tools.playback import FPS, SECONDS_PER_STROKE, SETTLE_SECONDS, Playback

W, H = 640, 480

STROKES = [
    {"brush": "grab", "center": [0.0, 0.0, 1.0], "radius": 0.5, "move": [0.25, 0.0, 0.0]},
    {"brush": "twist", "center": [0.0, 0.0, 0.9], "radius": 0.4, "axis": [0.0, 0.0, 1.0], "degrees": 30.0},
]


class Clock:
    def __init__(self):
        self.now = 100.0

    def __call__(self):
        return self.now


@pytest.fixture
def sphere():
    mesh = trimesh.creation.icosphere(subdivisions=2)
    return np.asarray(mesh.vertices), np.asarray(mesh.faces)


@pytest.fixture
def clock(monkeypatch):
    c = Clock()
    monkeypatch.setattr(Playback, "clock", staticmethod(c))
    monkeypatch.setattr(Playback, "background", False)
    return c


@pytest.fixture
def session(sphere, tmp_path, clock):
    s = Session(*sphere, size=(W, H), out_dir=tmp_path)
    for stroke in STROKES:
        s.commit(stroke)
    return s


def test_keys_are_our_own_and_do_not_clash():
    keys = [k for k, _, _ in BINDINGS]
    assert len(keys) == len(set(keys))
    ours = {k: a for k, a, _ in Playback.bindings}
    assert ours == {"F5": "play_pause", "F6": "settle_preview", "F7": "frame_forward"}
    assert all((k, a) in {(kk, aa) for kk, aa, _ in BINDINGS} for k, a in ours.items())


def test_nothing_to_play_on_a_fresh_mesh(sphere, tmp_path, clock):
    s = Session(*sphere, size=(W, H), out_dir=tmp_path)
    for key, want in (("F5", "no strokes to play yet"), ("F6", "no stroke to settle yet"),
                      ("F7", "no strokes to step through yet")):
        assert s.key(key) is not None
        assert s.message == want
    np.testing.assert_array_equal(s.shown(), sphere[0])


def test_playing_the_strokes_shows_the_recipes_frames_in_time(session, sphere, clock):
    rest = sphere[0]
    speed = 2.0 * session.diagonal
    times, frames = animate.frames(Recipe(tuple(parse_stroke(s) for s in STROKES)), rest, seconds=2 * SECONDS_PER_STROKE,
                                   fps=FPS, shear_speed=speed)
    assert session.key("F5") == "play_pause"
    assert session.message.startswith(f"playing 2 strokes as motion: {len(frames)} frames")
    np.testing.assert_array_equal(session.shown(), frames[0])          # starts at rest
    np.testing.assert_array_equal(frames[0], rest)
    p = playback.player(session)
    for t in (0.15, 0.4, 0.77, 1.0):
        clock.now = 100.0 + t
        assert p.advance(session) is True
        j = int(np.searchsorted(times, t, side="right")) - 1
        np.testing.assert_allclose(session.shown(), frames[j], rtol=0, atol=1e-12)
    # pause holds the frame; play goes on from it
    session.key("F5")
    assert session.message.startswith("paused at")
    held = session.shown()
    clock.now += 5.0
    assert p.advance(session) is False
    assert session.shown() is held
    session.key("F5")
    clock.now += 10.0                        # past the end: the committed shape again
    assert p.advance(session) is False and p.finished.is_set()
    np.testing.assert_array_equal(session.shown(), session.history.points)
    assert session.message.startswith(f"played {len(frames)} frames")


def test_settle_preview_of_the_last_stroke(session, clock):
    # The settle of the stroke just made: its flow in over the first half and the waves after,
    # rebuilt from brushes.dynamic as documented (ramp half the time, damping all of it).
    start = session.history.points_at(1)
    end = session.history.points
    stroke = parse_stroke(STROKES[1])
    speed = 2.0 * session.diagonal
    assert session.key("F6") == "settle_preview"
    assert session.message.startswith("the settle of the last stroke")
    dyn = brushes.dynamic(stroke.brush(), shear_speed=speed, ramp=SETTLE_SECONDS / 2, damping=SETTLE_SECONDS)
    p = playback.player(session)
    checked = 0
    for t in np.arange(0.55, 0.95, 0.1):
        clock.now = 100.0 + t
        assert p.advance(session)
        tj = p.times[p.index]
        if tj <= SETTLE_SECONDS / 2:
            continue
        want = end + dyn.displacement(start, tj) - dyn.limit(start)
        np.testing.assert_allclose(session.shown(), want, rtol=0, atol=1e-4 * np.abs(end - start).max())
        checked += 1
    assert checked >= 3
    clock.now += 10.0
    assert p.advance(session) is False
    np.testing.assert_array_equal(session.shown(), end)
    # the settle ends where the stroke did: the recipe's replay
    np.testing.assert_allclose(end, Recipe(tuple(parse_stroke(s) for s in STROKES)).apply(session.history.points_at(0)),
                               atol=1e-12)


def test_stepping_frames(session, clock):
    assert session.key("F7") == "frame_forward"
    p = playback.player(session)
    assert p.index == 0 and session.message == f"frame 1 of {len(p.frames)} at 0.00 s"
    session.key("F7")
    session.key("F7")
    assert p.index == 2
    np.testing.assert_array_equal(session.shown(), p.frames[2])
    for _ in range(len(p.frames) - 2):
        session.key("F7")
    assert p.index == 0                       # past the last frame it wraps to the first
    np.testing.assert_array_equal(session.shown(), p.frames[0])
    # a step while playing pauses there
    session.key("F5")
    clock.now += 0.5
    p.advance(session)
    at = p.index
    session.key("F7")
    assert not p.playing and p.index == at + 1


def test_a_new_stroke_or_undo_stops_the_playback(session, clock):
    session.key("F5")
    p = playback.player(session)
    clock.now += 0.3
    assert p.advance(session)
    session.key("Z", 2)                        # Ctrl+Z: undo shows the committed shape
    assert p.advance(session) is False and not p.playing
    np.testing.assert_array_equal(session.shown(), session.history.points)
    # played again, the frames are made for the one stroke now applied
    session.key("F5")
    assert len(p.times) == int(round(SECONDS_PER_STROKE * FPS)) + 1


def test_a_background_playback_runs_to_the_end(sphere, tmp_path, monkeypatch):
    # The thread moves the time on by itself; the test waits on the player's event.
    monkeypatch.setattr(Playback, "background", True)
    s = Session(*sphere, size=(W, H), out_dir=tmp_path)
    s.commit(STROKES[0])
    s.key("F6")
    p = playback.player(s)
    assert p.finished.wait(timeout=600)
    p._thread.join(timeout=600)
    assert not p._thread.is_alive() and not p.playing
    np.testing.assert_array_equal(s.shown(), s.history.points)
