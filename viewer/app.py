"""The viewer window: pyglet events go to :class:`viewer.session.Session`, pictures come from
:mod:`viewer.render`.

``run(mesh_path=None, *, recover=False)`` is what ``pliant view [MESH] [--recover]`` calls.
Without a mesh it opens the bundled workshop mascot (``models/mascot.obj``), or a generated
sphere when the model is not installed.

The window's handlers only forward to the session and redraw; every decision (what a drag
does, which key does what) is in the session and its pure helpers, and every binding is listed
once in :data:`viewer.session.BINDINGS`, from which the help panel (F1) is made.

Run ``python -m viewer.app --bindings`` to print the bindings as a Markdown table.
"""

from __future__ import annotations

import os
import sys

import numpy as np

from viewer import overlay, palette
from viewer.session import BINDINGS, Session, sphere_mesh

__all__ = ["run", "open_viewer", "load_model", "Viewer", "ViewerError", "BINDINGS", "MODEL_NAME"]

MODEL_NAME = "mascot.obj"
TITLE = "pliant"
#: Diameter of a pin marker's brass disc in pixels (a 3-pixel dark rim goes round it).
PIN_PIXELS = 14.0


class ViewerError(RuntimeError):
    """The viewer window cannot be opened (no display, no OpenGL 3.3)."""


def _bundled_model():
    """Path of the bundled mascot, or None when it is not installed."""
    from brushes.demo import model_dirs
    for folder in model_dirs():
        candidate = folder / MODEL_NAME
        if candidate.is_file():
            return candidate
    return None


def load_model(mesh_path=None):
    """What to open, as keyword arguments of :class:`viewer.session.Session` plus
    ``vertices`` and ``faces``.

    mesh_path : str or os.PathLike or None
        A mesh file (outputs and journal beside it); None opens the bundled mascot (outputs
        and journal in the current folder, nothing written into the package), or a generated
        sphere when the model is not installed (outputs in the current folder, no journal).
    """
    from brushes.formats import load_mesh
    if mesh_path is not None:
        doc = load_mesh(mesh_path)
        return {"vertices": doc.vertices, "faces": doc.faces, "doc": doc,
                "mesh_path": os.fspath(mesh_path)}
    bundled = _bundled_model()
    if bundled is not None:
        doc = load_mesh(bundled)
        return {"vertices": doc.vertices, "faces": doc.faces, "doc": doc,
                "mesh_path": str(bundled), "out_dir": os.getcwd(),
                "journal_anchor": os.path.join(os.getcwd(), MODEL_NAME)}
    vertices, faces = sphere_mesh()
    return {"vertices": vertices, "faces": faces, "out_dir": os.getcwd(), "journal": False}


