"""The brush tools: grab, twist, scale and pinch strokes (one drag, one recipe stroke).

What the surface shows while the button is down is the stroke that release will commit: the
same brush, integrated as the same flow, with the same pins, mask and mirror, on the positions
at the press, through the engine's own ``Brush.apply`` (the call
:meth:`brushes.recipe.Stroke.apply` makes, so the committed positions are exactly what a recipe
replay gives). Each drag event asks :class:`viewer.preview.PreviewWorker` for the result at
the new cursor position; the worker computes off the UI thread and drops requests that went
stale while it was busy, and the window shows the newest finished result. On release the
result for the release position (already computed when the cursor stopped) becomes the
stroke: nothing moves at release.
"""

from __future__ import annotations

import itertools

import numpy as np

from viewer import gesture
from viewer.tools.base import Tool

__all__ = ["Grab", "Twist", "Scale", "Pinch", "BrushTool"]

MOD_SHIFT = 1  # pyglet.window.key.MOD_SHIFT (viewer.session compares the values with pyglet's)
_strokes = itertools.count(1)


class _Stroke:
    """A brush drag in progress: the press, the settings fixed at the press, the last request."""

    def __init__(self, **data):
        self.__dict__.update(data)


class BrushTool(Tool):
    """Shared stroke logic of the four brushes; a subclass sets ``name``, ``key``, ``summary``."""

    brush = True
    edits = True

    @property
    def label(self):
        return f"{self.name} brush"

    # ------------------------------------------------------------------ the tool contract
    def press(self, session, start, hit, modifiers):
        pins = [list(map(float, p)) for p in session.pins] or None
        plane = session.mirror_plane()
        mirror = None if plane is None else {"normal": plane[0].tolist(), "point": plane[1].tolist()}
        weights = (1.0 - session.hold) if np.any(session.hold > 0) else None
        return _Stroke(
            id=next(_strokes), kind=self.name, start=start, current=start,
            center=np.asarray(hit.point, dtype=np.float64),
            base=np.array(session.history.points),  # the positions at the press (a copy)
            params=None, invert=bool(modifiers & MOD_SHIFT),
            # Settings are fixed for the whole stroke (a key or wheel mid-drag changes the
            # next stroke, not this one).
            radius=session.radius, falloff=session.falloff, poisson=session.poisson[self.name],
            pins=pins, mirror=mirror, weights=weights)

    def drag(self, session, state, point, modifiers):
        state.invert = bool(modifiers & MOD_SHIFT)
        try:
            key, job = self._request(session, state, point)
        except ValueError as exc:  # a gesture the brush refuses (the message names the field)
            session.say(f"stroke refused: {exc}")
            return
        session.request_preview(key, job)

    def release(self, session, state, point, modifiers):
        state.invert = bool(modifiers & MOD_SHIFT)
        if point == state.start:
            session.restore()
            return
        try:
            key, job = self._request(session, state, point)
            stroke = self.stroke(state).to_dict()
        except ValueError as exc:
            session.restore()
            session.say(f"stroke refused: {exc}")
            return
        result = session.previews.wait(key, job)
        if result.error is not None:
            session.restore()
            session.say(f"stroke refused: {result.error}")
            return
        session.commit(stroke, points=result.value["points"])

    def cancel(self, session, state):
        session.restore()

    def outline(self, session, state):
        center = state.center
        if state.params is not None and state.params.get("move") is not None:
            center = center + np.asarray(state.params["move"])
        return center, state.radius

    # ------------------------------------------------------------------ strokes
    @staticmethod
    def brush_kwargs(state):
        """The brush's keyword arguments: the gesture's, plus the material fixed at the press."""
        kwargs = {k: v for k, v in state.params.items() if k != "kind"}
        kwargs["poisson"] = state.poisson
        kwargs["falloff"] = state.falloff
        return kwargs

    def stroke(self, state, *, mask=True):
        """The :class:`brushes.recipe.Stroke` the drag stands for now (``mask=False`` leaves the
        mask out: checking a million weights is done once per stroke, not per event)."""
        from brushes.recipe import Stroke
        weights = None
        if mask and state.weights is not None:
            weights = {"weights": state.weights.tolist()}
        return Stroke(state.kind, self.brush_kwargs(state), pins=state.pins,
                      mirror=state.mirror, mask=weights)

    def _request(self, session, state, point):
        """The preview request for the cursor at ``point``: ``(key, job)``, where ``job()``
        is exactly :meth:`brushes.recipe.Stroke.apply` of the stroke on the press positions."""
        state.current = point
        state.params = gesture.drag_params(state.kind, session.camera, state.center,
                                           state.radius, state.start, point, session.width,
                                           session.height, invert=state.invert)
        stroke = self.stroke(state, mask=False)
        brush = stroke.brush()
        pins = None if stroke.pins is None else np.asarray(stroke.pins, dtype=np.float64)
        base, weights, flow = state.base, state.weights, stroke.flow

        def job():
            return brush.apply(base, flow=flow, pins=pins, mask=weights)

        return (state.id, point, state.invert), job


class Grab(BrushTool):
    name = "grab"
    key = "1"
    summary = "grab brush: drag the surface along with the cursor"


class Twist(BrushTool):
    name = "twist"
    key = "2"
    summary = "twist brush: drag sideways to turn the surface about the view axis"


class Scale(BrushTool):
    name = "scale"
    key = "3"
    summary = "scale brush: drag up to swell, down to shrink"


class Pinch(BrushTool):
    name = "pinch"
    key = "4"
    summary = "pinch brush: drag to stretch along the drag (Shift: squeeze along it)"
