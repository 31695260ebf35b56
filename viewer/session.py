"""The viewer's interaction state and event dispatch (no OpenGL, no window).

:class:`Session` holds the mesh, camera, brush settings, pins, mask, undo history and journal,
and routes events: camera drags to :mod:`viewer.camera`, left drags on the model to the
current tool (:mod:`viewer.tools`: the brushes, pins, mask), keys through :data:`BINDINGS` to
the action they name. What the tools do, and the picking, gesture, history and journal maths,
live in their own modules. The window in :mod:`viewer.app` only forwards pyglet's events here
and draws what :meth:`Session.shown` returns, so tests drive a session exactly as a user
would, without a display.

Coordinates are pyglet's window units (origin bottom-left). Mouse buttons and modifier bits
use pyglet's values (:data:`LEFT`, :data:`MOD_SHIFT`, ...), and keys pyglet's symbol names
(``pyglet.window.key.symbol_string``: ``"_1"``, ``"COMMA"``, ``"Z"``), so the window passes
its arguments through untouched.
"""

from __future__ import annotations

import functools
import math
import os
import time
from pathlib import Path

import numpy as np

from brushes import checks
from brushes.surface import face_cross_products, signed_volume
from viewer import gesture
from viewer.bindings import (BINDINGS, LEFT, MIDDLE, MOD_ALT, MOD_COMMAND, MOD_CTRL, MOD_SHIFT,
                             MOUSE_ACTIONS, RIGHT, chord)
from viewer.camera import OrbitCamera
from viewer.tools import REGISTERED, Tool

# The bindings live in `viewer.bindings`; they are named here too, where callers have found them.
__all__ = ["Session", "BINDINGS", "MOUSE_ACTIONS", "chord", "sphere_mesh",
           "LEFT", "MIDDLE", "RIGHT", "MOD_SHIFT", "MOD_CTRL", "MOD_ALT", "MOD_COMMAND"]

FALLOFFS = ("wide", "medium", "tight")
#: Poisson's ratio each brush starts with (the engine's defaults: scale needs a compressible
#: material, the others default to incompressible).
POISSON_DEFAULTS = {"grab": 0.5, "twist": 0.5, "scale": 0.3, "pinch": 0.5}
POISSON_RANGE = (0.0, 0.5)
#: Preview tolerance as a fraction of the model's bounding-box diagonal: vertices the brush
#: provably moves less than this are left alone while dragging (far below a pixel).
PREVIEW_TOLERANCE = 1e-5
#: Seconds a status message stays on screen (questions stay until answered).
MESSAGE_SECONDS = 8.0


def sphere_mesh(subdivisions=4, radius=1.0):
    """A unit-ish sphere (subdivided icosahedron) to edit when no mesh is given.

    Returns
    -------
    vertices : (n, 3) float64
    faces : (m, 3) int64
    """
    import trimesh
    mesh = trimesh.creation.icosphere(subdivisions=int(subdivisions), radius=float(radius))
    return np.asarray(mesh.vertices, dtype=np.float64), np.asarray(mesh.faces, dtype=np.int64)


def _recovery_question(path, *, first=False):
    """The status-line question about a journal found at start-up."""
    from viewer.journal import ended_cleanly, read_events
    try:
        events = read_events(path)[1]
        how = ("kept from a session closed without saving a recipe" if ended_cleanly(events)
               else "left by an interrupted session")
    except (OSError, ValueError):
        how = "left by an earlier session (the journal is damaged; Enter says why)"
    lead = "answer first: " if first else ""
    return f"{lead}unsaved strokes {how}: Enter replays them, Backspace discards them"


def _fold_message(count, mask_caused):
    """The status line after a stroke turned ``count`` faces over."""
    what = f"{count} face{'s' if count != 1 else ''} turned over"
    if mask_caused:
        return (f"{what} by the mask: where its weight changes a mask gives up the no-folding "
                "guarantee; soften its edge or move less (Ctrl+Z undoes)")
    return f"{what} (normals past 90 degrees from rest; Ctrl+Z undoes)"


