"""Saving and exporting from the viewer: the recipe, the posed mesh and the corrective shape.

Each writes with the command's own writers (:func:`brushes.recipe.save_recipe`,
:func:`brushes.formats.save_mesh`, :func:`brushes.correctives.write_delta`), which write
through a temporary file and a rename. Default names sit in ``session.out_dir``:
``<mesh>-recipe.json``, ``<mesh>-posed.<ext>``, ``<mesh>-pose.glb`` and ``.npz``.
"""

from __future__ import annotations

import os

import numpy as np

from viewer.tools.base import Commands

__all__ = ["Export", "save_recipe", "export_mesh", "export_delta"]


def _output(session, suffix):
    return os.path.join(session.out_dir, f"{session.stem}{suffix}")


def save_recipe(session, path=None):
    """Write the applied strokes as a recipe (default ``<mesh>-recipe.json``).

    Returns a message naming the file. After the save the journal is removed on a clean exit
    (:meth:`viewer.session.Session.close`).
    """
    from brushes.recipe import save_recipe as save
    path = path or _output(session, "-recipe.json")
    save(session.recipe(), path)
    session.saved_position = session.history.position
    return f"recipe saved: {path}"


def export_mesh(session, path=None):
    """Write the posed mesh in the source format (default ``<mesh>-posed.<ext>``)."""
    from brushes.formats import save_mesh
    ext = session.doc.format or "obj"
    path = path or _output(session, f"-posed.{ext}")
    save_mesh(session.doc, path, vertices=np.asarray(session.history.points))
    return f"posed mesh written: {path}"


def export_delta(session, path=None):
    """Write the corrective shape (default ``<mesh>-pose.glb`` and ``<mesh>-pose.npz``)."""
    from brushes.correctives import write_delta
    paths = [path] if path else [_output(session, "-pose.glb"), _output(session, "-pose.npz")]
    for p in paths:
        write_delta(p, session.doc, np.asarray(session.history.points))
    return "corrective shape written: " + ", ".join(map(str, paths))


class Export(Commands):
    bindings = (
        ("Ctrl+S", "save_recipe", "save the strokes as a recipe (<mesh>-recipe.json)"),
        ("Ctrl+E", "export_mesh", "export the posed mesh (<mesh>-posed.<ext>)"),
        ("Ctrl+D", "export_delta", "export the corrective shape (<mesh>-pose.glb and .npz)"),
    )

    def do_save_recipe(self, session):
        return save_recipe(session)

    def do_export_mesh(self, session):
        return export_mesh(session)

    def do_export_delta(self, session):
        return export_delta(session)
