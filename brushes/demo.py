"""The demo job: pose the bundled workshop mascot with its bundled recipe.

``run_demo(out_dir)`` applies ``models/mascot-pose.json`` to ``models/mascot.obj`` and
writes, in ``out_dir``:

- ``mascot-posed.obj``: the posed mesh (same structure as the input OBJ),
- ``mascot-pose.glb`` and ``mascot-pose.npz``: the corrective shape (glTF morph target
  and numpy deltas),
- ``mascot-report.json``: the quality report of ``brushes.quality``.

The bundled files live in the repository's ``models/`` folder, next to the ``brushes``
package; an installed copy may also carry them in ``brushes/data/``.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path

__all__ = ["DemoError", "DemoResult", "find_models", "run_demo", "MODEL_NAME", "RECIPE_NAME"]

MODEL_NAME = "mascot.obj"
RECIPE_NAME = "mascot-pose.json"


class DemoError(ValueError):
    """The bundled model or recipe cannot be found."""


@dataclass
class DemoResult:
    """Paths written by ``run_demo`` and the quality report (a JSON-ready dict)."""

    model: Path
    recipe: Path
    posed: Path
    delta_glb: Path
    delta_npz: Path
    report_path: Path
    report: dict = field(default_factory=dict)


def model_dirs() -> list[Path]:
    """Folders searched for the bundled model, in order."""
    package = Path(__file__).resolve().parent
    return [package / "data", package.parent / "models"]


def find_models(dirs: list[Path] | None = None) -> tuple[Path, Path]:
    """Return (mesh path, recipe path) of the bundled demo; ``DemoError`` when missing."""
    dirs = model_dirs() if dirs is None else [Path(d) for d in dirs]
    for folder in dirs:
        mesh, recipe = folder / MODEL_NAME, folder / RECIPE_NAME
        if mesh.is_file() and recipe.is_file():
            return mesh, recipe
    looked = ", ".join(str(d) for d in dirs)
    raise DemoError(f"bundled model not found: {MODEL_NAME} and {RECIPE_NAME} are in none of "
                    f"{looked}; run from a source checkout (pip install -e .)")


def run_demo(out_dir: str | os.PathLike = "pliant-demo", *, models: list[Path] | None = None
             ) -> DemoResult:
    """Pose the bundled mascot and write the posed mesh, corrective shape and report.

    out_dir : folder for the outputs (created if missing).
    models : folders to look in instead of ``model_dirs()`` (tests).
    """
    from brushes import quality
    from brushes.atomic import atomic_write
    from brushes.correctives import write_delta
    from brushes.formats import load_mesh, save_mesh
    from brushes.recipe import load_recipe

    mesh_path, recipe_path = find_models(models)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    result = DemoResult(model=mesh_path, recipe=recipe_path,
                        posed=out / "mascot-posed.obj",
                        delta_glb=out / "mascot-pose.glb",
                        delta_npz=out / "mascot-pose.npz",
                        report_path=out / "mascot-report.json")

    recipe = load_recipe(recipe_path)
    doc = load_mesh(mesh_path)
    posed = recipe.apply(doc.vertices, groups=getattr(doc, "groups", None))
    save_mesh(doc, result.posed, vertices=posed)
    write_delta(result.delta_glb, doc, posed)
    write_delta(result.delta_npz, doc, posed)
    result.report = quality(doc.vertices, posed, doc.faces)
    with atomic_write(result.report_path, mode="w") as f:
        json.dump(result.report, f, indent=2, sort_keys=True)
        f.write("\n")
    return result