class _Drag:
    """What the current mouse drag is doing: ``mode`` "orbit", "pan" or "tool" (then ``tool``
    and its ``state``)."""

    def __init__(self, mode, start, tool=None, state=None):
        self.mode = mode
        self.start = start
        self.tool = tool
        self.state = state


class Session:
    """Interaction state of one viewer window.

    Parameters
    ----------
    vertices : (n, 3) float
        Rest positions (the mesh as loaded).
    faces : (m, 3) int
        Triangles.
    doc : brushes.formats.MeshDoc, optional, keyword-only
        The loaded document, for exporting the posed mesh and corrective shape in the same
        format and structure (default: a plain document made from the arrays).
    mesh_path : str or os.PathLike, optional, keyword-only
        The mesh file: names the outputs and the journal (``<mesh>.pliant-journal``). Without
        it nothing is journalled and outputs go to ``out_dir``.
    out_dir : str or os.PathLike, optional, keyword-only
        Folder for outputs (default: the mesh file's folder, else the current folder).
    size : (width, height), keyword-only
        Window size in window units.
    journal : bool, keyword-only
        Journal finished strokes (default True when ``mesh_path`` is given).
    journal_anchor : str or os.PathLike, optional, keyword-only
        The file the journal is named after (``<anchor>.pliant-journal``); default
        ``mesh_path``. The viewer anchors the bundled model's journal in the current folder
        so that nothing is written into the installed package.
    clock : callable, optional, keyword-only
        Seconds from a monotonic clock (default ``time.monotonic``); it times how long a
        status message stays (tests pass their own clock instead of waiting).
    threaded : bool, keyword-only
        Compute drag previews on a background thread (the window: True) or at once inside
        each drag event (default False: scripts and tests see every result immediately).
    picker : viewer.picking.Picker, optional, keyword-only
        A picker already built for ``vertices`` and ``faces`` (the window builds it while
        showing progress); default: built here.
    """

    def __init__(self, vertices, faces, *, doc=None, mesh_path=None, out_dir=None,
                 size=(1024, 768), journal=True, journal_anchor=None, clock=None,
                 threaded=False, picker=None):
        from brushes.formats import MeshDoc
        from viewer.history import History
        from viewer.picking import Picker
        from viewer.preview import PreviewWorker

        rest = np.array(checks.points("vertices", vertices), dtype=np.float64, order="C", copy=True)
        if len(rest) == 0:
            raise checks.FieldError("vertices", "must hold at least one vertex, got shape (0, 3)")
        self.rest = rest
        self.faces = checks.faces("faces", faces, len(rest), allow_empty=False)
        self.doc = doc if doc is not None else MeshDoc.from_arrays(rest, self.faces)
        self.groups = getattr(self.doc, "groups", None)
        self.mesh_path = None if mesh_path is None else os.path.abspath(os.fspath(mesh_path))
        if out_dir is None:
            out_dir = os.path.dirname(self.mesh_path) if self.mesh_path else os.getcwd()
        self.out_dir = os.fspath(out_dir)
        self.stem = Path(self.mesh_path).stem if self.mesh_path else "sphere"
        self.width, self.height = (float(s) for s in size)

        self.history = History(rest, self._replay)
        self.picker = picker if picker is not None else Picker(rest, self.faces)
        self.previews = PreviewWorker(threaded=threaded)
        #: Milliseconds of the last frame's parts: "brush" (the worker's exact result),
        #: "normals", "upload" and "draw" (filled in by the window).
        self.budget = {}
        lo, hi = rest.min(axis=0), rest.max(axis=0)
        self.diagonal = float(np.linalg.norm(hi - lo)) or 1.0
        self.tolerance = PREVIEW_TOLERANCE * self.diagonal
        self.volume_rest = signed_volume(rest, self.faces)
        self._rest_cross = face_cross_products(rest, self.faces)
        self.flipped = np.zeros(len(self.faces), dtype=bool)  # faces turned > 90 deg from rest
        self.flags_version = 0  # bumped when `flipped` changes
        self.camera = OrbitCamera(yaw=math.radians(25.0), pitch=math.radians(12.0))
        self.camera.frame(lo, hi, aspect=self.width / self.height)

        self.tool = "grab"
        self.radius = 0.12 * self.diagonal
        self.falloff = "wide"
        self.poisson = dict(POISSON_DEFAULTS)
        self.mirror_on = False
        self.mirror_axis = "x"
        self.pins = []  # list of (3,) float64 points held still
        self.hold = np.zeros(len(rest))  # painted hold in [0, 1] per vertex
        self.show_magnitude = False
        self.show_help = False
        self._clock = clock if clock is not None else time.monotonic
        self._message, self._message_at, self._message_sticky = "", 0.0, False
        self.hover = None  # picked point under the cursor, or None
        self._cursor = None  # last window point of a motion event
        self.frame_ms = None
        self._frame_times = []
        self.saved_position = 0  # history position last saved as a recipe
        #: One instance per registered tool (by name) and command set; action -> its owner.
        self.tools = {}
        self._owners = {}
        for cls in REGISTERED:
            instance = cls()
            if isinstance(instance, Tool):
                self.tools[cls.name] = instance
            for action in cls.actions():
                self._owners[action] = instance

        self._shown = rest.copy()
        self._shown_normals = None
        self._worker_field = self._worker_basis = None  # the preview worker's normals
        self.shown_version = 0  # bumped whenever shown() changes
        self.markers_version = 0  # bumped when pins or mask change
        self._committed_volume = self.volume_rest
        self._drag = None

        self.journal = None
        self.pending_recovery = None
        self._closed = False
        anchor = journal_anchor if journal_anchor is not None else self.mesh_path
        self.journal_anchor = None if anchor is None else os.path.abspath(os.fspath(anchor))
        if journal and self.journal_anchor is not None:
            from viewer.journal import Journal, find_journal
            self.journal = Journal(self.journal_anchor, rest)
            found = find_journal(self.journal_anchor)
            if found:
                self.pending_recovery = found
                self.say(_recovery_question(found), sticky=True)

    # ------------------------------------------------------------------ messages
    @property
    def message(self):
        """The status message now on screen ("" once it has expired)."""
        if self._message_sticky or self._clock() - self._message_at < MESSAGE_SECONDS:
            return self._message
        return ""

    @message.setter
    def message(self, text):
        self.say(text)

    def say(self, text, *, sticky=False):
        """Show ``text`` in the status line for :data:`MESSAGE_SECONDS`, or with ``sticky``
        until the next message (questions that wait for an answer)."""
        self._message, self._message_at, self._message_sticky = str(text), self._clock(), sticky

    # ------------------------------------------------------------------ state for drawing
    @property
    def vertices(self):
        """(n, 3) float64 read-only committed positions (after the applied strokes)."""
        return self.history.points

    def shown(self):
        """(n, 3) float64 positions to draw: the stroke preview while dragging, else committed."""
        return self._shown

    def magnitude(self):
        """(n,) float64 distance of each shown vertex from its rest position."""
        return np.linalg.norm(self._shown - self.rest, axis=1)

    def volume_change(self):
        """Relative change of the enclosed volume since load, or None if it is not defined."""
        if abs(self.volume_rest) <= 1e-12 * self.diagonal**3:
            return None
        return self._committed_volume / self.volume_rest - 1.0

    def brush_outline(self):
        """Where to draw the brush: ``(center (3,), radius)`` or None when off the model.

        During a stroke it is the press point (moved along for a grab); otherwise the point
        under the cursor.
        """
        drag = self._drag
        if drag is not None and drag.mode == "tool":
            return drag.tool.outline(self, drag.state)
        if self.hover is None or not self.tools[self.tool].brush:
            return None
        return np.asarray(self.hover), self.radius

    def mirror_outline(self):
        """Where to draw the mirrored brush: ``(center (3,), radius)`` on the body, or None.

        The reflection of the brush centre is snapped to the nearest vertex of the shown
        surface (on a symmetric model, the reflected point itself), so the second ring sits on
        the body the reflected brush moves; None when mirroring is off, no brush is drawn, or
        no surface lies within the radius of the reflected centre (the reflection moves
        nothing there worth showing).
        """
        plane, outline = self.mirror_plane(), self.brush_outline()
        drag = self._drag
        if drag is not None and drag.mode == "tool" and hasattr(drag.state, "mirror"):
            mirror = drag.state.mirror  # the stroke's own plane, fixed at the press
            plane = None if mirror is None else (np.asarray(mirror["normal"]), np.asarray(mirror["point"]))
        if plane is None or outline is None:
            return None
        (normal, point), (center, radius) = plane, outline
        twin = center - 2.0 * float((center - point) @ normal) * normal
        offsets = self._shown - twin
        d2 = np.einsum("ij,ij->i", offsets, offsets)
        nearest = int(np.argmin(d2))
        if d2[nearest] > radius**2:
            return None
        return self._shown[nearest].copy(), radius

    @functools.cached_property
    def neighbours(self):
        """(n, n) scipy CSR matrix with a 1 where two vertices share an edge (faces fixed)."""
        import scipy.sparse
        f = self.faces
        rows = np.concatenate([f[:, 0], f[:, 1], f[:, 2], f[:, 1], f[:, 2], f[:, 0]])
        cols = np.concatenate([f[:, 1], f[:, 2], f[:, 0], f[:, 0], f[:, 1], f[:, 2]])
        n = len(self.rest)
        adjacency = scipy.sparse.csr_matrix((np.ones(len(rows), np.int8), (rows, cols)), shape=(n, n))
        adjacency.data[:] = 1
        return adjacency

    @functools.cached_property
    def _normal_operator(self):
        from brushes.surface import vertex_normal_operator
        return vertex_normal_operator(self.faces, len(self.rest))

    def vertex_normals(self, indices):
        """(k, 3) float64 unit area-weighted normals (:mod:`brushes.surface`'s formula) of the
        shown surface at the vertices ``indices`` ((k,) int), from their faces only."""
        rows = self._normal_operator[np.asarray(indices, dtype=np.int64)]
        used = np.unique(rows.indices)
        cross = face_cross_products(self._shown, self.faces[used])
        summed = np.asarray(rows[:, used] @ cross, dtype=np.float64)
        length = np.linalg.norm(summed, axis=1, keepdims=True)
        return np.divide(summed, length, out=np.zeros_like(summed), where=length > 0)

    def fold_flags(self):
        """(n,) float32: 1 on the corners of faces turned more than 90 degrees from rest."""
        flags = np.zeros(len(self.rest), dtype=np.float32)
        flags[self.faces[self.flipped].reshape(-1)] = 1.0
        return flags

    def mirror_plane(self):
        """``(normal (3,), point (3,))`` of the mirror plane, or None when mirroring is off."""
        if not self.mirror_on:
            return None
        normal = np.zeros(3)
        normal["xyz".index(self.mirror_axis)] = 1.0
        return normal, np.zeros(3)

    def status(self):
        """Numbers for the text overlay (see :func:`viewer.overlay.status_lines`)."""
        kind = self.tool
        return {
            "tool": self.tools[kind].label,
            "radius": self.radius,
            "falloff": self.falloff,
            "poisson": self.poisson.get(kind, self.poisson["grab"]),
            "mirror": self.mirror_axis if self.mirror_on else None,
            "vertices": len(self.rest),
            "volume_change": self.volume_change(),
            "frame_ms": self.frame_ms,
            "budget": dict(self.budget),
            "pins": len(self.pins),
            "flipped": int(np.count_nonzero(self.flipped)),
            "strokes": self.history.position,
            "redo": len(self.history.strokes) - self.history.position,
            "message": self.message,
        }

    # ------------------------------------------------------------------ window events
    def resize(self, width, height):
        """The window's new size in window units."""
        self.width, self.height = max(float(width), 1.0), max(float(height), 1.0)

    def pick(self, x, y):
        """The :class:`viewer.picking.Hit` under window point (x, y) on the committed surface."""
        origin, direction = self.camera.ray(x, y, self.width, self.height)
        return self.picker.pick(origin, direction)

    def motion(self, x, y):
        """The cursor moved with no button down: track the point under it for the outline."""
        self._cursor = (float(x), float(y))
        hit = self.pick(x, y)
        self.hover = hit.point if hit.hit else None

    def press(self, x, y, button, modifiers=0):
        """A mouse button went down at window point (x, y)."""
        if self._drag is not None:
            return
        start = (float(x), float(y))
        if button == MIDDLE or (button == RIGHT and modifiers & (MOD_CTRL | MOD_COMMAND)):
            self._drag = _Drag("pan", start)
        elif button == RIGHT:
            self._drag = _Drag("orbit", start)
        elif button == LEFT:
            hit = self.pick(x, y)
            tool = self.tools[self.tool]
            if not hit.hit and tool.orbit_off_model:
                self._drag = _Drag("orbit", start)
                return
            if tool.edits and self.pending_recovery is not None:
                # A stroke now would start a new journal over the unsaved one: ask first.
                self.say(_recovery_question(self.pending_recovery, first=True), sticky=True)
                return
            state = tool.press(self, start, hit, modifiers)
            if state is not None:
                self._drag = _Drag("tool", start, tool, state)

    def drag(self, x, y, dx, dy, buttons=LEFT, modifiers=0):
        """The mouse moved by (dx, dy) to (x, y) with a button down."""
        drag = self._drag
        if drag is None:
            return
        if drag.mode == "orbit":
            self.camera.orbit(dx, dy)
        elif drag.mode == "pan":
            self.camera.pan(dx, dy, self.height)
        else:
            drag.tool.drag(self, drag.state, (float(x), float(y)), modifiers)

    def release(self, x, y, button, modifiers=0):
        """A mouse button came up: a stroke in progress is committed."""
        drag, self._drag = self._drag, None
        if drag is None or drag.mode != "tool":
            return
        drag.tool.release(self, drag.state, (float(x), float(y)), modifiers)
        self.motion(x, y)  # the outline follows the surface now under the cursor

    def scroll(self, x, y, scroll_y, modifiers=0):
        """Mouse wheel: zoom, or with Shift the brush radius."""
        if modifiers & MOD_SHIFT:
            self.radius = gesture.wheel_radius(self.radius, scroll_y, min_radius=1e-4 * self.diagonal,
                                               max_radius=2.0 * self.diagonal)
        else:
            self.camera.zoom(1.1 ** float(scroll_y))

    def key(self, symbol_name, modifiers=0):
        """A key went down. Returns the action run (see :data:`BINDINGS`), or None."""
        name = chord(symbol_name, modifiers)
        action = next((a for k, a, _ in BINDINGS if k == name), None)
        if action is None:
            return None
        self.run(action)
        return action

    def actions(self):
        """Every action a key can run: the session's own, ``tool_<name>`` and the tools'."""
        own = {name[4:] for name in dir(type(self)) if name.startswith("_do_")}
        return own | {f"tool_{name}" for name in self.tools} | set(self._owners)

    def run(self, action):
        """Run one action of :data:`BINDINGS` by name (what its key does)."""
        if action.startswith("tool_") and action[5:] in self.tools:
            self._set_tool(action[5:])
        elif action in self._owners:
            owner = self._owners[action]
            self._report(lambda: owner.run(self, action))
        else:
            getattr(self, f"_do_{action}")()

    def _report(self, action):
        try:
            result = action()
        except (OSError, ValueError) as exc:
            self.message = f"failed: {exc}"
        else:
            if result is not None:
                self.message = result

    # ------------------------------------------------------------------ what tools call
    def show(self, points, *, normals=None):
        """Draw ``points`` ((n, 3) float64, kept by reference) instead of the committed shape;
        ``normals`` ((n, 3) float32) are theirs when already computed."""
        self._shown = points
        self._shown_normals = normals
        self.shown_version += 1

    def restore(self):
        """Draw the committed shape again (after a preview)."""
        self.show(np.array(self.history.points))

    def request_preview(self, key, job):
        """Ask the preview worker for ``job()`` ((n, 3) positions) under ``key`` =
        ``(stroke id, ...)``; the result is shown by :meth:`poll` while that stroke is the
        drag in progress (at once when not ``threaded``). The worker also computes the
        vertex normals of the result, off the UI thread, recomputing them only around
        vertices that moved more than :attr:`tolerance` since their normals were last
        computed (:meth:`viewer.render.NormalField.update`)."""
        self.previews.submit(key, self._with_normals(job))
        if not self.previews.threaded:
            self.poll()

    def _with_normals(self, job):
        def run():
            start = time.perf_counter()
            points = job()
            middle = time.perf_counter()
            normals, moved = self._preview_normals(points)
            return {"points": points, "normals": normals, "moved": moved,
                    "brush_ms": 1e3 * (middle - start),
                    "normals_ms": 1e3 * (time.perf_counter() - middle)}
        return run

    def _preview_normals(self, points):
        """Normals of ``points`` from the worker's own :class:`viewer.render.NormalField`
        (called on the worker thread only). Returns ``(normals (n, 3) float32 copy, share of
        vertices whose normals were recomputed)``."""
        from viewer.render import NormalField, moved_rows
        positions = np.asarray(points, dtype=np.float32)
        if self._worker_field is None:
            self._worker_field = NormalField(self.faces, len(self.rest))
            self._worker_field.full(positions)
            self._worker_basis = positions.copy()
            return self._worker_field.normals.copy(), 1.0
        moved = moved_rows(positions, self._worker_basis, self.tolerance)
        changed = self._worker_field.update(positions, moved)
        if len(moved) == len(positions) or len(changed) == len(positions):
            # one contiguous copy: a fancy-indexed copy of every row costs 40x more
            self._worker_basis[:] = positions
        else:
            self._worker_basis[moved] = positions[moved]
        return self._worker_field.normals.copy(), len(moved) / len(positions)

    def shown_normals(self):
        """(n, 3) float32 unnormalised vertex normals of :meth:`shown` when a preview
        brought them along, else None (the window computes them)."""
        return self._shown_normals

    def poll(self):
        """Show the newest finished preview of the drag in progress, if there is a new one
        (the window calls this every frame). Returns True when the shown shape changed."""
        result = self.previews.latest()
        drag = self._drag
        if result is None or drag is None or drag.mode != "tool":
            return False
        if result.key[0] != getattr(drag.state, "id", None):
            return False  # a late result of a stroke already finished or cancelled
        if result.error is not None:
            self.say(f"stroke refused: {result.error}")
            return False
        value = result.value
        self.budget.update(brush=value["brush_ms"], normals=value["normals_ms"],
                           moved=value["moved"])
        self.show(value["points"], normals=value["normals"])
        return True

    def settle(self):
        """Wait until the preview worker is idle and show its newest result (tests and
        benchmarks; waits on the worker's condition, not on a clock)."""
        self.previews.idle()
        return self.poll()

    def commit(self, stroke, *, points=None):
        """Apply one recipe stroke (dict): history, journal, picking and the shown shape.
        ``points`` ((n, 3) float64) is the stroke's result when the caller has it already
        (the last preview): it must be exactly the stroke's replay.

        When the stroke turns faces over, the status line says how many, and when they lie
        where a mask's weight changes it says that the mask is why (:func:`brushes.flow.apply`:
        ``x + w (phi(x) - x)`` folds where the motion times the mask's gradient exceeds 1, even
        though the flow ``phi`` itself cannot fold).
        """
        before, start = self.flipped.copy(), self.history.points
        same = points is not None and points is self._shown
        normals = self._shown_normals if same else None
        points = self.history.push(stroke, points=points)
        if self.journal is not None:
            self.journal.append(stroke)
            self.pending_recovery = None
        self._after_change(points, normals)
        new = self.flipped & ~before
        if new.any():
            self.say(_fold_message(int(new.sum()), self._mask_turned(stroke, start, new)))

    def markers_changed(self):
        """Pins or mask changed: the window redraws them."""
        self.markers_version += 1

    # ------------------------------------------------------------------ actions
    def _set_tool(self, tool):
        self.cancel()
        self.tool = tool
        self.say(self.tools[tool].summary)

    def _radius(self, factor):
        lo, hi = 1e-4 * self.diagonal, 2.0 * self.diagonal
        self.radius = min(max(self.radius * factor, lo), hi)
        limit = " (the smallest)" if self.radius == lo else " (the largest)" if self.radius == hi else ""
        self.say(f"brush radius {self.radius:.3g}{limit}")

    def _do_radius_down(self):
        self._radius(0.8)

    def _do_radius_up(self):
        self._radius(1.25)

    def _do_falloff_next(self):
        self.falloff = FALLOFFS[(FALLOFFS.index(self.falloff) + 1) % len(FALLOFFS)]
        self.say(f"falloff {self.falloff}")

    def _poisson_step(self, step):
        kind = self.tool if self.tool in POISSON_DEFAULTS else "grab"
        lo, hi = POISSON_RANGE
        self.poisson[kind] = round(min(max(self.poisson[kind] + step, lo), hi), 10)
        limit = (" (the most: incompressible, volume kept)" if self.poisson[kind] == hi
                 else " (the least)" if self.poisson[kind] == lo else "")
        self.say(f"Poisson's ratio of the {kind} brush {self.poisson[kind]:.2f}{limit}")

    def _do_poisson_down(self):
        self._poisson_step(-0.05)

    def _do_poisson_up(self):
        self._poisson_step(+0.05)

    def _do_mirror_toggle(self):
        self.mirror_on = not self.mirror_on
        self.say(f"mirror {self.mirror_axis}=0 on" if self.mirror_on else "mirror off")

    def _do_mirror_axis(self):
        self.mirror_axis = "xyz"[("xyz".index(self.mirror_axis) + 1) % 3]
        self.say(f"mirror plane {self.mirror_axis}=0" + ("" if self.mirror_on else
                                                         " (mirror is off: \\ turns it on)"))

    def _do_frame_all(self):
        shown = self._shown
        self.camera.frame(shown.min(axis=0), shown.max(axis=0), aspect=self.width / self.height)
        self.say("framed the whole model")

    def _do_overlay_toggle(self):
        self.show_magnitude = not self.show_magnitude
        self.say("colours: distance moved from rest (legend top right)" if self.show_magnitude
                 else "colours: clay")

    def _do_help_toggle(self):
        self.show_help = not self.show_help

    def _do_undo(self):
        self.undo()

    def _do_redo(self):
        self.redo()

    def _do_recover(self):
        if self.pending_recovery is not None:
            self._report(self.recover)
        else:
            self.say("no interrupted session to replay")

    def _do_recover_discard(self):
        if self.pending_recovery is not None:
            self.pending_recovery = None
            self.say("starting afresh: the old journal is replaced by the first stroke")
        else:
            self.say("no interrupted session to discard")

    def _do_cancel(self):
        active = self._drag is not None and self._drag.mode == "tool"
        self.cancel()
        self.say("stroke cancelled" if active else "nothing to cancel")

    def _do_quit(self):
        """The window closes itself on this action; the session has nothing to do."""

    # ------------------------------------------------------------------ history
    def _replay(self, points, stroke):
        """History's replay: one recipe stroke dict on (n, 3) positions (the recipe's code)."""
        from brushes.recipe import apply_stroke
        return apply_stroke(points, stroke, groups=self.groups)

    def cancel(self):
        """Drop the stroke (or camera drag) in progress; the committed shape is shown again."""
        drag, self._drag = self._drag, None
        if drag is not None and drag.mode == "tool":
            drag.tool.cancel(self, drag.state)

    def _mask_turned(self, stroke, start, faces):
        """True when the mask is why the stroke turned ``faces`` ((m,) bool) over: the same
        stroke without its mask, run on the corners of those faces only (a brush moves each
        point independently), leaves fewer of them turned over."""
        if stroke.get("mask") is None:
            return False
        from brushes.recipe import apply_stroke
        corners = np.unique(self.faces[faces])
        unmasked = np.array(start)
        plain = {k: v for k, v in stroke.items() if k != "mask"}
        unmasked[corners] = apply_stroke(start[corners], plain, groups=None)
        cross = face_cross_products(unmasked, self.faces[faces])
        still = np.einsum("ij,ij->i", self._rest_cross[faces], cross) < 0.0
        return int(still.sum()) < int(faces.sum())

    def _after_change(self, points, normals=None):
        self._shown = np.array(points)
        self._shown_normals = normals
        self.shown_version += 1
        self.picker.refit(self._shown)
        self._committed_volume = signed_volume(self._shown, self.faces)
        flipped = np.einsum("ij,ij->i", self._rest_cross,
                            face_cross_products(self._shown, self.faces)) < 0.0
        if not np.array_equal(flipped, self.flipped):
            self.flipped = flipped
            self.flags_version += 1
        if self._cursor is not None:  # the surface under the cursor may have moved or gone
            self.motion(*self._cursor)

    def undo(self):
        """Undo the last applied stroke (no-op with a message when there is none)."""
        if not self.history.can_undo:
            self.message = "nothing to undo"
            return
        self.cancel()
        points = self.history.undo()
        if self.journal is not None:
            self.journal.undo()
        self._after_change(points)
        self.message = ""

    def redo(self):
        """Redo the next stroke of the redo tail (no-op with a message when there is none)."""
        if not self.history.can_redo:
            self.message = "nothing to redo"
            return
        self.cancel()
        points = self.history.redo()
        if self.journal is not None:
            self.journal.redo()
        self._after_change(points)
        self.message = ""

    def recipe(self):
        """The applied strokes as a :class:`brushes.recipe.Recipe`."""
        from brushes.recipe import Recipe, parse_stroke
        return Recipe(tuple(parse_stroke(s) for s in self.history.applied))

    def recover(self):
        """Replay the journal of an interrupted session onto the rest mesh and keep appending
        to it. Returns a message."""
        from viewer.journal import Journal, find_journal, read_events, replay_events
        if self.journal_anchor is None:
            raise checks.FieldError("recover", "no mesh file, so no journal")
        path = find_journal(self.journal_anchor)
        if path is None:
            self.pending_recovery = None
            return "no journal to recover"
        strokes, position = replay_events(read_events(path, rest=self.rest)[1])
        self.cancel()
        if self.journal is not None:
            self.journal.close()
        for stroke in strokes:
            self.history.push(stroke)
        points = self.history.goto(position)
        self.journal = Journal(self.journal_anchor, self.rest, resume=True)
        self.pending_recovery = None
        self._after_change(points)
        return f"recovered {position} stroke{'s' if position != 1 else ''}"

    def close(self):
        """End the session: the journal is removed when everything applied was saved as a
        recipe (or nothing was done), and kept for recovery otherwise, marked as closed
        normally (so the next start does not call it interrupted). Safe to call twice."""
        if self._closed:
            return
        self._closed = True
        self.previews.close()
        if self.journal is None:
            return
        unsaved = self.history.position != self.saved_position or (
            self.history.position == 0 and self.pending_recovery is not None)
        if unsaved:
            self.journal.end()
        else:
            self.journal.clear()

    def tick(self, seconds):
        """Record the time the last frame took to draw; the overlay shows the median of the
        last 30 frames in milliseconds (so one slow first frame does not linger)."""
        self._frame_times.append(1000.0 * float(seconds))
        del self._frame_times[:-30]
        self.frame_ms = float(np.median(self._frame_times))

    @staticmethod
    def clock():
        """Seconds from a monotonic clock (for frame timing)."""
        return time.perf_counter()
