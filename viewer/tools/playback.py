"""Playback: the strokes so far as motion with their secondary motion, or the settle of the
stroke just made.

Keys: F5 plays or pauses the strokes so far as an animation (each stroke flows in over its own
slot of `SECONDS_PER_STROKE` and settles, as `pliant animate` plays a recipe); F6 plays the
settle of the stroke just made (its flow in and the elastic waves after it, over
`SETTLE_SECONDS`); F7 steps one frame on (pausing; after the last it wraps to the first), a
scrub through the frames. The frames come from
:func:`brushes.animate.frames` with the command's default shear speed (two bounding-box
diagonals per second).

The window has no timer for tools, so while playing a background thread moves the time on and
shows the frame at it with ``session.show`` (a reference swap the window picks up on its next
frame). Anything else that changes the shown shape (a stroke, an undo, a preview) stops the
playback; at the end the committed shape is shown again (``session.restore``). With
``background = False`` (the tests) nothing runs on its own: :meth:`Playback.advance` shows the
frame at the clock's time.
"""

from __future__ import annotations

import threading
import time

import numpy as np

from viewer.tools.base import Commands

__all__ = ["Playback", "player", "SECONDS_PER_STROKE", "SETTLE_SECONDS", "FPS"]

#: Seconds of animation per stroke when the strokes so far are played (F5).
SECONDS_PER_STROKE = 0.6
#: Seconds of the settle preview of the stroke just made (F6).
SETTLE_SECONDS = 1.0
#: Frames per second of both.
FPS = 30.0


def player(session):
    """The session's :class:`Playback` instance (one per session, as every command set)."""
    return next(o for o in set(session._owners.values()) if isinstance(o, Playback))


class Playback(Commands):
    bindings = (
        ("F5", "play_pause", "play or pause the strokes so far as motion with their secondary motion"),
        ("F6", "settle_preview", "play the settle of the stroke just made (its elastic waves)"),
        ("F7", "frame_forward", "animation: one frame on (pauses; wraps to the start)"),
    )
    #: False: no thread; `advance` shows the frame at `clock()` (headless tests).
    background = True
    #: Seconds from a monotonic clock (tests pass their own).
    clock = staticmethod(time.monotonic)

    def __init__(self):
        self.times = None          # (m,) seconds
        self.frames = None         # (m, n, 3) float64
        self.what = ""             # "strokes" or "settle"
        self.index = 0
        self.playing = False
        self.shown_index = None
        self._origin = 0.0
        self._source = None        # (history position, what) the frames were made for
        self._expect = None        # session.shown_version after our last show
        self._thread = None
        self._wake = threading.Event()
        self.finished = threading.Event()      # set when a playback reaches its last frame

    # ------------------------------------------------------------------ frames
    def _make(self, session, what):
        from brushes import animate
        from brushes.recipe import Recipe

        history = session.history
        speed = 2.0 * session.diagonal
        if what == "settle":
            stroke = session.recipe().strokes[-1]
            start = history.points_at(history.position - 1)
            times, frames = animate.frames(Recipe((stroke,)), start, groups=session.groups,
                                           seconds=SETTLE_SECONDS, fps=FPS, shear_speed=speed)
        else:
            recipe = session.recipe()
            times, frames = animate.frames(recipe, history.points_at(0), groups=session.groups,
                                           seconds=SECONDS_PER_STROKE * len(recipe), fps=FPS,
                                           shear_speed=speed)
        return times, frames

    def _load(self, session, what):
        """Make the frames of `what` unless the ones held are for the same strokes."""
        key = (session.history.position, tuple(map(repr, session.history.applied)), what)
        if self._source != key or self.frames is None:
            self.times, self.frames = self._make(session, what)
            self._source, self.what = key, what
            self.index = 0

    def _stale(self, session):
        """True when the strokes changed since the frames were made, or someone else changed
        the shown shape since our last frame (a stroke, an undo, a preview)."""
        if self._source is None or self._source[0] != session.history.position:
            return True
        return self._expect is not None and session.shown_version != self._expect

    # ------------------------------------------------------------------ showing
    def _show(self, session, j):
        j = int(min(max(j, 0), len(self.frames) - 1))
        self.index = j
        session.show(self.frames[j])
        self.shown_index = j
        self._expect = session.shown_version

    def _finish(self, session):
        self.playing = False
        session.restore()
        self._expect = None
        self.shown_index = None
        self.finished.set()
        session.say(f"played {len(self.frames)} frames ({self.times[-1]:.2f} s); the committed shape is shown")

    def advance(self, session):
        """Show the frame at the clock's time while playing; True while still playing."""
        if not self.playing:
            return False
        if self._stale(session):
            self.playing = False
            self._expect = None
            return False
        j = int(np.searchsorted(self.times, self.clock() - self._origin, side="right")) - 1
        if j >= len(self.frames) - 1:
            self._show(session, len(self.frames) - 1)
            self._finish(session)
            return False
        self._show(session, j)
        return True

    def _play(self, session, what):
        self._load(session, what)
        if self.index >= len(self.frames) - 1:
            self.index = 0
        self._origin = self.clock() - self.times[self.index]
        self.playing = True
        self.finished.clear()
        self._expect = None
        self._show(session, self.index)
        if self.background:
            self._start(session)

    def _start(self, session):
        """The thread that moves the time on while playing (one at a time)."""
        if self._thread is not None and self._thread.is_alive():
            self._wake.set()
            return
        self._wake.clear()

        def run():
            while self.advance(session):
                self._wake.wait(1.0 / FPS)
                self._wake.clear()

        self._thread = threading.Thread(target=run, name="pliant-playback", daemon=True)
        self._thread.start()

    # ------------------------------------------------------------------ key actions
    def do_play_pause(self, session):
        if self.playing:
            self.playing = False
            self._wake.set()
            return f"paused at {self.times[self.index]:.2f} s (frame {self.index + 1} of {len(self.frames)})"
        if not session.history.position:
            return "no strokes to play yet"
        self._play(session, "strokes")
        return (f"playing {len(session.recipe())} strokes as motion: {len(self.frames)} frames over "
                f"{self.times[-1]:.2f} s (F5 pauses, F7 steps)")

    def do_settle_preview(self, session):
        if not session.history.position:
            return "no stroke to settle yet"
        self.playing = False
        self._play(session, "settle")
        return f"the settle of the last stroke: {len(self.frames)} frames over {self.times[-1]:.2f} s"

    def do_frame_forward(self, session):
        """One frame on, pausing; past the last frame it wraps to the first (a scrub that goes
        round, one key: the help panel has room for few rows)."""
        self.playing = False
        self._wake.set()
        if not session.history.position:
            return "no strokes to step through yet"
        if self.frames is None or self._source[0] != session.history.position:
            self._load(session, self.what or "strokes")
            target = 0
        elif self.shown_index is None or self._stale(session):
            target = self.index             # showing the committed shape again: start from here
        else:
            target = (self.index + 1) % len(self.frames)
        self._show(session, target)
        return f"frame {self.index + 1} of {len(self.frames)} at {self.times[self.index]:.2f} s"


