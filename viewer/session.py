"""The viewer's interaction state, driven by mouse and key events (no OpenGL, no window).

:class:`Session` holds the mesh, camera, brush settings, pins, mask, undo history and journal,
and turns events into calls of the pure modules: :mod:`viewer.camera` (orbit, pan, zoom,
frame all), :mod:`viewer.picking` (what is under the cursor), :mod:`viewer.gesture` (a drag
becomes brush parameters), :mod:`viewer.history` (undo/redo), :mod:`viewer.journal` (crash
recovery) and :mod:`brushes.recipe` (strokes). The window in :mod:`viewer.app` only forwards
pyglet's events here and draws what :meth:`Session.shown` returns, so tests drive a session
exactly as a user would, without a display.

Strokes: while the button is down the surface shows a cheap preview, the brush's one-step
displacement (``flow=False``) evaluated only on vertices nearer the centre than
``brush.reach(tol)``, the engine's proven bound beyond which every vertex moves less than
``tol``; a plain grab reuses ``Grab.response`` computed once per press (displacement =
response @ move, one fused numba pass when numba imports). On release the drag becomes one
recipe stroke, and the committed positions are exactly :func:`brushes.recipe.apply_stroke` of
that stroke on the positions at the press, the same call a recipe replay makes.

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

from viewer import gesture
from viewer.camera import OrbitCamera

__all__ = ["Session", "BINDINGS", "chord", "mesh_volume", "sphere_mesh", "grab_preview",
           "LEFT", "MIDDLE", "RIGHT", "MOD_SHIFT", "MOD_CTRL", "MOD_ALT"]

# Same values as pyglet.window.mouse and pyglet.window.key (pyglet is pinned; tests compare).
LEFT, MIDDLE, RIGHT = 1, 2, 4
MOD_SHIFT, MOD_CTRL, MOD_ALT, MOD_COMMAND = 1, 2, 4, 64

#: Every key and mouse binding: (key or mouse chord, action, description). The help panel and
#: the README table are generated from this list; :meth:`Session.key` dispatches on it.
BINDINGS = [
    ("1", "tool_grab", "grab brush: drag the surface along with the cursor"),
    ("2", "tool_twist", "twist brush: drag sideways to turn the surface about the view axis"),
    ("3", "tool_scale", "scale brush: drag up to swell, down to shrink"),
    ("4", "tool_pinch", "pinch brush: drag to stretch along the drag (Shift: squeeze along it)"),
    ("5", "tool_pin", "pin tool: click the surface to place a pin, click a pin to remove it"),
    ("6", "tool_mask", "mask tool: drag to paint hold (held areas stay still), Shift+drag erases"),
    (",", "radius_down", "brush radius smaller (x 0.8)"),
    (".", "radius_up", "brush radius larger (x 1.25)"),
    (";", "falloff_next", "next falloff: wide, medium, tight"),
    ("-", "poisson_down", "Poisson's ratio of the current brush -0.05"),
    ("=", "poisson_up", "Poisson's ratio of the current brush +0.05 (up to 0.5)"),
    ("\\", "mirror_toggle", "mirror strokes on/off"),
    ("/", "mirror_axis", "mirror plane: x=0, y=0, z=0 in turn"),
    ("Home", "frame_all", "frame all: fit the whole model in view"),
    ("F2", "overlay_toggle", "show or hide the displacement-magnitude colours"),
    ("F1", "help_toggle", "show or hide this help"),
    ("Delete", "pins_clear", "remove every pin"),
    ("Shift+Delete", "mask_clear", "clear the painted mask"),
    ("Ctrl+Z", "undo", "undo the last stroke"),
    ("Ctrl+Shift+Z", "redo", "redo"),
    ("Ctrl+Y", "redo", "redo"),
    ("Ctrl+S", "save_recipe", "save the strokes as a recipe (<mesh>-recipe.json)"),
    ("Ctrl+E", "export_mesh", "export the posed mesh (<mesh>-posed.<ext>)"),
    ("Ctrl+D", "export_delta", "export the corrective shape (<mesh>-pose.glb and .npz)"),
    ("Enter", "recover", "replay the strokes of an interrupted session (when offered)"),
    ("Backspace", "recover_discard", "discard those strokes and start afresh (when offered)"),
    ("Esc", "cancel", "cancel the stroke in progress"),
    ("Ctrl+Q", "quit", "close the viewer (unsaved strokes stay in the journal)"),
    ("Left drag on model", "stroke", "apply the current brush or tool"),
    ("Left drag off model", "orbit", "orbit the camera"),
    ("Right drag", "orbit", "orbit the camera"),
    ("Ctrl+Right drag", "pan", "pan the camera"),
    ("Middle drag", "pan", "pan the camera"),
    ("Wheel", "zoom", "zoom in and out"),
    ("Shift+Wheel", "radius", "brush radius"),
]

_KEY_NAMES = {
    "COMMA": ",", "PERIOD": ".", "SEMICOLON": ";", "MINUS": "-", "EQUAL": "=", "PLUS": "=",
    "BACKSLASH": "\\", "SLASH": "/", "HOME": "Home", "DELETE": "Delete", "ESCAPE": "Esc",
    "RETURN": "Enter", "ENTER": "Enter", "NUM_ENTER": "Enter", "BACKSPACE": "Backspace",
    "NUM_ADD": "=", "NUM_SUBTRACT": "-", "NUM_HOME": "Home", "NUM_DELETE": "Delete",
}

FALLOFFS = ("wide", "medium", "tight")
TOOLS = ("grab", "twist", "scale", "pinch", "pin", "mask")
#: Poisson's ratio each brush starts with (the engine's defaults: scale needs a compressible
#: material, the others default to incompressible).
POISSON_DEFAULTS = {"grab": 0.5, "twist": 0.5, "scale": 0.3, "pinch": 0.5}
POISSON_RANGE = (0.0, 0.5)
#: Preview tolerance as a fraction of the model's bounding-box diagonal: vertices the brush
#: provably moves less than this are left alone while dragging (far below a pixel).
PREVIEW_TOLERANCE = 1e-5
#: Screen distance (window units) within which a click removes a pin.
PIN_PICK_PIXELS = 10.0
#: Mask paint strength per paint event at the brush centre.
PAINT_STRENGTH = 0.5


def chord(symbol_name, modifiers=0):
    """The binding name of a key press: ``chord("Z", MOD_CTRL | MOD_SHIFT) == "Ctrl+Shift+Z"``.

    Parameters
    ----------
    symbol_name : str
        pyglet's symbol name (``pyglet.window.key.symbol_string(symbol)``), e.g. ``"_1"``,
        ``"COMMA"``, ``"F1"``, ``"Z"``.
    modifiers : int
        pyglet modifier bits; Caps Lock, Num Lock and the like are ignored, Command counts
        as Ctrl.
    """
    name = str(symbol_name)
    if name.startswith("NUM_") and name[4:].isdigit():
        name = name[4:]
    elif name.startswith("_") and name[1:].isdigit():
        name = name[1:]
    name = _KEY_NAMES.get(name, name)
    parts = []
    if modifiers & (MOD_CTRL | MOD_COMMAND):
        parts.append("Ctrl")
    if modifiers & MOD_ALT:
        parts.append("Alt")
    if modifiers & MOD_SHIFT:
        parts.append("Shift")
    return "+".join(parts + [name])


def mesh_volume(vertices, faces):
    """Signed volume enclosed by a closed, outward-wound triangle mesh (divergence theorem).

    ``V = sum over faces of a . (b x c) / 6``.

    Parameters
    ----------
    vertices : (n, 3) float
    faces : (m, 3) int

    Returns
    -------
    float
    """
    v = np.asarray(vertices, dtype=np.float64)
    if v.ndim != 2 or v.shape[1] != 3:
        raise ValueError(f"vertices: must have shape (n, 3), got {v.shape}")
    f = np.asarray(faces)
    if f.ndim != 2 or f.shape[1] != 3:
        raise ValueError(f"faces: must have shape (m, 3), got {f.shape}")
    a, b, c = v[f[:, 0]], v[f[:, 1]], v[f[:, 2]]
    return float(np.einsum("ij,ij->", a, np.cross(b, c)) / 6.0)


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


def _grab_preview_numpy(response, move, base_sorted, order, count, touched, shown, weights):
    k = response[:count]
    displacement = k[:, :, 0] * move[0] + k[:, :, 1] * move[1] + k[:, :, 2] * move[2]
    if weights is not None:
        displacement *= weights[:count, None]
    shown[order[:count]] = base_sorted[:count] + displacement
    shown[order[count:touched]] = base_sorted[count:touched]


@functools.lru_cache(maxsize=1)
def _grab_preview_numba():
    """The compiled preview kernel, or None without numba or with ``PLIANT_BACKEND=numpy``."""
    from brushes.kernels import numba_module

    numba = numba_module()
    if numba is None:
        return None

    @numba.njit(cache=True, nogil=True)
    def preview(response, move, base_sorted, order, count, touched, shown, weights, weighted):
        m0, m1, m2 = move[0], move[1], move[2]
        for i in range(count):
            w = weights[i] if weighted else 1.0
            j = order[i]
            for a in range(3):
                d = response[i, a, 0] * m0 + response[i, a, 1] * m1 + response[i, a, 2] * m2
                shown[j, a] = base_sorted[i, a] + w * d
        for i in range(count, touched):
            j = order[i]
            for a in range(3):
                shown[j, a] = base_sorted[i, a]

    return preview


def grab_preview(response, move, base_sorted, order, count, touched, shown, *, weights=None,
                 backend=None):
    """Write a grab's one-step preview into ``shown`` in place (the viewer's drag update).

    Vertices are handled in order of distance from the brush centre, so those within the
    brush's reach are the first ``count`` slots:
    ``shown[order[i]] = base_sorted[i] + weights[i] * response[i] @ move`` for ``i < count``,
    and slots ``count <= i < touched`` (moved by the previous update, now out of reach) go
    back to ``base_sorted[i]``.

    Parameters
    ----------
    response : (k, 3, 3) float32 or float64, k >= count
        ``brushes.Grab.response`` of the distance-sorted press positions.
    move : (3,) float
    base_sorted : (n, 3) float64
        Press positions in distance order.
    order : (n,) int
        Slot -> vertex index.
    count, touched : int
    shown : (n, 3) float64
        Written in place (vertex order).
    weights : (n,) float64 in distance order, optional, keyword-only
        Mask weights (1 moves freely, 0 holds).
    backend : {"numba", "numpy", None}, keyword-only
        None takes numba when it imports (one fused pass), else numpy.
    """
    move = np.asarray(move, dtype=np.float64)
    if move.shape != (3,):
        raise ValueError(f"move: must have shape (3,), got {move.shape}")
    count, touched = int(count), int(touched)
    if not 0 <= count <= len(response):
        raise ValueError(f"count: must lie in [0, {len(response)}], got {count}")
    if backend not in (None, "numba", "numpy"):
        raise ValueError(f"backend: must be 'numba', 'numpy' or None, got {backend!r}")
    kernel = None if backend == "numpy" else _grab_preview_numba()
    if backend == "numba" and kernel is None:
        raise ValueError("backend: numba is not available (missing, or PLIANT_BACKEND=numpy)")
    if kernel is None:
        _grab_preview_numpy(response, move, base_sorted, order, count, touched, shown, weights)
    else:
        kernel(response, move, base_sorted, order, count, max(touched, count), shown,
               weights if weights is not None else np.ones(1), weights is not None)


class _Drag:
    """What the current mouse drag is doing."""

    def __init__(self, mode, start, **data):
        self.mode = mode  # "stroke", "orbit", "pan", "paint"
        self.start = start
        self.__dict__.update(data)


class Session:
    """Interaction state of one viewer window.

    Parameters
    ----------
    vertices : (n, 3) float
        Rest positions (the mesh as loaded).
    faces : (m, 3) int
        Triangles.
    doc : brushes.meshio.MeshDoc, optional, keyword-only
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
    """

    def __init__(self, vertices, faces, *, doc=None, mesh_path=None, out_dir=None,
                 size=(1024, 768), journal=True, journal_anchor=None):
        from brushes.meshio import MeshDoc
        from viewer.history import History
        from viewer.picking import Picker

        rest = np.array(vertices, dtype=np.float64, order="C", copy=True)
        if rest.ndim != 2 or rest.shape[1] != 3 or len(rest) == 0:
            raise ValueError(f"vertices: must have shape (n, 3) with n > 0, got {rest.shape}")
        faces = np.asarray(faces)
        if faces.ndim != 2 or faces.shape[1] != 3 or len(faces) == 0:
            raise ValueError(f"faces: must have shape (m, 3) with m > 0, got {faces.shape}")
        self.rest = rest
        self.faces = np.ascontiguousarray(faces, dtype=np.int64)
        self.doc = doc if doc is not None else MeshDoc.from_arrays(rest, self.faces)
        self.groups = getattr(self.doc, "groups", None)
        self.mesh_path = None if mesh_path is None else os.path.abspath(os.fspath(mesh_path))
        if out_dir is None:
            out_dir = os.path.dirname(self.mesh_path) if self.mesh_path else os.getcwd()
        self.out_dir = os.fspath(out_dir)
        self.stem = Path(self.mesh_path).stem if self.mesh_path else "sphere"
        self.width, self.height = (float(s) for s in size)

        self.history = History(rest, self._replay)
        self.picker = Picker(rest, self.faces)
        lo, hi = rest.min(axis=0), rest.max(axis=0)
        self.diagonal = float(np.linalg.norm(hi - lo)) or 1.0
        self.tolerance = PREVIEW_TOLERANCE * self.diagonal
        self.volume_rest = mesh_volume(rest, self.faces)
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
        self.message = ""
        self.hover = None  # picked point under the cursor, or None
        self.frame_ms = None
        self._frame_times = []
        self.saved_position = 0  # history position last saved as a recipe

        self._shown = rest.copy()
        self.shown_version = 0  # bumped whenever shown() changes
        self.markers_version = 0  # bumped when pins or mask change
        self._committed_volume = self.volume_rest
        self._drag = None

        self.journal = None
        self.pending_recovery = None
        anchor = journal_anchor if journal_anchor is not None else self.mesh_path
        self.journal_anchor = None if anchor is None else os.path.abspath(os.fspath(anchor))
        if journal and self.journal_anchor is not None:
            from viewer.journal import Journal, find_journal
            self.journal = Journal(self.journal_anchor, rest)
            found = find_journal(self.journal_anchor)
            if found:
                self.pending_recovery = found
                self.message = ("unsaved strokes from an interrupted session were found: Enter "
                                "replays them; Backspace or a new stroke discards them")

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
        if drag is not None and drag.mode == "stroke":
            center = np.asarray(drag.center)
            if drag.params is not None and drag.params.get("move") is not None:
                center = center + np.asarray(drag.params["move"])
            return center, drag.radius
        if self.hover is None or self.tool == "pin":
            return None
        return np.asarray(self.hover), self.radius

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
            "tool": kind if kind in ("pin", "mask") else f"{kind} brush",
            "radius": self.radius,
            "falloff": self.falloff,
            "poisson": self.poisson.get(kind, self.poisson["grab"]),
            "mirror": self.mirror_axis if self.mirror_on else None,
            "vertices": len(self.rest),
            "volume_change": self.volume_change(),
            "frame_ms": self.frame_ms,
            "pins": len(self.pins),
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
            if self.tool == "pin":
                self._toggle_pin(x, y, hit)
            elif not hit.hit:
                self._drag = _Drag("orbit", start)
            elif self.tool == "mask":
                self._drag = _Drag("paint", start, erase=bool(modifiers & MOD_SHIFT))
                self._paint(hit.point, erase=self._drag.erase)
            else:
                self._begin_stroke(start, hit, modifiers)

    def drag(self, x, y, dx, dy, buttons=LEFT, modifiers=0):
        """The mouse moved by (dx, dy) to (x, y) with a button down."""
        drag = self._drag
        if drag is None:
            return
        if drag.mode == "orbit":
            self.camera.orbit(dx, dy)
        elif drag.mode == "pan":
            self.camera.pan(dx, dy, self.height)
        elif drag.mode == "paint":
            hit = self.pick(x, y)
            if hit.hit:
                self._paint(hit.point, erase=drag.erase)
        elif drag.mode == "stroke":
            drag.invert = bool(modifiers & MOD_SHIFT)
            self._update_stroke((float(x), float(y)))

    def release(self, x, y, button, modifiers=0):
        """A mouse button came up: a stroke in progress is committed."""
        drag, self._drag = self._drag, None
        if drag is None:
            return
        if drag.mode == "stroke":
            if (float(x), float(y)) != drag.current:
                drag.invert = bool(modifiers & MOD_SHIFT)
                self._update_stroke((float(x), float(y)), drag=drag)
            self._commit(drag)
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
        getattr(self, f"_do_{action}")()
        return action

    # ------------------------------------------------------------------ actions
    def _do_tool_grab(self):
        self._set_tool("grab")

    def _do_tool_twist(self):
        self._set_tool("twist")

    def _do_tool_scale(self):
        self._set_tool("scale")

    def _do_tool_pinch(self):
        self._set_tool("pinch")

    def _do_tool_pin(self):
        self._set_tool("pin")

    def _do_tool_mask(self):
        self._set_tool("mask")

    def _set_tool(self, tool):
        self.cancel()
        self.tool = tool
        self.message = ""

    def _do_radius_down(self):
        self.radius = max(self.radius * 0.8, 1e-4 * self.diagonal)

    def _do_radius_up(self):
        self.radius = min(self.radius * 1.25, 2.0 * self.diagonal)

    def _do_falloff_next(self):
        self.falloff = FALLOFFS[(FALLOFFS.index(self.falloff) + 1) % len(FALLOFFS)]

    def _poisson_step(self, step):
        kind = self.tool if self.tool in POISSON_DEFAULTS else "grab"
        lo, hi = POISSON_RANGE
        self.poisson[kind] = round(min(max(self.poisson[kind] + step, lo), hi), 10)

    def _do_poisson_down(self):
        self._poisson_step(-0.05)

    def _do_poisson_up(self):
        self._poisson_step(+0.05)

    def _do_mirror_toggle(self):
        self.mirror_on = not self.mirror_on

    def _do_mirror_axis(self):
        self.mirror_axis = "xyz"[("xyz".index(self.mirror_axis) + 1) % 3]

    def _do_frame_all(self):
        shown = self._shown
        self.camera.frame(shown.min(axis=0), shown.max(axis=0), aspect=self.width / self.height)

    def _do_overlay_toggle(self):
        self.show_magnitude = not self.show_magnitude

    def _do_help_toggle(self):
        self.show_help = not self.show_help

    def _do_pins_clear(self):
        self.pins = []
        self.markers_version += 1

    def _do_mask_clear(self):
        self.hold[:] = 0.0
        self.markers_version += 1

    def _do_undo(self):
        self.undo()

    def _do_redo(self):
        self.redo()

    def _do_save_recipe(self):
        self._report(self.save_recipe)

    def _do_export_mesh(self):
        self._report(self.export_mesh)

    def _do_export_delta(self):
        self._report(self.export_delta)

    def _do_recover(self):
        if self.pending_recovery is not None:
            self._report(self.recover)

    def _do_recover_discard(self):
        if self.pending_recovery is not None:
            self.pending_recovery = None
            self.message = "starting afresh: the old journal is replaced by the first stroke"

    def _do_cancel(self):
        self.cancel()

    def _do_quit(self):
        """The window closes itself on this action; the session has nothing to do."""

    def _report(self, action):
        try:
            result = action()
        except (OSError, ValueError) as exc:
            self.message = f"failed: {exc}"
        else:
            self.message = result

    # ------------------------------------------------------------------ strokes
    def _replay(self, points, stroke):
        """History's replay: one recipe stroke dict on (n, 3) positions (the recipe's code)."""
        from brushes.recipe import apply_stroke
        return apply_stroke(points, stroke, groups=self.groups)

    @staticmethod
    def _brush_kwargs(drag):
        """The brush's keyword arguments: the gesture's, plus the material fixed at the press."""
        kwargs = {k: v for k, v in drag.params.items() if k != "kind"}
        kwargs["poisson"] = drag.poisson
        kwargs["falloff"] = drag.falloff
        return kwargs

    def _stroke_extras(self):
        """The stroke's pins, mirror and mask fields (JSON-ready), None where unused."""
        pins = [list(map(float, p)) for p in self.pins] or None
        plane = self.mirror_plane()
        mirror = None if plane is None else {"normal": plane[0].tolist(), "point": plane[1].tolist()}
        mask = None
        if np.any(self.hold > 0):
            mask = {"weights": (1.0 - self.hold).tolist()}
        return pins, mirror, mask

    def _begin_stroke(self, start, hit, modifiers):
        base = np.array(self.history.points)  # a writable copy of the positions at the press
        center = np.asarray(hit.point, dtype=np.float64)
        offsets = base - center
        distance = np.sqrt(np.einsum("ij,ij->i", offsets, offsets))
        # Vertices sorted by distance from the centre: the ones inside a reach are a prefix.
        order = np.argsort(distance, kind="stable")
        inverse = np.empty_like(order)
        inverse[order] = np.arange(len(order))
        base_sorted = base.take(order, axis=0)
        drag = _Drag("stroke", start, kind=self.tool, center=center, normal=np.asarray(hit.normal),
                     base=base, order=order, inverse=inverse, base_sorted=base_sorted,
                     shown_sorted=base_sorted.copy(), sorted_distance=distance[order],
                     current=start, params=None, invert=bool(modifiers & MOD_SHIFT),
                     touched=None, touched_count=0, response=None, weights=None,
                     weights_sorted=None,
                     # Settings are fixed for the whole stroke (a key or wheel mid-drag
                     # changes the next stroke, not this one or its cached response).
                     radius=self.radius, falloff=self.falloff, poisson=self.poisson[self.tool])
        pins, mirror, mask = self._stroke_extras()
        drag.pins, drag.mirror, drag.mask = pins, mirror, mask
        if mask is not None:
            drag.weights = np.asarray(mask["weights"])
            drag.weights_sorted = drag.weights[order]
        plane = self.mirror_plane()
        if plane is not None:
            normal, point = plane
            reflected = center - 2.0 * ((center - point) @ normal) * normal
            mirror_distance = np.linalg.norm(base - reflected, axis=1)
            drag.mirror_order = np.argsort(mirror_distance, kind="stable")
            drag.mirror_sorted_distance = mirror_distance[drag.mirror_order]
        self._shown = base.copy()
        self._drag = drag

    def _stroke_params(self, drag, current):
        params = gesture.drag_params(drag.kind, self.camera, drag.center, drag.radius, drag.start,
                                     current, self.width, self.height, invert=drag.invert)
        return params

    def _update_stroke(self, current, *, drag=None):
        """Recompute the preview for the drag now at window point ``current``."""
        drag = drag or self._drag
        drag.current = current
        drag.params = self._stroke_params(drag, current)
        if drag.pins is not None:
            # Pins need the engine's counter-loads: preview with the stroke itself, one step
            # (flow=False) on every vertex.
            self._preview_pinned(drag)
            return
        brush = self._brush(drag)
        plane = self.mirror_plane()
        if plane is None:
            # Work on the distance-sorted copy: the vertices within reach are its first
            # `count` rows, so no scattered indexing is needed until the final reordering.
            count = self._within(drag.sorted_distance, brush.reach(self.tolerance))
            if drag.kind == "grab":
                grab_preview(self._grab_response(drag, count), drag.params["move"],
                             drag.base_sorted, drag.order, count, drag.touched_count,
                             self._shown, weights=drag.weights_sorted)
                drag.touched_count = count
                self.shown_version += 1
                return
            displacement = brush.displacement(drag.base_sorted[:count])
            if drag.weights_sorted is not None:
                displacement = displacement * drag.weights_sorted[:count, None]
            np.add(drag.base_sorted[:count], displacement, out=drag.shown_sorted[:count])
            # Rows moved last time but now beyond the reach go back to the press positions.
            drag.shown_sorted[count:drag.touched_count] = drag.base_sorted[count:drag.touched_count]
            drag.touched_count = count
            np.take(drag.shown_sorted, drag.inverse, axis=0, out=self._shown)
            self.shown_version += 1
            return
        # Brush and reflection each move a vertex by less than tol/2 beyond their reach (the
        # engine's bound), so together by less than tol outside both balls.
        from brushes import mirror as mirror_brush
        reach = brush.reach(0.5 * self.tolerance)
        near = np.zeros(len(drag.base), dtype=bool)
        near[drag.order[: self._within(drag.sorted_distance, reach)]] = True
        near[drag.mirror_order[: self._within(drag.mirror_sorted_distance, reach)]] = True
        idx = np.flatnonzero(near)
        points = drag.base.take(idx, axis=0)
        displacement = mirror_brush(brush, plane[0], plane[1]).displacement(points)
        if drag.weights is not None:
            displacement = displacement * drag.weights[idx, None]
        if drag.touched is not None:
            self._shown[drag.touched] = drag.base.take(drag.touched, axis=0)
        self._shown[idx] = points + displacement
        drag.touched = idx
        self.shown_version += 1

    @staticmethod
    def _within(sorted_distance, reach):
        """How many of the ascending distances lie below ``reach`` (all of them for inf)."""
        return int(np.searchsorted(sorted_distance, float(reach), side="left"))

    def _grab_response(self, drag, count):
        """``brushes.Grab.response`` of the first ``count`` distance-sorted press positions,
        (>= count, 3, 3) float32, computed lazily for as many vertices as the reach has asked
        for so far (float32 is plenty for a preview and halves the memory traffic)."""
        done = 0 if drag.response is None else len(drag.response)
        if count > done:
            import brushes
            probe = brushes.Grab(drag.center, drag.radius, [0.0, 0.0, 0.0],
                                 poisson=drag.poisson, falloff=drag.falloff)
            extra = np.asarray(probe.response(drag.base_sorted[done:count]), dtype=np.float32)
            drag.response = extra if drag.response is None else np.concatenate(
                [drag.response, extra])
        return drag.response

    def _preview_pinned(self, drag):
        stroke = self._make_stroke(drag, flow=False)
        points = stroke.apply(drag.base, groups=self.groups)
        self._shown = points
        self.shown_version += 1

    def _brush(self, drag):
        from brushes import registry
        return registry.lookup(drag.kind)(**self._brush_kwargs(drag))

    def _make_stroke(self, drag, *, flow=True):
        from brushes.recipe import Stroke
        kwargs = self._brush_kwargs(drag)
        return Stroke(drag.kind, kwargs, flow=flow, pins=drag.pins, mirror=drag.mirror,
                      mask=drag.mask)

    def _commit(self, drag):
        if drag.params is None or drag.current == drag.start:
            self._shown = np.array(self.history.points)
            self.shown_version += 1
            return
        stroke = self._make_stroke(drag).to_dict()
        points = self.history.push(stroke)
        if self.journal is not None:
            self.journal.append(stroke)
            self.pending_recovery = None
        self._after_change(points)

    def cancel(self):
        """Drop the stroke (or camera drag) in progress; the committed shape is shown again."""
        drag, self._drag = self._drag, None
        if drag is not None and drag.mode == "stroke":
            self._shown = np.array(self.history.points)
            self.shown_version += 1

    def _after_change(self, points):
        self._shown = np.array(points)
        self.shown_version += 1
        self.picker.refit(self._shown)
        self._committed_volume = mesh_volume(self._shown, self.faces)

    # ------------------------------------------------------------------ history
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
            raise ValueError("recover: no mesh file, so no journal")
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

    # ------------------------------------------------------------------ pins and mask
    def _toggle_pin(self, x, y, hit):
        if self.pins:
            screen = self.camera.project(np.asarray(self.pins), self.width, self.height)
            gap = np.hypot(screen[:, 0] - x, screen[:, 1] - y)
            nearest = int(np.nanargmin(gap)) if np.any(np.isfinite(gap)) else -1
            if nearest >= 0 and gap[nearest] <= PIN_PICK_PIXELS:
                del self.pins[nearest]
                self.markers_version += 1
                return
        if hit.hit:
            self.pins.append(np.asarray(hit.point, dtype=np.float64))
            self.markers_version += 1

    def _paint(self, point, *, erase=False):
        """Add (or with ``erase`` remove) hold around ``point`` with a smooth bump of the
        brush radius: ``PAINT_STRENGTH * (1 - (d/r)^2)^2`` for d < r."""
        d2 = np.einsum("ij,ij->i", self._shown - point, self._shown - point) / self.radius**2
        near = d2 < 1.0
        amount = PAINT_STRENGTH * (1.0 - d2[near]) ** 2
        self.hold[near] = np.clip(self.hold[near] + (-amount if erase else amount), 0.0, 1.0)
        self.markers_version += 1

    # ------------------------------------------------------------------ files
    def _output(self, suffix):
        return os.path.join(self.out_dir, f"{self.stem}{suffix}")

    def save_recipe(self, path=None):
        """Write the applied strokes as a recipe (default ``<mesh>-recipe.json``).

        Returns a message naming the file. After the save the journal is removed on a clean
        exit (:meth:`close`).
        """
        from brushes.recipe import save_recipe
        path = path or self._output("-recipe.json")
        save_recipe(self.recipe(), path)
        self.saved_position = self.history.position
        return f"recipe saved: {path}"

    def export_mesh(self, path=None):
        """Write the posed mesh in the source format (default ``<mesh>-posed.<ext>``)."""
        from brushes.meshio import save_mesh
        ext = (self.doc.format or "obj") if self.doc is not None else "obj"
        path = path or self._output(f"-posed.{ext}")
        save_mesh(self.doc, path, vertices=np.asarray(self.history.points))
        return f"posed mesh written: {path}"

    def export_delta(self, path=None):
        """Write the corrective shape (default ``<mesh>-pose.glb`` and ``<mesh>-pose.npz``)."""
        from brushes.correctives import write_delta
        paths = [path] if path else [self._output("-pose.glb"), self._output("-pose.npz")]
        for p in paths:
            write_delta(p, self.doc, np.asarray(self.history.points))
        return "corrective shape written: " + ", ".join(map(str, paths))

    def close(self):
        """End the session: the journal is removed when everything applied was saved as a
        recipe (or nothing was done), and kept for recovery otherwise."""
        if self.journal is None:
            return
        unsaved = self.history.position != self.saved_position or (
            self.history.position == 0 and self.pending_recovery is not None)
        if unsaved:
            self.journal.close()
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
