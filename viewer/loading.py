"""Opening a mesh for the viewer in stages, with progress (no OpenGL).

A million-vertex mesh takes seconds to read, to index for picking and to shade, so the viewer
reports each stage as it goes: :func:`load_session` calls ``progress(fraction, text)`` with a
fraction rising from 0 to 1. The window draws it as a bar while the stages run on a worker
thread (:func:`viewer.app.open_viewer`), and :class:`TerminalProgress` prints it as a bar on
the terminal.

The stages and their shares of the bar (rough shares of the time on a large mesh):

=========  =====  ==========================================================
reading     0.55  :func:`brushes.formats.load_mesh` (or the bundled model)
picking     0.25  :class:`viewer.picking.Picker` (sort and fit the boxes)
session     0.08  :class:`viewer.session.Session` (volume, face normals, journal)
shading     0.12  :class:`viewer.render.NormalField` (vertex normals for the first frame)
=========  =====  ==========================================================
"""

from __future__ import annotations

import os
import sys

__all__ = ["load_model", "load_session", "TerminalProgress", "STAGES", "MODEL_NAME"]

MODEL_NAME = "mascot.obj"
#: (name, share of the bar, text shown while it runs).
STAGES = (
    ("reading", 0.55, "reading the mesh"),
    ("picking", 0.25, "indexing the surface for picking"),
    ("session", 0.08, "measuring the rest shape"),
    ("shading", 0.12, "computing the normals"),
)


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
    from viewer.session import sphere_mesh
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


def load_session(mesh_path=None, *, size=(1280, 800), threaded=True, progress=None):
    """Read the mesh and build everything the first frame needs, reporting progress.

    Parameters
    ----------
    mesh_path : str or os.PathLike or None
        See :func:`load_model`.
    size : (width, height), keyword-only
    threaded : bool, keyword-only
        Passed to the session (background drag previews).
    progress : callable ``(fraction, text)``, optional, keyword-only
        Called at the start of each stage and with ``(1.0, "ready")`` at the end; fractions
        never decrease.

    Returns
    -------
    (viewer.session.Session, viewer.render.NormalField)
        The session and the normals of its shown shape, computed.
    """
    from viewer.picking import Picker
    from viewer.render import NormalField
    from viewer.session import Session

    report = progress if progress is not None else (lambda fraction, text: None)
    done = 0.0
    shares = {name: (share, text) for name, share, text in STAGES}

    def stage(name):
        nonlocal done
        share, text = shares[name]
        report(done, text)
        done += share

    stage("reading")
    model = load_model(mesh_path)
    vertices, faces = model.pop("vertices"), model.pop("faces")
    stage("picking")
    picker = Picker(vertices, faces)
    stage("session")
    session = Session(vertices, faces, size=size, threaded=threaded, picker=picker, **model)
    stage("shading")
    field = NormalField(session.faces, len(session.rest))
    field.full(session.shown())
    report(1.0, "ready")
    return session, field


class TerminalProgress:
    """``progress(fraction, text)`` as a bar on a terminal, e.g.
    ``pliant view: [##########----------]  50%  indexing the surface for picking``.

    On a terminal the bar is redrawn in place (carriage return) and ends with a newline at
    1.0; on a file or pipe each call writes one line.

    Parameters
    ----------
    stream : file, optional
        Default ``sys.stderr``.
    width : int, keyword-only
        Characters of the bar.
    """

    def __init__(self, stream=None, *, width=24, prefix="pliant view"):
        self.stream = stream if stream is not None else sys.stderr
        self.width = int(width)
        self.prefix = prefix
        self.interactive = bool(getattr(self.stream, "isatty", lambda: False)())

    def line(self, fraction, text):
        """The bar's text for ``fraction`` in [0, 1] (clipped)."""
        f = min(max(float(fraction), 0.0), 1.0)
        filled = int(round(f * self.width))
        return f"{self.prefix}: [{'#' * filled}{'-' * (self.width - filled)}] {100 * f:3.0f}%  {text}"

    def __call__(self, fraction, text):
        line = self.line(fraction, text)
        if self.interactive:
            end = "\n" if fraction >= 1.0 else ""
            self.stream.write("\r" + line.ljust(78) + end)
        else:
            self.stream.write(line + "\n")
        self.stream.flush()
