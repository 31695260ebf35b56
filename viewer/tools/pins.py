"""The pin tool: a click on the surface places a pin, a click near a pin removes it.

Pins are points the following strokes hold still (the engine's counter-loads,
:mod:`brushes.pins`); they live in ``session.pins`` and go into every stroke's ``pins`` field.
"""

from __future__ import annotations

import numpy as np

from viewer.tools.base import Tool

__all__ = ["Pins", "PIN_PICK_PIXELS"]

#: Screen distance (window units) within which a click removes a pin.
PIN_PICK_PIXELS = 10.0


class Pins(Tool):
    name = "pin"
    label = "pin"
    key = "5"
    summary = "pin tool: click the surface to place a pin, click a pin to remove it"
    orbit_off_model = False  # a click off the model may still hit a pin drawn at its edge
    bindings = (("Delete", "pins_clear", "remove every pin"),)

    def press(self, session, start, hit, modifiers):
        x, y = start
        if session.pins:
            screen = session.camera.project(np.asarray(session.pins), session.width, session.height)
            gap = np.hypot(screen[:, 0] - x, screen[:, 1] - y)
            nearest = int(np.nanargmin(gap)) if np.any(np.isfinite(gap)) else -1
            if nearest >= 0 and gap[nearest] <= PIN_PICK_PIXELS:
                del session.pins[nearest]
                session.markers_changed()
                return None
        if hit.hit:
            session.pins.append(np.asarray(hit.point, dtype=np.float64))
            session.markers_changed()
        return None

    def do_pins_clear(self, session):
        count = len(session.pins)
        session.pins.clear()
        session.markers_changed()
        return f"removed {count} pin{'s' if count != 1 else ''}"
