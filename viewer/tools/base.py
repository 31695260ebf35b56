"""The two base classes of :mod:`viewer.tools`: :class:`Commands` (key actions) and
:class:`Tool` (key actions plus what a left-button drag does). See the package docstring for
the contract; this module holds only the defaults.
"""

from __future__ import annotations

__all__ = ["Commands", "Tool"]


class Commands:
    """A set of key actions with their binding rows (no pointer behaviour).

    Class attributes
    ----------------
    bindings : tuple of (chord, action, description)
        Rows added to :data:`viewer.bindings.BINDINGS`; each ``action`` is run by :meth:`run`.
    """

    bindings = ()

    @classmethod
    def actions(cls):
        """The action names this class answers (those of its binding rows)."""
        return tuple(action for _, action, _ in cls.bindings)

    def run(self, session, action):
        """Do ``action`` (one of :meth:`actions`) on ``session``; return a status message or
        None. The default calls ``self.do_<action>(session)``. OSError and ValueError are
        shown by the session as ``failed: ...``."""
        return getattr(self, f"do_{action}")(session)


class Tool(Commands):
    """A pointer tool: a key selects it, then a left-button drag on the model uses it.

    Class attributes
    ----------------
    name : str
        Registry name (``"grab"``); the key action that selects it is ``"tool_<name>"``.
    label : str
        Name in the status line (``"grab brush"``).
    key, summary : str
        The chord that selects the tool and its help-panel description.
    brush : bool
        True for tools that use the brush settings (radius, falloff, Poisson's ratio): the
        ring follows the cursor and the settings are shown.
    orbit_off_model : bool
        True: a left press that misses the model orbits the camera instead of calling
        :meth:`press`.
    edits : bool
        True for tools that commit strokes (history and journal): while the session waits
        for an answer about an unsaved journal, their presses are refused with the question.
    """

    name = ""
    label = ""
    key = None
    summary = ""
    brush = False
    orbit_off_model = True
    edits = False

    @classmethod
    def select_binding(cls):
        """The row of the key that selects this tool, or None."""
        return None if cls.key is None else (cls.key, f"tool_{cls.name}", cls.summary)

    def press(self, session, start, hit, modifiers):
        """The left button went down at window point ``start`` ((x, y) floats) over ``hit``
        (a :class:`viewer.picking.Hit` on the committed surface). Return a state object to
        receive :meth:`drag` and :meth:`release`, or None when the press is complete."""
        return None

    def drag(self, session, state, point, modifiers):
        """The pointer moved to ``point`` with the button down."""

    def release(self, session, state, point, modifiers):
        """The button came up at ``point``: finish (commit a stroke, end painting)."""

    def cancel(self, session, state):
        """Esc, a tool change, an undo: drop what ``state`` was doing; leave nothing half-done."""

    def outline(self, session, state):
        """``(center (3,), radius)`` of the ring to draw during the drag, or None."""
        return None

    def markers(self, session):
        """(k, 3) float64 points of this tool's own to draw as markers (handles), or None."""
        return None
