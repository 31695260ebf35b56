"""The viewer window: pyglet events go to :class:`viewer.session.Session`, pictures come from
:mod:`viewer.render`.

``run(mesh_path=None, *, recover=False)`` is what ``pliant view [MESH] [--recover]`` calls.
Without a mesh it opens the bundled workshop mascot (``models/mascot.obj``), or a generated
sphere when the model is not installed.

The window's handlers only forward to the session and redraw; every decision (what a drag
does, which key does what) is in the session and its pure helpers, and every binding is listed
once in :data:`viewer.bindings.BINDINGS`, from which the help panel (F1) is made.

Run ``python -m viewer.app --bindings`` to print the bindings as a Markdown table.
"""

from __future__ import annotations

import sys

import numpy as np

from viewer import overlay, palette
from viewer.loading import MODEL_NAME, TerminalProgress, load_model, load_session
from viewer.render import moved_rows
from viewer.bindings import BINDINGS

__all__ = ["run", "open_viewer", "load_model", "Viewer", "ViewerError", "LoadingBar", "BINDINGS",
           "MODEL_NAME"]

TITLE = "pliant"
#: Diameter of a pin marker's brass disc in pixels (a 3-pixel dark rim goes round it).
PIN_PIXELS = 14.0


class ViewerError(RuntimeError):
    """The viewer window cannot be opened (no display, no OpenGL 3.3)."""


