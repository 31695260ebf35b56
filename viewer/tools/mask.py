"""The mask tool: drag on the surface to paint hold (held areas stay still), Shift erases.

The hold is ``session.hold``, (n,) float64 in [0, 1] per vertex; a stroke's mask weight is
``1 - hold`` (:mod:`brushes.recipe`'s ``{"weights": [...]}``).
"""

from __future__ import annotations

import numpy as np

from viewer.tools.base import Tool

__all__ = ["Mask", "paint", "PAINT_STRENGTH"]

#: Mask paint strength per paint event at the brush centre.
PAINT_STRENGTH = 0.5
MOD_SHIFT = 1  # pyglet.window.key.MOD_SHIFT


def paint(hold, positions, point, radius, *, erase=False, strength=PAINT_STRENGTH):
    """Add (or with ``erase`` remove) hold around ``point`` in place, a smooth bump of
    ``radius``: ``strength * (1 - (d/r)^2)^2`` for d < r, clipped to [0, 1].

    hold : (n,) float64, written in place
    positions : (n, 3) float64
    point : (3,) float64
    radius : float > 0
    """
    offsets = positions - point
    d2 = np.einsum("ij,ij->i", offsets, offsets) / radius**2
    near = d2 < 1.0
    amount = strength * (1.0 - d2[near]) ** 2
    hold[near] = np.clip(hold[near] + (-amount if erase else amount), 0.0, 1.0)


class _Painting:
    def __init__(self, erase):
        self.erase = erase


class Mask(Tool):
    name = "mask"
    label = "mask"
    key = "6"
    summary = "mask tool: drag to paint hold (held areas stay still), Shift+drag erases"
    brush = True
    bindings = (("Shift+Delete", "mask_clear", "clear the painted mask"),)

    def press(self, session, start, hit, modifiers):
        state = _Painting(bool(modifiers & MOD_SHIFT))
        self._paint(session, hit.point, state.erase)
        return state

    def drag(self, session, state, point, modifiers):
        hit = session.pick(*point)
        if hit.hit:
            self._paint(session, hit.point, state.erase)

    def outline(self, session, state):
        return None if session.hover is None else (np.asarray(session.hover), session.radius)

    @staticmethod
    def _paint(session, point, erase):
        paint(session.hold, session.shown(), np.asarray(point, dtype=np.float64),
              session.radius, erase=erase)
        session.markers_changed()

    def do_mask_clear(self, session):
        session.hold[:] = 0.0
        session.markers_changed()
