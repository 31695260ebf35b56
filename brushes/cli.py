"""The ``pliant`` command: pose meshes with recipes, in batches, and inspect the results.

This is the only layer that prints errors and picks exit codes:

====  ==========================================================================
code  meaning
====  ==========================================================================
0     success
1     partial failure: some meshes of a batch failed (or an internal error)
2     bad input or usage: missing or unreadable file, bad mesh or recipe, refused
      overwrite, mismatched meshes, bad option
130   interrupted (Ctrl-C); no half-written files are left
====  ==========================================================================

An error is one line on stderr, ``pliant: error: <message>``; ``--debug`` adds the
traceback. ``main(argv)`` returns the exit code instead of exiting.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import signal
import sys
import time
import traceback
from pathlib import Path

PROG = "pliant"

EXIT_OK = 0
EXIT_PARTIAL = 1
EXIT_BAD_INPUT = 2
EXIT_INTERRUPTED = 130

DESCRIPTION = """\
pliant poses 3D meshes with elastic brushes (grab, twist, scale, pinch) driven by
regularized Kelvinlets (de Goes & James, ACM TOG 36(4), 2017).

This is a visual posing tool. Its elasticity is an idealized model for shaping
geometry, not an engineering, structural or medical analysis. For anything that
bears load or touches a body, follow local codes and licensed professionals.
"""

EPILOG = """\
examples:
  pliant demo                                   pose the bundled mascot into ./pliant-demo
  pliant apply pose.json figure.obj -o posed.obj --delta posed.glb
  pliant batch pose.json assets/*.obj --out posed/ --jobs 2
  pliant report figure.obj posed.obj --json
  pliant view posed.obj
  pliant animate pose.json figure.obj -o figure-pose.glb

exit codes:
  0    success
  1    partial failure: some meshes of a batch failed (also: an internal error)
  2    bad input or usage: missing file, bad mesh or recipe, refused overwrite,
       unreachable cluster, no display or OpenGL
  130  interrupted (Ctrl-C)

Run 'pliant COMMAND --help' for the options of a command; add --debug before the
command to see tracebacks.
"""

HELP = {
    "apply": ("pose one mesh with a recipe",
              "Replay a recipe stroke by stroke on one mesh and write the posed mesh.\n"
              "The output format follows OUT's extension (.obj .ply .stl .off .glb .gltf\n"
              ".usd .usda .usdc). In the input's own format only positions (and stored\n"
              "normals) change: an OBJ keeps its groups, texture coordinates, materials and\n"
              "comments. Another format is a conversion that keeps what it can hold\n"
              "(polygons, texture coordinates, normals, groups, material names) and prints\n"
              "one line naming what it could not keep. A stroke that barely moves the mesh\n"
              "(under 1e-6 of its size) or moves all of it by more than its size is warned of.",
              """\
examples:
  pliant apply pose.json figure.obj -o figure-posed.obj
  pliant apply pose.json figure.obj -o figure-posed.glb --delta figure-pose.npz
  pliant apply pose.json figure.obj -o figure.obj --force    (replace the input)
"""),
    "batch": ("pose many meshes with one recipe, in parallel",
              "Pose every MESH with RECIPE and write each result as DIR/<input file name>.\n"
              "Meshes run in parallel on local processes, or on a Dask cluster with\n"
              "--scheduler (workers must see the same paths). A failing mesh is named with\n"
              "its reason and the others complete; exit 1 when any failed.",
              """\
examples:
  pliant batch pose.json assets/*.obj --out posed/
  pliant batch pose.json a.obj b.ply c.glb --out posed/ --jobs 2
  pliant batch pose.json assets/*.obj --out posed/ --scheduler tcp://10.0.0.5:8786
    (needs: pip install pliant[cluster])
"""),
    "delta": ("corrective shape from a rest and a posed mesh",
              "Write the corrective shape (posed minus rest, per vertex) of a mesh and a posed\n"
              "copy of it (the same file, or one pliant converted, or an STL with the same\n"
              "facets): .npz (numpy deltas), .glb/.gltf (glTF morph target on the rest mesh)\n"
              "or .usd/.usda/.usdc (UsdSkel blend shape bound to the rest mesh).",
              """\
examples:
  pliant delta figure.obj figure-posed.obj -o figure-pose.npz
  pliant delta figure.obj figure-posed.obj -o figure-pose.glb
  pliant delta figure.usda figure-posed.usda -o figure-pose.usda
"""),
    "report": ("quality report of a posed mesh against its rest mesh",
               "Compare a posed mesh with its rest mesh: volume change, displacement,\n"
               "flipped faces and stretch. Prints a table, or JSON with --json.",
               """\
examples:
  pliant report figure.obj figure-posed.obj
  pliant report figure.obj figure-posed.obj --json > report.json
"""),
    "demo": ("pose the bundled mascot and write mesh, corrective shape and report",
             "Apply the bundled recipe (mascot-pose.json) to the bundled workshop mascot\n"
             "(mascot.obj) and write the posed mesh, the corrective shape (.glb and .npz)\n"
             "and the quality report (JSON) into DIR.",
             """\
examples:
  pliant demo
  pliant demo --out renders/mascot
"""),
    "view": ("open the interactive viewer",
             "Open the viewer window, optionally with a mesh loaded. --recover replays\n"
             "the stroke journal left by a session that ended unexpectedly.",
             """\
examples:
  pliant view
  pliant view figure.obj
  pliant view figure.obj --recover
"""),
    "snapshot": ("render a mesh to a PNG image without a window",
                 "Render MESH off-screen to a PNG, optionally after applying a recipe.",
                 """\
examples:
  pliant snapshot figure.obj -o figure.png
  pliant snapshot figure.obj -o posed.png --recipe pose.json --size 800x600
  pliant snapshot figure.obj -o side.png --view side
"""),
    "animate": ("play a recipe as motion with its secondary motion, as a glTF animation",
                "Play RECIPE on MESH over --seconds: each stroke gets an equal time slot, flows\n"
                "into place over the first half of it and settles over the rest, with the\n"
                "elastodynamic waves its load sends through the body added (Dynamic Kelvinlets,\n"
                "de Goes & James 2018). The frames are stored as a few morph targets (a\n"
                "truncated SVD; --tolerance sets the worst vertex error allowed) animated by their\n"
                "weights in a glTF 2.0 file; --frames also keeps the exact frames (.npz). The\n"
                "motion is an idealized infinite elastic body, for animation only.",
                """\
examples:
  pliant animate pose.json figure.obj -o figure-pose.glb
  pliant animate pose.json figure.obj -o slow.glb --seconds 4 --shear-speed 2
  pliant animate pose.json figure.obj -o pose.gltf --tolerance 1e-4 --frames pose-frames.npz
"""),
}


class CliError(ValueError):
    """Bad input or usage found by the command itself (exit 2)."""


# --------------------------------------------------------------------------- parser

def _size(text: str) -> tuple[int, int]:
    match = re.fullmatch(r"\s*(\d+)\s*[xX]\s*(\d+)\s*", text)
    if not match or int(match[1]) < 1 or int(match[2]) < 1:
        raise argparse.ArgumentTypeError(f"expected WIDTHxHEIGHT such as 800x600, got {text!r}")
    return int(match[1]), int(match[2])


def _jobs(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be at least 1, got {value}")
    return value


def _positive(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not (value > 0 and value < float("inf")):
        raise argparse.ArgumentTypeError(f"must be a positive number, got {text!r}")
    return value


def build_parser() -> argparse.ArgumentParser:
    """The argparse parser of the ``pliant`` command."""
    parser = argparse.ArgumentParser(
        prog=PROG, description=DESCRIPTION, epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--debug", action="store_true",
                        help="show the full traceback when something fails")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    def command(name: str) -> argparse.ArgumentParser:
        summary, description, epilog = HELP[name]
        p = sub.add_parser(name, help=summary, description=description, epilog=epilog,
                           formatter_class=argparse.RawDescriptionHelpFormatter)
        p.set_defaults(func=globals()[f"cmd_{name}"])
        # accepted after the command too; SUPPRESS keeps the top-level value when absent
        p.add_argument("--debug", action="store_true", default=argparse.SUPPRESS,
                       help="show the full traceback when something fails")
        return p

    p = command("apply")
    p.add_argument("recipe", metavar="RECIPE", help="recipe file (.json)")
    p.add_argument("mesh", metavar="MESH", help="mesh to pose")
    p.add_argument("-o", "--out", required=True, metavar="OUT",
                   help="posed mesh to write; format from the extension")
    p.add_argument("--delta", metavar="OUT2",
                   help="also write the corrective shape (.npz, .glb, .gltf, .usd, .usda, .usdc)")
    p.add_argument("--force", action="store_true", help="allow writing over an input file")

    p = command("batch")
    p.add_argument("recipe", metavar="RECIPE", help="recipe file (.json)")
    p.add_argument("meshes", metavar="MESH", nargs="+", help="meshes to pose")
    p.add_argument("--out", required=True, metavar="DIR",
                   help="folder for the posed meshes (created if missing)")
    p.add_argument("--jobs", type=_jobs, default=None, metavar="N",
                   help="local worker processes (default: number of cores)")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="run on a Dask distributed scheduler, e.g. tcp://host:8786")
    p.add_argument("--force", action="store_true", help="allow writing over an input file")
    p.add_argument("--quiet", action="store_true", help="no progress bar")

    p = command("delta")
    p.add_argument("rest", metavar="REST", help="rest mesh")
    p.add_argument("posed", metavar="POSED", help="the same mesh posed (any format pliant wrote it in)")
    p.add_argument("-o", "--out", required=True, metavar="OUT",
                   help="corrective shape to write (.npz, .glb, .gltf, .usd, .usda, .usdc)")
    p.add_argument("--force", action="store_true", help="allow writing over an input file")

    p = command("report")
    p.add_argument("rest", metavar="REST", help="rest mesh")
    p.add_argument("posed", metavar="POSED", help="the same mesh posed (any format pliant wrote it in)")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")

    p = command("demo")
    p.add_argument("--out", default="pliant-demo", metavar="DIR",
                   help="output folder (default: ./pliant-demo)")

    p = command("view")
    p.add_argument("mesh", metavar="MESH", nargs="?", help="mesh to open")
    p.add_argument("--recover", action="store_true",
                   help="replay the stroke journal of an interrupted session")

    p = command("snapshot")
    p.add_argument("mesh", metavar="MESH", help="mesh to render")
    p.add_argument("-o", "--out", required=True, metavar="PNG", help="image to write")
    p.add_argument("--recipe", metavar="R", help="apply this recipe before rendering")
    p.add_argument("--size", type=_size, default=(800, 600), metavar="WxH",
                   help="image size in pixels (default: 800x600)")
    p.add_argument("--view", metavar="SPEC", help="camera view (see the viewer's docs)")
    p.add_argument("--force", action="store_true", help="allow writing over an input file")

    p = command("animate")
    p.add_argument("recipe", metavar="RECIPE", help="recipe file (.json)")
    p.add_argument("mesh", metavar="MESH", help="mesh to animate")
    p.add_argument("-o", "--out", required=True, metavar="OUT.glb",
                   help="glTF animation to write (.glb or .gltf)")
    p.add_argument("--seconds", type=_positive, default=2.0, metavar="S",
                   help="length of the animation in seconds (default: 2)")
    p.add_argument("--fps", type=_positive, default=30.0, metavar="F",
                   help="frames per second (default: 30)")
    p.add_argument("--shear-speed", type=_positive, default=None, metavar="C",
                   help="shear wave speed in model units per second (default: two of the mesh's "
                        "bounding-box diagonals per second)")
    p.add_argument("--tolerance", type=_positive, default=None, metavar="T",
                   help="worst vertex error of the morph targets, model units (default: 1e-3 of "
                        "the bounding-box diagonal)")
    p.add_argument("--frames", metavar="OUT.npz", help="also write the exact frames (.npz)")
    return parser


# --------------------------------------------------------------------------- helpers

def _existing(path: str, what: str) -> Path:
    p = Path(path)
    if not p.exists():
        raise CliError(f"{what}: {path}: no such file")
    if p.is_dir():
        raise CliError(f"{what}: {path}: is a folder, expected a file")
    return p


def _same_file(a: Path, b: Path) -> bool:
    try:
        return os.path.samefile(a, b)
    except OSError:
        return os.path.realpath(a) == os.path.realpath(b)


def _check_outputs(outputs: list[tuple[str, str | None]], inputs: list[str], *,
                   force: bool) -> None:
    """Refuse to write over an input (unless ``force``) or to write one file twice."""
    named = [(opt, Path(p)) for opt, p in outputs if p is not None]
    for opt, out in named:
        if out.is_dir():
            raise CliError(f"{opt}: {out} is a folder, expected a file name")
        folder = out.absolute().parent
        if not folder.is_dir():
            raise CliError(f"{opt}: {out}: folder {folder} does not exist")
        if not force:
            for inp in inputs:
                if _same_file(out, Path(inp)):
                    raise CliError(f"{opt}: {out} is an input file; refusing to write over it "
                                   "(use --force)")
    for i, (opt_a, a) in enumerate(named):
        for opt_b, b in named[i + 1:]:
            if _same_file(a, b):
                raise CliError(f"{opt_b}: {b} is also the {opt_a} output; give distinct names")


DELTA_FORMATS = ("npz", "glb", "gltf", "usd", "usda", "usdc")


def _mesh_formats() -> tuple[str, ...]:
    from brushes.formats import FORMATS

    return tuple(FORMATS)


def _check_suffix(option: str, path: str, formats) -> None:
    suffix = Path(path).suffix.lower().lstrip(".")
    if suffix not in formats:
        raise CliError(f"{option}: {path}: unknown format "
                       f"{('.' + suffix) if suffix else '(no extension)'}; use one of "
                       + ", ".join(f".{f}" for f in formats))


def _posed_in_rest_order(rest, posed, rest_name: str, posed_name: str, *, purpose: str):
    """``posed``'s positions in ``rest``'s vertex order (see brushes.formats.match)."""
    from brushes.formats import MeshError
    from brushes.formats.match import posed_in_rest_order

    try:
        return posed_in_rest_order(rest, posed, rest_name=rest_name, posed_name=posed_name)
    except MeshError as exc:
        raise CliError(f"{exc}; {purpose}") from None


def _recipe_context(recipe_path: str):
    """Re-raise a recipe problem found while posing (a mask group the mesh lacks) with the
    recipe's file name, as problems found on load carry it."""
    import contextlib

    from brushes.recipe import RecipeError

    @contextlib.contextmanager
    def context():
        try:
            yield
        except RecipeError as exc:
            if exc.source is None:
                raise RecipeError(exc.problems, source=recipe_path) from None
            raise

    return context()


def _warn(message: str) -> None:
    print(f"{PROG}: warning: {message}", file=sys.stderr)


def _groups(doc):
    return getattr(doc, "groups", None)


# --------------------------------------------------------------------------- commands

def cmd_apply(args) -> int:
    from brushes.formats import load_mesh, save_mesh
    from brushes.recipe import load_recipe

    _existing(args.recipe, "RECIPE")
    _existing(args.mesh, "MESH")
    _check_outputs([("--out", args.out), ("--delta", args.delta)], [args.recipe, args.mesh],
                   force=args.force)
    _check_suffix("--out", args.out, _mesh_formats())
    if args.delta:
        _check_suffix("--delta", args.delta, DELTA_FORMATS)
    recipe = load_recipe(args.recipe)
    doc = load_mesh(args.mesh)
    from brushes.batch import pose_document

    with _recipe_context(args.recipe):
        posed, warnings = pose_document(recipe, doc)
    for warning in warnings:
        _warn(f"{args.mesh}: {warning}")
    written = save_mesh(doc, args.out, vertices=posed)
    if written.converted is not None:
        print(f"posed: {args.out} ({written.summary()})")
    else:
        print(f"posed: {args.out}")
    if args.delta:
        from brushes.correctives import write_delta

        write_delta(args.delta, doc, posed)
        print(f"corrective shape: {args.delta}")
    return EXIT_OK


def cmd_batch(args) -> int:
    from brushes.batch import plan, run_batch
    from brushes.recipe import load_recipe

    _existing(args.recipe, "RECIPE")
    if args.scheduler is not None and args.jobs is not None:
        raise CliError("--jobs: not used with --scheduler (the cluster sets its own workers)")
    recipe = load_recipe(args.recipe)          # a bad recipe stops the batch before it starts
    tasks = plan(args.meshes, args.out, force=args.force)
    if not args.force and any(_same_file(Path(dst), Path(args.recipe)) for _, dst in tasks):
        raise CliError(f"--out: writing into {args.out} would replace the recipe "
                       f"{args.recipe}; refusing (use --force)")
    Path(args.out).mkdir(parents=True, exist_ok=True)

    start = time.perf_counter()
    progress = _Progress(len(tasks), stream=sys.stderr, enabled=not args.quiet)
    warned = []

    def done(outcome) -> None:
        for warning in outcome.warnings:
            warned.append(outcome.source)
            progress.message(f"{PROG}: warning: {outcome.source}: {warning}")
        if not outcome.ok:
            named = (outcome.error if outcome.source in outcome.error
                     else f"{outcome.source}: {outcome.error}")
            progress.message(f"{PROG}: error: {named}")
        progress.step()

    try:
        outcomes = run_batch(recipe, tasks, jobs=args.jobs, scheduler=args.scheduler,
                             on_start=progress.draw, on_done=done)
    finally:
        progress.close()
    seconds = time.perf_counter() - start
    posed = sum(o.ok for o in outcomes)
    failed = [o.source for o in outcomes if not o.ok]
    if failed:
        print("failed: " + ", ".join(Path(f).name for f in failed))
    if warned:
        print(f"warnings: {len(warned)} (on {len(set(warned))} meshes; see above)")
    print(f"batch: {posed} posed, {len(outcomes) - posed} failed, {seconds:.1f} s")
    return EXIT_OK if posed == len(outcomes) else EXIT_PARTIAL


class _Progress:
    """One progress line on a terminal (``batch 12/40 [#####...] 3.1 s``), redrawn in place;
    messages are printed on lines of their own above it. Off when the stream is not a
    terminal (a log file gets the messages only)."""

    def __init__(self, total: int, *, stream, enabled: bool):
        self.total, self.done, self.stream = total, 0, stream
        self.enabled = enabled and hasattr(stream, "isatty") and stream.isatty()
        self.start = time.perf_counter()
        self.shown = False

    def _line(self) -> str:
        width = 24
        filled = width * self.done // max(self.total, 1)
        return (f"batch {self.done}/{self.total} [{'#' * filled}{'.' * (width - filled)}] "
                f"{time.perf_counter() - self.start:.1f} s")

    def draw(self) -> None:
        if self.enabled:
            self.stream.write("\r\x1b[K" + self._line())
            self.stream.flush()
            self.shown = True

    def message(self, text: str) -> None:
        if self.shown:
            self.stream.write("\r\x1b[K")
        self.stream.write(text + "\n")
        self.stream.flush()
        self.draw()

    def step(self) -> None:
        self.done += 1
        self.draw()

    def close(self) -> None:
        if self.shown:
            self.stream.write("\r\x1b[K")
            self.stream.flush()
            self.shown = False


def cmd_delta(args) -> int:
    from brushes.correctives import write_delta
    from brushes.formats import load_mesh

    _existing(args.rest, "REST")
    _existing(args.posed, "POSED")
    _check_outputs([("--out", args.out)], [args.rest, args.posed], force=args.force)
    _check_suffix("--out", args.out, DELTA_FORMATS)
    rest = load_mesh(args.rest)
    posed = load_mesh(args.posed)
    posed_vertices = _posed_in_rest_order(rest, posed, args.rest, args.posed,
                                          purpose="a corrective shape needs the same mesh in two poses")
    write_delta(args.out, rest, posed_vertices)
    print(f"corrective shape: {args.out}")
    return EXIT_OK


def cmd_report(args) -> int:
    from brushes import quality
    from brushes.formats import load_mesh

    _existing(args.rest, "REST")
    _existing(args.posed, "POSED")
    rest = load_mesh(args.rest)
    posed = load_mesh(args.posed)
    posed_vertices = _posed_in_rest_order(rest, posed, args.rest, args.posed,
                                          purpose="the report compares a mesh with a posed copy of it")
    counts = None if rest.polygons is None else rest.polygons.counts
    report = quality(rest.vertices, posed_vertices, rest.faces, polygons=counts)
    if args.json:
        print(json.dumps(report, indent=2))
    else:
        from brushes.quality import format_quality

        print(format_quality(report))
    return EXIT_OK


def demo_summary(report: dict) -> list[str]:
    """Short human lines for the demo: volume change, max displacement, flipped faces."""
    change = report.get("volume_change")
    volume = ("n/a (the mesh is not closed)" if change is None
              else f"{100.0 * change:+.3g} %")
    return [f"volume change:     {volume}",
            f"max displacement:  {report['max_displacement']:.4g}",
            f"flipped faces:     {report['flipped_faces']}"]


def cmd_demo(args) -> int:
    from brushes.demo import run_demo

    out = Path(args.out)
    if out.exists() and not out.is_dir():
        raise CliError(f"--out: {out} is a file, expected a folder")
    result = run_demo(out)
    print(f"posed the bundled mascot ({result.model.name}) with {result.recipe.name}")
    print(f"  posed mesh:        {result.posed}")
    print(f"  corrective shape:  {result.delta_glb}")
    print(f"                     {result.delta_npz}")
    print(f"  report:            {result.report_path}")
    for line in demo_summary(result.report):
        print(f"  {line}")
    return EXIT_OK


def cmd_view(args) -> int:
    if args.mesh is not None:
        _existing(args.mesh, "MESH")
    try:
        import viewer.app as app
    except ImportError as exc:
        raise CliError(f"the viewer cannot start: {exc}") from exc
    window_error = getattr(app, "ViewerError", ())
    try:
        result = app.run(args.mesh, recover=args.recover)
    except Exception as exc:
        # no display or no OpenGL is the machine's answer, not a bug: one line, exit 2
        if isinstance(exc, window_error):
            raise CliError(str(exc)) from exc
        if type(exc).__module__.split(".")[0] == "pyglet":
            raise CliError(f"cannot open the viewer window ({type(exc).__name__}: {exc}); "
                           "'pliant snapshot' renders without a display") from exc
        raise
    return EXIT_OK if result is None else int(result)


def cmd_snapshot(args) -> int:
    from brushes.formats import load_mesh

    _existing(args.mesh, "MESH")
    inputs = [args.mesh]
    if args.recipe:
        _existing(args.recipe, "--recipe")
        inputs.append(args.recipe)
    _check_outputs([("--out", args.out)], inputs, force=args.force)
    _check_suffix("--out", args.out, ("png",))
    try:
        from viewer.snapshot import SnapshotError, parse_view, snapshot
    except ImportError as exc:
        raise CliError(f"snapshots cannot be rendered: {exc}") from exc
    parse_view(args.view)                        # a bad --view fails before any work
    doc = load_mesh(args.mesh)
    vertices, magnitude = doc.vertices, None
    if args.recipe:
        import numpy as np

        from brushes.recipe import load_recipe

        with _recipe_context(args.recipe):
            vertices = load_recipe(args.recipe).apply(doc.vertices, groups=_groups(doc))
        magnitude = np.linalg.norm(vertices - doc.vertices, axis=1)
    try:
        snapshot(vertices, doc.faces, args.out, size=args.size, view=args.view,
                 magnitude=magnitude)
    except SnapshotError as exc:
        raise CliError(str(exc)) from exc
    print(f"snapshot: {args.out}")
    return EXIT_OK


#: Memory the frames may take before animate refuses (bytes; see `_animate.PEAK_BYTES`).
ANIMATE_MEMORY = 8 * 2**30


def cmd_animate(args) -> int:
    from brushes.formats import load_mesh
    from brushes.recipe import load_recipe

    _existing(args.recipe, "RECIPE")
    _existing(args.mesh, "MESH")
    _check_outputs([("--out", args.out), ("--frames", args.frames)], [args.recipe, args.mesh], force=False)
    _check_suffix("--out", args.out, ("glb", "gltf"))
    if args.frames:
        _check_suffix("--frames", args.frames, ("npz",))
    recipe = load_recipe(args.recipe)
    doc = load_mesh(args.mesh)
    from brushes import animate as _animate

    count = len(_animate.frame_times(args.seconds, args.fps))
    need = _animate.PEAK_BYTES * count * len(doc.vertices)
    if need > ANIMATE_MEMORY:
        raise CliError(f"--seconds/--fps: {count} frames of {len(doc.vertices)} vertices need about "
                       f"{need / 2**30:.0f} GiB; shorten the animation or lower the frame rate")
    bar = None
    if count * len(doc.vertices) >= _animate.LONG_ANIMATION:
        from tqdm import tqdm

        bar = tqdm(total=count, desc="animate", unit="frame", file=sys.stderr, dynamic_ncols=True, leave=False)
    try:
        with _recipe_context(args.recipe):
            summary = _animate.animate(recipe, doc, args.out, seconds=args.seconds, fps=args.fps,
                                       shear_speed=args.shear_speed, tolerance=args.tolerance,
                                       frames_path=args.frames,
                                       progress=None if bar is None else (lambda j: bar.update(1)))
    finally:
        if bar is not None:
            bar.close()
    print(f"animation: {args.out} ({summary.frames} frames over {summary.seconds:g} s, shear speed "
          f"{summary.shear_speed:.4g} units/s)")
    print(f"morph targets: {summary.rank} (worst vertex error {summary.worst_error:.3g}; largest motion "
          f"{summary.largest_motion:.3g})")
    if args.frames:
        print(f"exact frames: {args.frames}")
    return EXIT_OK


# --------------------------------------------------------------------------- entry point

def _message(exc: BaseException) -> str:
    from brushes.batch import describe

    return describe(exc)


def _fail(message: str) -> None:
    print(f"{PROG}: error: {message}", file=sys.stderr)


def main(argv: list[str] | None = None) -> int:
    """Run the command line ``argv`` (default ``sys.argv[1:]``) and return the exit code."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:          # --help (0) and usage errors (2)
        return exc.code if isinstance(exc.code, int) else EXIT_BAD_INPUT
    debug = args.debug
    # A job that a script starts with `&` inherits SIGINT ignored (POSIX shells do this for
    # background jobs); the command still honours Ctrl-C and the signal that a script sends it.
    if signal.getsignal(signal.SIGINT) is signal.SIG_IGN:
        signal.signal(signal.SIGINT, signal.default_int_handler)
    # GNU OpenMP's spinning waits starve the other core on a shared machine (a batch of demo
    # poses ran 4x slower); the setting is read when OpenMP loads, so it is made before any command.
    from brushes.kernels import prefer_sleeping_threads

    prefer_sleeping_threads()
    try:
        return args.func(args)
    except KeyboardInterrupt:
        if debug:
            traceback.print_exc()
        print(f"{PROG}: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except BrokenPipeError:
        # The reader of our output went away (e.g. piped into head): nothing left to say.
        try:
            sys.stdout = open(os.devnull, "w")
        except OSError:
            pass
        return EXIT_PARTIAL
    except Exception as exc:
        from brushes.batch import interrupted

        if debug:
            traceback.print_exc()
        if interrupted(exc):
            print(f"{PROG}: interrupted", file=sys.stderr)
            return EXIT_INTERRUPTED
        if isinstance(exc, (ValueError, OSError)):
            _fail(_message(exc))
            return EXIT_BAD_INPUT
        _fail(f"internal error: {_message(exc)} (rerun with --debug for the traceback)")
        return EXIT_PARTIAL


if __name__ == "__main__":
    sys.exit(main())