class Viewer:
    """Event handlers of one window, pushed onto it with ``window.push_handlers``.

    Parameters
    ----------
    window : pyglet.window.Window
        Its OpenGL context must be current.
    session : viewer.session.Session
    """

    def __init__(self, window, session):
        import pyglet
        from pyglet.window import key

        from viewer.render import MarkerRenderer, MeshRenderer

        self.window = window
        self.session = session
        self.mesh = MeshRenderer(session.shown(), session.faces)
        self.markers = MarkerRenderer()
        self._shown_version = session.shown_version
        self._markers_version = None
        self._key = key
        self.keys = key.KeyStateHandler()
        text = tuple(int(255 * c) for c in palette.TEXT) + (255,)
        self.status = pyglet.text.Label("", x=12, y=12, anchor_y="bottom", multiline=True,
                                        width=max(window.width - 24, 100), font_size=11,
                                        color=text)
        panel = tuple(int(255 * c) for c in palette.PANEL)
        self.panel = pyglet.shapes.Rectangle(0, 0, 10, 10, color=panel)
        self.panel.opacity = 204
        self._legend_batch = pyglet.graphics.Batch()
        self._legend = self._make_legend(pyglet, self._legend_batch, text)
        self._flags_version = None
        self.help = pyglet.text.Label("\n".join(overlay.help_lines(BINDINGS)), x=24, y=0,
                                      anchor_y="top", multiline=True, width=820, font_size=10,
                                      font_name=("DejaVu Sans Mono", "Consolas", "Menlo", "monospace"),
                                      color=text)
        window.push_handlers(self.keys)
        window.push_handlers(self)
        # pyglet holds pushed handlers weakly: the window keeps its viewer alive, so whoever
        # holds the window (pyglet's loop holds neither) holds the handlers too.
        window.pliant_viewer = self
        session.resize(*window.get_size())

    #: The F2 legend: a ramp bar of this many cells and size (window units), top right.
    LEGEND_CELLS, LEGEND_WIDTH, LEGEND_HEIGHT = 48, 240, 14

    def _make_legend(self, pyglet, batch, text):
        cells = []
        colours = palette.ramp(np.linspace(0.0, 1.0, self.LEGEND_CELLS))
        width = self.LEGEND_WIDTH / self.LEGEND_CELLS
        rim = pyglet.shapes.Rectangle(0, 0, self.LEGEND_WIDTH + 4, self.LEGEND_HEIGHT + 4,
                                      color=tuple(int(255 * c) for c in palette.PANEL), batch=batch)
        for k, colour in enumerate(colours):
            cells.append(pyglet.shapes.Rectangle(0, 0, width + 0.5, self.LEGEND_HEIGHT,
                                                 color=tuple(int(round(255 * c)) for c in colour),
                                                 batch=batch))
        low = pyglet.text.Label("0", font_size=10, color=text, anchor_x="left", batch=batch)
        high = pyglet.text.Label("", font_size=10, color=text, anchor_x="right", batch=batch)
        title = pyglet.text.Label("distance moved from rest", font_size=10, color=text,
                                  anchor_x="left", batch=batch)
        return {"rim": rim, "cells": cells, "low": low, "high": high, "title": title, "top": None}

    def legend_box(self):
        """(x, y, width, height) of the legend's colour bar in window units (top right)."""
        width, height = self.window.get_size()
        return (width - self.LEGEND_WIDTH - 24, height - 44, self.LEGEND_WIDTH, self.LEGEND_HEIGHT)

    def _draw_legend(self):
        legend = self._legend
        x, y, w, h = self.legend_box()
        legend["rim"].position = (x - 2, y - 2)
        step = w / self.LEGEND_CELLS
        for k, cell in enumerate(legend["cells"]):
            cell.position = (x + k * step, y)
        top = float(self.session.magnitude().max())
        if top != legend["top"]:
            legend["high"].text = f"{top:.3g}"
            legend["top"] = top
        legend["low"].position = (x, y - 16, 0)
        legend["high"].position = (x + w, y - 16, 0)
        legend["title"].position = (x, y + h + 6, 0)
        self._legend_batch.draw()

    # ------------------------------------------------------------------ events
    def on_resize(self, width, height):
        self.session.resize(width, height)
        self.status.width = max(width - 24, 100)

    def on_mouse_motion(self, x, y, dx, dy):
        self.session.motion(x, y)

    def on_mouse_press(self, x, y, button, modifiers):
        self.session.press(x, y, button, modifiers)

    def on_mouse_drag(self, x, y, dx, dy, buttons, modifiers):
        self.session.drag(x, y, dx, dy, buttons, modifiers)

    def on_mouse_release(self, x, y, button, modifiers):
        self.session.release(x, y, button, modifiers)

    def on_mouse_scroll(self, x, y, scroll_x, scroll_y):
        key = self._key
        shift = self.keys[key.LSHIFT] or self.keys[key.RSHIFT]
        self.session.scroll(x, y, scroll_y, key.MOD_SHIFT if shift else 0)

    def on_key_press(self, symbol, modifiers):
        import pyglet
        action = self.session.key(self._key.symbol_string(symbol), modifiers)
        if action == "quit":
            self.window.dispatch_event("on_close")
        # Handled keys (Esc above all, which pyglet would take as "close") stop here.
        return pyglet.event.EVENT_HANDLED if action is not None else None

    def on_close(self):
        self.session.close()

    def close(self):
        """End the session (journal kept or removed, see :meth:`Session.close`) and close the
        window; safe to call more than once."""
        self.session.close()
        if not self.window.has_exit or self.window.context is not None:
            self.window.close()

    def on_draw(self):
        start = self.session.clock()
        self.draw()
        self.session.tick(self.session.clock() - start)

    # ------------------------------------------------------------------ drawing
    def sync(self):
        """Upload what changed in the session since the last frame."""
        session = self.session
        if session.shown_version != self._shown_version:
            self.mesh.set_positions(session.shown())
            self._shown_version = session.shown_version
            if self.mesh.show_magnitude:
                self.mesh.set_magnitude(session.magnitude())
        if self.mesh.show_magnitude != session.show_magnitude:
            self.mesh.show_magnitude = session.show_magnitude
            if session.show_magnitude:
                self.mesh.set_magnitude(session.magnitude())
        if session.markers_version != self._markers_version:
            self.mesh.set_hold(session.hold)
            self._markers_version = session.markers_version
        if session.flags_version != self._flags_version:
            self.mesh.set_fold(session.fold_flags())
            self._flags_version = session.flags_version

    def draw(self):
        """Draw one frame into the current framebuffer."""
        from pyglet import gl

        from viewer.render import ring_points

        session = self.session
        self.sync()
        width, height = self.window.get_size()
        gl.glClearColor(*palette.BACKGROUND, 1.0)
        self.window.clear()
        camera = session.camera
        view = camera.view_matrix()
        projection = camera.projection_matrix(width / max(height, 1))
        self.mesh.draw(view, projection)
        self.markers.set_camera(view, projection)
        outline = session.brush_outline()
        if outline is not None:
            center, radius = outline
            right, up = camera.right(), camera.up()
            self.markers.loop(ring_points(center, radius, right, up), palette.BRUSH_RING)
            twin = session.mirror_outline()
            if twin is not None:
                self.markers.loop(ring_points(twin[0], twin[1], right, up),
                                  palette.BRUSH_RING_MIRROR)
        if session.pins:
            self.markers.points(np.asarray(session.pins), palette.PIN, size=PIN_PIXELS,
                                outline=palette.PIN_RIM, outline_width=3.0)
        gl.glDisable(gl.GL_DEPTH_TEST)
        text = "\n".join(overlay.status_lines(session.status()))
        if text != self.status.text:  # a new layout only when the words change
            self.status.text = text
        self.status.draw()
        if session.show_magnitude:
            self._draw_legend()
        if session.show_help:
            self.help.y = height - 24
            self.panel.x, self.panel.y = 12, max(height - 36 - self.help.content_height, 0)
            self.panel.width = min(self.help.content_width + 24, width - 24)
            self.panel.height = self.help.content_height + 24
            self.panel.draw()
            self.help.draw()


