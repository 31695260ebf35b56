"""The mask tool: drag on the surface to paint hold (held areas stay still), Shift erases.

A dab paints only the surface the user sees around the cursor (:func:`reached_from_view`).

The hold is ``session.hold``, (n,) float64 in [0, 1] per vertex; a stroke's mask weight is
``1 - hold`` (:mod:`brushes.recipe`'s ``{"weights": [...]}``).
"""

from __future__ import annotations

import numpy as np

from viewer.tools.base import Tool

__all__ = ["Mask", "paint", "reached_from_view", "PAINT_STRENGTH"]

#: Mask paint strength per paint event at the brush centre.
PAINT_STRENGTH = 0.5
MOD_SHIFT = 1  # pyglet.window.key.MOD_SHIFT


def paint(hold, positions, point, radius, *, erase=False, strength=PAINT_STRENGTH, reached=None):
    """Add (or with ``erase`` remove) hold around ``point`` in place, a smooth bump of
    ``radius``: ``strength * (1 - (d/r)^2)^2`` for d < r, clipped to [0, 1].

    hold : (n,) float64, written in place
    positions : (n, 3) float64
    point : (3,) float64
    radius : float > 0
    reached : (n,) bool, optional, keyword-only; only these vertices are painted
    """
    offsets = positions - point
    d2 = np.einsum("ij,ij->i", offsets, offsets) / radius**2
    near = d2 < 1.0
    if reached is not None:
        near &= reached
    amount = strength * (1.0 - d2[near]) ** 2
    hold[near] = np.clip(hold[near] + (-amount if erase else amount), 0.0, 1.0)


def reached_from_view(session, hit, radius):
    """(n,) bool: the vertices a paint dab at ``hit`` may reach.

    Those within ``radius`` of the hit point that face the camera (normal towards the eye)
    and are joined to the hit face through mesh edges inside that set: the patch of surface
    the user sees around the cursor, not other parts of the model that happen to lie inside
    the radius behind it or on the far side of a thin part.
    """
    import scipy.sparse.csgraph

    positions = session.shown()
    point = np.asarray(hit.point, dtype=np.float64)
    offsets = positions - point
    inside = np.flatnonzero(np.einsum("ij,ij->i", offsets, offsets) < radius**2)
    reached = np.zeros(len(positions), dtype=bool)
    corners = session.faces[hit.face]
    if len(inside) == 0:
        return reached
    to_eye = session.camera.eye() - positions[inside]
    facing = np.einsum("ij,ij->i", session.vertex_normals(inside), to_eye) > 0.0
    patch = inside[facing]
    seeds = np.flatnonzero(np.isin(patch, corners))
    if len(seeds) == 0:
        return reached
    sub = session.neighbours[patch][:, patch]
    _, labels = scipy.sparse.csgraph.connected_components(sub, directed=False)
    reached[patch[np.isin(labels, labels[seeds])]] = True
    return reached


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
        self._paint(session, hit, state.erase)
        return state

    def drag(self, session, state, point, modifiers):
        hit = session.pick(*point)
        if hit.hit:
            self._paint(session, hit, state.erase)

    def outline(self, session, state):
        return None if session.hover is None else (np.asarray(session.hover), session.radius)

    @staticmethod
    def _paint(session, hit, erase):
        paint(session.hold, session.shown(), np.asarray(hit.point, dtype=np.float64),
              session.radius, erase=erase, reached=reached_from_view(session, hit, session.radius))
        session.markers_changed()

    def do_mask_clear(self, session):
        held = int(np.count_nonzero(session.hold > 0))
        session.hold[:] = 0.0
        session.markers_changed()
        return f"mask cleared ({held:,} vertices were held)"