class Viewer:
    """Event handlers of one window, pushed onto it with ``window.push_handlers``.

    Parameters
    ----------
    window : pyglet.window.Window
        Its OpenGL context must be current.
    session : viewer.session.Session
    field : viewer.render.NormalField, optional
        Normals of the session's shown shape, already computed (see
        :func:`viewer.loading.load_session`); computed here when omitted.
    """

    def __init__(self, window, session, field=None):
        import pyglet
        from pyglet.window import key

        from viewer.render import MarkerRenderer, MeshRenderer

        self.window = window
        self.session = session
        self.mesh = MeshRenderer(session.shown(), session.faces, field=field)
        # Positions at which each vertex's normals were last computed: only vertices that
        # have moved more than the session's tolerance since then get new normals.
        self._normal_basis = np.array(session.shown(), dtype=np.float32)
        self.markers = MarkerRenderer()
        self._shown_version = session.shown_version
        self._synced = False
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
        self.session.budget["draw"] = 1e3 * (self.session.clock() - start) - (
            self.mesh.timings["normals"] + self.mesh.timings["upload"] if self._synced else 0.0)

    # ------------------------------------------------------------------ drawing
    def sync(self):
        """Upload what changed in the session since the last frame."""
        session = self.session
        session.poll()  # the newest exact preview, if the worker finished one
        self._synced = False
        if session.shown_version != self._shown_version:
            positions = np.asarray(session.shown(), dtype=np.float32)
            normals = session.shown_normals()
            if normals is not None:  # computed with the preview, off this thread
                self._normal_basis[:] = positions
                self.mesh.set_positions(positions, normals=normals)
            else:
                moved = moved_rows(positions, self._normal_basis, session.tolerance)
                self._normal_basis[moved] = positions[moved]
                self.mesh.set_positions(positions, moved=moved)
                session.budget["normals"] = self.mesh.timings["normals"]
                session.budget["moved"] = len(moved) / max(len(positions), 1)
            session.budget["upload"] = self.mesh.timings["upload"]
            self._synced = True
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
        # With the help panel open, slide the picture right so the model clears it.
        shift = (self.help.content_width + 36) / width if session.show_help else 0.0
        session.camera.shift_x = min(shift, 0.9)
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
        for tool in session.tools.values():
            own = tool.markers(session)
            if own is not None and len(own):
                self.markers.points(own, palette.HANDLE, size=PIN_PIXELS,
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


def open_viewer(mesh_path=None, *, recover=False, size=(1280, 800), visible=True,
                progress=True):
    """Open a viewer window (without running the event loop) and return its :class:`Viewer`.

    The window opens first and shows a progress bar (also printed on the terminal, see
    :class:`viewer.loading.TerminalProgress`) while the mesh is read, indexed and shaded on a
    worker thread; the window keeps handling its events meanwhile.

    Parameters
    ----------
    mesh_path : str or os.PathLike or None
        See :func:`viewer.loading.load_model`.
    recover : bool, keyword-only
        Replay the journal of an interrupted session at once (without asking).
    size : (width, height), keyword-only
    visible : bool, keyword-only
        False for tests and headless use.
    progress : bool, keyword-only
        Print the progress bar on the terminal (stderr) too.
    """
    import threading

    try:
        import pyglet
        import pyglet.window
        window = _make_window(pyglet, size, visible)
    except Exception as exc:  # pyglet raises display, library and context errors of many kinds
        raise ViewerError(f"the viewer window cannot open ({type(exc).__name__}: {exc}); it "
                          "needs a desktop session with OpenGL 3.3 (for pictures without a "
                          "window use pliant snapshot)") from None
    bar = LoadingBar(window)
    terminal = TerminalProgress() if progress else None
    state = {"fraction": 0.0, "text": "starting", "result": None, "error": None}
    lock = threading.Lock()

    def report(fraction, text):
        with lock:
            state["fraction"], state["text"] = fraction, text
        if terminal is not None:
            terminal(fraction, text)

    def work():
        try:
            state["result"] = load_session(mesh_path, size=window.get_size(), progress=report)
        except BaseException as exc:  # handed to the main thread, raised there
            state["error"] = exc

    worker = threading.Thread(target=work, name="pliant-load", daemon=True)
    worker.start()
    while worker.is_alive():
        window.dispatch_events()
        with lock:
            fraction, text = state["fraction"], state["text"]
        bar.draw(fraction, text)
        window.flip()
        worker.join(1 / 30)  # about 30 redraws a second while loading
    if state["error"] is not None:
        window.close()
        raise state["error"]
    session, field = state["result"]
    if recover:
        try:
            session.message = session.recover()
        except ValueError as exc:  # a damaged journal, or one recorded for another mesh
            session.message = f"recovery failed: {exc}"
    window.switch_to()
    return Viewer(window, session, field)


class LoadingBar:
    """The progress bar drawn in the window while a mesh loads (see :func:`open_viewer`)."""

    WIDTH, HEIGHT = 360, 12

    def __init__(self, window):
        import pyglet
        self.window = window
        self.batch = pyglet.graphics.Batch()
        rim = tuple(int(255 * c) for c in palette.PANEL)
        fill = tuple(int(255 * c) for c in palette.BRUSH_RING)
        text = tuple(int(255 * c) for c in palette.TEXT) + (255,)
        self.rim = pyglet.shapes.Rectangle(0, 0, self.WIDTH + 4, self.HEIGHT + 4, color=rim,
                                           batch=self.batch)
        self.fill = pyglet.shapes.Rectangle(0, 0, 0, self.HEIGHT, color=fill, batch=self.batch)
        self.label = pyglet.text.Label("", font_size=11, color=text, anchor_x="center",
                                       batch=self.batch)

    def box(self):
        """(x, y, width, height) of the bar in window units (centred)."""
        width, height = self.window.get_size()
        return ((width - self.WIDTH) / 2, height / 2 - self.HEIGHT / 2, self.WIDTH, self.HEIGHT)

    def draw(self, fraction, text):
        """Clear the window and draw the bar ``fraction`` in [0, 1] full, ``text`` above it."""
        from pyglet import gl
        x, y, w, h = self.box()
        f = min(max(float(fraction), 0.0), 1.0)
        self.rim.position = (x - 2, y - 2)
        self.fill.position = (x, y)
        self.fill.width = max(f * w, 0.0)
        self.label.text = f"{text}  {100 * f:.0f}%"
        self.label.position = (x + w / 2, y + h + 10, 0)
        self.window.switch_to()
        gl.glClearColor(*palette.BACKGROUND, 1.0)
        self.window.clear()
        self.batch.draw()


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