# --------------------------------------------------------------------------- README picture

#: The README's settle strip: one grab of the mascot's right hand, played over one second.
STRIP_STROKE = {"brush": "grab", "center": [-0.50, 0.78, 0.07], "radius": 0.35, "move": [-0.12, 0.30, 0.10]}
STRIP_TIMES = (0.1, 0.25, 0.4, 0.55, 0.8)


def render_settle_strip(path, *, shear_speed=1.5, tile=(320, 400), models=None):
    """Write the README's picture strip of a settle (PNG): the mascot at `STRIP_TIMES` while
    `STRIP_STROKE` flows in over its first half second and settles, coloured by how far each
    point is from where it would be without inertia (the secondary motion), on one colour
    scale for the whole strip. Rendered with the snapshot renderer; returns the path."""
    from PIL import Image

    from brushes import animate
    from brushes.atomic import atomic_write
    from brushes.demo import find_models
    from brushes.formats import load_mesh
    from brushes.recipe import parse_recipe
    from viewer.snapshot import render_pixels

    doc = load_mesh(find_models(models)[0])
    recipe = parse_recipe({"format": "pliant-recipe", "version": 1, "strokes": [STRIP_STROKE]})
    fps = 40.0
    times, frames = animate.frames(recipe, doc.vertices, groups=doc.groups, seconds=1.0, fps=fps,
                                   shear_speed=shear_speed)
    _, still = animate.frames(recipe, doc.vertices, groups=doc.groups, seconds=1.0, fps=fps, shear_speed=1e9)
    lag = np.linalg.norm(frames - still, axis=2)
    bounds = np.array([frames.min(axis=(0, 1)), frames.max(axis=(0, 1))])
    tiles = []
    for t in STRIP_TIMES:
        j = int(round(t * fps))
        # one vertex no face uses carries the strip's largest lag: every tile shares the ramp
        vertices = np.vstack([frames[j], frames[j][:1]])
        tiles.append(render_pixels(vertices, doc.faces, size=tile, view="front,pitch=5,zoom=1.0", bounds=bounds,
                                   magnitude=np.append(lag[j], lag.max())))
    with atomic_write(path, mode="wb") as handle:
        Image.fromarray(np.concatenate(tiles, axis=1), mode="RGB").save(handle, format="PNG")
    return path

