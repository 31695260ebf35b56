"""The viewer's tools: one module per tool, each registered once in :data:`REGISTERED`.

:class:`viewer.session.Session` holds the state (mesh, camera, settings, pins, mask, history)
and dispatches events; what a tool does with them lives here:

========================  ===================================================================
module                    job
========================  ===================================================================
``strokes``               grab, twist, scale and pinch: a drag previews, release commits one
                          recipe stroke
``pins``                  click to place or remove a pin; Delete removes every pin
``mask``                  drag to paint hold, Shift erases; Shift+Delete clears
``handles``               click to place handles; drag one to its target while the others
                          hold (Shift turns it); one ``handles`` recipe stroke per drag
``export``                Ctrl+S, Ctrl+E, Ctrl+D: recipe, posed mesh, corrective shape
``playback``              F5 plays the strokes so far as motion with their secondary motion,
                          F6 the settle of the stroke just made, F7 steps a frame
========================  ===================================================================

The contract (base classes in :mod:`viewer.tools.base`)
-------------------------------------------------------
A **command set** subclasses :class:`~viewer.tools.base.Commands` and lists its key rows in the
class attribute ``bindings``, a tuple of ``(chord, action, description)`` (chords as
:func:`viewer.bindings.chord` names them: ``"Ctrl+S"``, ``"Delete"``). When the key goes down
the session calls ``instance.run(session, action)``, which by default calls
``instance.do_<action>(session)``; a returned string becomes the status message, and an
``OSError`` or ``ValueError`` is shown as ``failed: ...``.

A **tool** subclasses :class:`~viewer.tools.base.Tool` (a command set with pointer
behaviour) and sets ``name`` (the action ``tool_<name>`` selects it), ``label`` (status line),
``key`` and ``summary`` (the selecting key's row), and optionally ``brush = True`` (it uses
radius, falloff and Poisson's ratio, and the ring follows the cursor) and
``orbit_off_model = False`` (a left press off the model still reaches the tool),
``markers(session)`` (points of its own to draw, or None) and
``edits = True`` (it commits strokes: refused while a recovery question is open). A left
press calls ``press(session, start, hit, modifiers)``; a non-None return value is the
tool's state for this drag and is passed back to ``drag(session, state, point, modifiers)``,
``release(session, state, point, modifiers)``, ``cancel(session, state)`` (Esc, tool change,
undo) and ``outline(session, state)`` (ring to draw, or None). Points are ``(x, y)`` floats in
window units; ``hit`` is a :class:`viewer.picking.Hit` on the committed surface.

One instance of each registered class lives per session, so a tool may keep its own state
on ``self``. Tools read the session's state and change it only through these calls:

* ``session.show(points)``: draw (n, 3) float64 positions (a preview) instead of the
  committed ones; ``session.restore()``: draw the committed ones again;
* ``session.commit(stroke)``: apply one recipe stroke dict (history, journal, picking);
* ``session.markers_changed()``: pins or mask changed, redraw them;
* ``session.say(text)``: a status message;
* read: ``history.points``, ``camera``, ``width``, ``height``, ``radius``, ``falloff``,
  ``poisson[kind]``, ``pins`` (list of (3,) arrays), ``hold`` ((n,) float64 in [0, 1]),
  ``mirror_plane()``, ``groups``, ``tolerance``, ``pick(x, y)``, ``hover``, ``shown()``,
  ``neighbours`` (vertex adjacency, a scipy CSR matrix), ``vertex_normals(indices)``.

Adding a tool
-------------
Write ``viewer/tools/NAME.py`` with one :class:`~viewer.tools.base.Tool` subclass and add the
class to :data:`REGISTERED` below. Its key, its extra key rows and their actions then appear in
:data:`viewer.bindings.BINDINGS`, the F1 help panel and ``python -m viewer.app --bindings`` (the
README table); nothing else changes. Keys must not clash (a test checks the table).
"""

from viewer.tools import export, handles, mask, pins, playback, strokes
from viewer.tools.base import Commands, Tool

__all__ = ["REGISTERED", "Commands", "Tool"]

#: Every tool and command set, in the order their keys appear in the help panel.
REGISTERED = (strokes.Grab, strokes.Twist, strokes.Scale, strokes.Pinch, pins.Pins, mask.Mask,
              handles.Handles, export.Export, playback.Playback)