def open_viewer(mesh_path=None, *, recover=False, size=(1280, 800), visible=True):
    """Open a viewer window (without running the event loop) and return its :class:`Viewer`.

    Parameters
    ----------
    mesh_path : str or os.PathLike or None
        See :func:`load_model`.
    recover : bool, keyword-only
        Replay the journal of an interrupted session at once (without asking).
    size : (width, height), keyword-only
    visible : bool, keyword-only
        False for tests and headless use.
    """
    model = load_model(mesh_path)
    try:
        import pyglet
        import pyglet.window
        window = _make_window(pyglet, size, visible)
    except Exception as exc:  # pyglet raises display, library and context errors of many kinds
        raise ViewerError(f"the viewer window cannot open ({type(exc).__name__}: {exc}); it "
                          "needs a desktop session with OpenGL 3.3 (for pictures without a "
                          "window use pliant snapshot)") from None
    session = Session(model.pop("vertices"), model.pop("faces"), size=window.get_size(), **model)
    if recover:
        try:
            session.message = session.recover()
        except ValueError as exc:  # a damaged journal, or one recorded for another mesh
            session.message = f"recovery failed: {exc}"
    return Viewer(window, session)


def _make_window(pyglet, size, visible):
    """A resizable pyglet window, multisampled when the driver offers it."""
    # Ask for 8 bits per channel: some drivers (EGL pbuffers among them) otherwise hand out
    # 16-bit colour, which bands the shading.
    base = dict(double_buffer=True, depth_size=24, red_size=8, green_size=8, blue_size=8,
                alpha_size=8)
    window = None
    for extra in ({"sample_buffers": 1, "samples": 4}, {}):
        try:
            window = pyglet.window.Window(width=size[0], height=size[1], caption=TITLE,
                                          resizable=True, visible=visible,
                                          config=pyglet.gl.Config(**base, **extra))
            break
        except pyglet.window.NoSuchConfigException:
            continue
    if window is None:
        window = pyglet.window.Window(width=size[0], height=size[1], caption=TITLE,
                                      resizable=True, visible=visible)
    return window


def run(mesh_path=None, *, recover=False):
    """Open the viewer and run until its window closes (``pliant view [MESH] [--recover]``).

    Parameters
    ----------
    mesh_path : str or os.PathLike or None
        Mesh file to edit; None opens the bundled mascot (or a sphere).
    recover : bool, keyword-only
        Replay the stroke journal left by an interrupted session without asking; otherwise a
        found journal is offered in the status line (Enter replays, Backspace discards).

    Returns
    -------
    int
        0.
    """
    import pyglet
    # pyglet keeps its windows (pyglet.app.windows) and their event handlers by weak
    # reference: the viewer must stay referenced for as long as the loop runs, or its window
    # and handlers are collected and the loop runs on without them.
    viewer = open_viewer(mesh_path, recover=recover)
    try:
        pyglet.app.run(1 / 60)
    finally:
        viewer.close()
    return 0


def _main(argv=None):
    import argparse
    parser = argparse.ArgumentParser(prog="python -m viewer.app", description=__doc__.split("\n")[0])
    parser.add_argument("mesh", nargs="?")
    parser.add_argument("--recover", action="store_true")
    parser.add_argument("--bindings", action="store_true", help="print the bindings as Markdown")
    args = parser.parse_args(argv)
    if args.bindings:
        print(overlay.bindings_markdown(BINDINGS))
        return 0
    return run(args.mesh, recover=args.recover)


if __name__ == "__main__":
    sys.exit(_main())
