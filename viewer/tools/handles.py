"""The handles tool: place handles on the surface, then drag one to its target while the others
hold (one drag, one ``handles`` recipe stroke).

A click on the surface away from every handle places a handle there (drawn as a marker). A drag
that starts on a handle moves it in the view plane, like a grab, while every other handle is held
where it is (a handle with zero move); Shift with the drag turns the handle about the view axis
instead (half a turn per window width, as the twist brush). The stroke is
:class:`brushes.Handles` with the session's radius, falloff, pins, mask and mirror; what the
surface shows during the drag is that stroke's exact flow, computed on the preview worker as
the brush tools do, and release commits it. After a stroke each handle sits where the stroke
took it. End removes every handle; Poisson's ratio is the grab brush's.
"""

from __future__ import annotations

import itertools

import numpy as np

from viewer import gesture
from viewer.tools.strokes import MOD_SHIFT, BrushTool

__all__ = ["Handles", "HANDLE_PICK_PIXELS"]

#: Screen distance (window units) within which a press takes hold of a handle.
HANDLE_PICK_PIXELS = 12.0
_drags = itertools.count(1)


class _Drag:
    """A handle drag in progress: which handle, the press, the settings fixed at the press."""

    def __init__(self, **data):
        self.__dict__.update(data)


class Handles(BrushTool):
    """Drag, release and cancel are the brush tools' (the exact preview, then one commit);
    this class says what a press takes hold of and which stroke the drag stands for."""

    name = "handles"
    label = "handles"
    key = "7"
    summary = ("handles tool: click the surface to place a handle; drag a handle to move it "
               "while the others hold (Shift+drag turns it)")
    orbit_off_model = False  # a handle drawn at the model's edge may be pressed off the model
    bindings = (("End", "handles_clear", "remove every handle"),)

    def __init__(self):
        self.centers = []  # (3,) float64 positions of the handles on the committed surface

    # ------------------------------------------------------------------ the tool contract
    def press(self, session, start, hit, modifiers):
        index = self._near(session, start)
        if index is None:
            if hit.hit:
                self.centers.append(np.asarray(hit.point, dtype=np.float64))
                session.markers_changed()
                session.say(f"handle {len(self.centers)} placed; drag a handle to move it")
            return None
        pins = [list(map(float, p)) for p in session.pins] or None
        plane = session.mirror_plane()
        mirror = None if plane is None else {"normal": plane[0].tolist(), "point": plane[1].tolist()}
        weights = (1.0 - session.hold) if np.any(session.hold > 0) else None
        return _Drag(id=next(_drags), index=index, start=start, current=start,
                     base=np.array(session.history.points), invert=bool(modifiers & MOD_SHIFT),
                     centers=np.array(self.centers), radius=session.radius,
                     falloff=session.falloff, poisson=session.poisson.get("grab", 0.5),
                     pins=pins, mirror=mirror, weights=weights, params=None)

    def release(self, session, state, point, modifiers):
        before = session.history.position
        super().release(session, state, point, modifiers)
        if session.history.position > before:  # committed: each handle sits where it went
            self.centers = list(state.centers + np.asarray(state.params["moves"]))
            session.markers_changed()

    def outline(self, session, state):
        center = state.centers[state.index]
        if state.params is not None:
            center = center + np.asarray(state.params["moves"][state.index])
        return center, state.radius

    def markers(self, session):
        """(k, 3) float64 handle positions to draw, or None when there are none."""
        return np.array(self.centers) if self.centers else None

    def do_handles_clear(self, session):
        count = len(self.centers)
        self.centers = []
        session.markers_changed()
        return f"removed {count} handle{'s' if count != 1 else ''}"

    # ------------------------------------------------------------------ strokes
    def _near(self, session, point):
        """Index of the handle drawn within HANDLE_PICK_PIXELS of window ``point``, or None."""
        if not self.centers:
            return None
        screen = session.camera.project(np.asarray(self.centers), session.width, session.height)
        gap = np.hypot(screen[:, 0] - point[0], screen[:, 1] - point[1])
        if not np.any(np.isfinite(gap)):
            return None
        nearest = int(np.nanargmin(gap))
        return nearest if gap[nearest] <= HANDLE_PICK_PIXELS else None

    @staticmethod
    def params_for(session, state, point):
        """The Handles keyword arguments for the cursor at ``point``: the dragged handle moves
        (or turns, with Shift held: ``state.invert``) by the gesture, every other handle holds."""
        k = len(state.centers)
        moves = np.zeros((k, 3))
        rotations = None
        center = state.centers[state.index]
        if state.invert:
            twist = gesture.twist(session.camera, center, state.radius, state.start, point, session.width)
            rotations = np.zeros((k, 3))
            rotations[state.index] = np.asarray(twist["axis"]) * twist["degrees"]
        else:
            grab = gesture.grab(session.camera, center, state.radius, state.start, point,
                                session.width, session.height)
            moves[state.index] = grab["move"]
        params = {"centers": state.centers.tolist(), "radius": state.radius, "moves": moves.tolist()}
        if rotations is not None:
            params["rotations"] = rotations.tolist()
        return params

    def stroke(self, state, *, mask=True):
        """The :class:`brushes.recipe.Stroke` the drag stands for now."""
        from brushes.recipe import Stroke
        weights = {"weights": state.weights.tolist()} if mask and state.weights is not None else None
        kwargs = dict(state.params, poisson=state.poisson, falloff=state.falloff)
        return Stroke("handles", kwargs, pins=state.pins, mirror=state.mirror, mask=weights)

    def _request(self, session, state, point):
        """``(key, job)``: ``job()`` is exactly the stroke's ``Brush.apply`` on the press positions."""
        state.current = point
        state.params = self.params_for(session, state, point)
        stroke = self.stroke(state, mask=False)
        brush = stroke.brush()
        pins = None if stroke.pins is None else np.asarray(stroke.pins, dtype=np.float64)
        base, weights, flow = state.base, state.weights, stroke.flow

        def job():
            return brush.apply(base, flow=flow, pins=pins, mask=weights)

        return (state.id, point, state.invert), job
