"""Drag-update benchmark: ``python -m benchmarks.drag [n_vertices ...]``.

One drag event of the viewer's default grab (radius 0.12 of the model's diagonal, ``wide``
falloff, whose far field reaches every vertex) on a generated wavy torus
(:func:`benchmarks.picking.wavy_torus`), timed in parts:

1. brush: the exact stroke the release will commit, ``Brush.apply`` with the flow on every
   vertex (:mod:`viewer.tools.strokes`), as the preview worker computes it;
2. normals: the worker's vertex normals of that result, recomputed only around vertices that
   moved more than the preview tolerance (:meth:`viewer.render.NormalField.update`), and
   that update alone on every vertex (the rest is the session's bookkeeping around it);
3. upload: positions and normals replaced in place with ``glBufferSubData``, then
   ``glFinish`` so the copy has really happened (headless OpenGL);
4. ui: what a drag event costs the window's thread when the preview runs on the worker
   (:class:`viewer.session.Session` with ``threaded=True``: the gesture and the request);
5. refit: the picking refit after the stroke is committed (:meth:`viewer.picking.Picker.refit`).

Each is reported in milliseconds and as a ratio to ``np.add(vertices, 1.0, out=buf)`` over
the same (n, 3) float64 vertex array, timed in the same process, so the ratios say how much
work a part is regardless of the machine's speed. Run it alone; timings on a shared machine
are noisy (medians of ``repeats`` events).
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np

__all__ = ["bench_drag", "bench_tools", "SIZES"]

SIZES = (200_000, 655_000, 1_000_000)


def _median_ms(fn, repeats):
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return 1e3 * statistics.median(times)


def bench_drag(n_vertices=200_000, *, repeats=10):
    """Median times of the parts of one grab-drag update over ``repeats`` drag events.

    Parameters
    ----------
    n_vertices : int
        About this many vertices (the torus grid rounds it).
    repeats : int, keyword-only
        Drag events timed after one warm-up event.

    Returns
    -------
    dict
        ``n_vertices``, ``n_faces``, ``add_ms`` (the baseline), medians in milliseconds
        ``brush_ms``, ``normals_ms``, ``field_ms`` (of the normals, the
        :meth:`viewer.render.NormalField.update` of every vertex alone), ``upload_ms``, ``ui_ms``,
        ``refit_ms``, the same divided
        by ``add_ms`` under ``*_ratio``, ``moved_fraction`` (share of vertices whose normals
        were recomputed at the last event) and ``exact`` (largest gap between the last preview
        and the committed positions, relative to the stroke's largest motion).
    """
    from benchmarks.picking import wavy_torus
    from viewer.session import LEFT, Session
    from viewer.snapshot import ensure_gl_context

    n_vertices = int(n_vertices)
    if n_vertices < 16:
        raise ValueError(f"n_vertices: must be >= 16, got {n_vertices}")
    repeats = int(repeats)
    if repeats < 1:
        raise ValueError(f"repeats: must be >= 1, got {repeats}")
    vertices, faces = wavy_torus(2 * n_vertices)
    buf = np.empty_like(vertices)
    add_ms = _median_ms(lambda: np.add(vertices, 1.0, out=buf), max(5 * repeats, 20))

    session = Session(vertices, faces, size=(800, 600), journal=False)
    x, y = 400.0, 300.0
    while not session.pick(x, y).hit:  # walk right from the centre to the torus's surface
        x += 2.0
        if x > 800:
            raise RuntimeError("no surface under the benchmark's drag")
    window = ensure_gl_context()
    try:
        from pyglet import gl

        from viewer.render import MeshRenderer
        renderer = MeshRenderer(vertices, faces)
        session.press(x, y, LEFT)
        session.drag(x + 1, y, 1, 0, LEFT)  # warm-up: compiles or loads the kernels
        brush, normals, upload, moved = [], [], [], 0.0
        for i in range(1, repeats + 1):
            session.drag(x + 1 + 2 * i, y + i, 2, 1, LEFT)  # inline: the exact stroke now
            budget = session.budget
            brush.append(budget["brush"])
            normals.append(budget["normals"])
            moved = budget["moved"]
            positions = np.asarray(session.shown(), dtype=np.float32)
            t = time.perf_counter()
            renderer.set_positions(positions, normals=session.shown_normals())
            gl.glFinish()
            upload.append(1e3 * (time.perf_counter() - t))
        last = np.array(session.shown())
        # the normals' own kernels on the last preview: NormalField.update of every vertex (the
        # rest of the normals part is the session's bookkeeping around it)
        from viewer.render import NormalField, moved_rows
        field = NormalField(faces, len(vertices))
        start32 = vertices.astype(np.float32)
        field.full(start32)
        last32 = last.astype(np.float32)
        everything = moved_rows(last32, start32, 0.0)
        field_ms = _median_ms(lambda: field.update(last32, everything), repeats)
        end = (x + 1 + 2 * repeats, y + repeats)
        session.release(*end, LEFT)
        committed = np.asarray(session.vertices)
        motion = float(np.abs(committed - vertices).max())
        exact = float(np.abs(last - committed).max()) / motion
        refit_ms = _median_ms(lambda: session.picker.refit(committed), 5)
        renderer.delete()
    finally:
        if window is not None:
            window.close()
    session.close()

    threaded = Session(vertices, faces, size=(800, 600), journal=False, threaded=True,
                       picker=session.picker)
    try:
        threaded.press(x, y, LEFT)
        ui = []
        for i in range(1, repeats + 1):
            t = time.perf_counter()
            threaded.drag(x + 1 + 2 * i, y + i, 2, 1, LEFT)
            ui.append(1e3 * (time.perf_counter() - t))
        threaded.cancel()
        threaded.settle()
    finally:
        threaded.close()

    result = {
        "n_vertices": len(vertices), "n_faces": len(faces), "add_ms": add_ms,
        "brush_ms": statistics.median(brush), "normals_ms": statistics.median(normals),
        "upload_ms": statistics.median(upload), "ui_ms": statistics.median(ui),
        "refit_ms": refit_ms, "field_ms": field_ms, "moved_fraction": moved, "exact": exact,
    }
    for part in ("brush", "normals", "field", "upload", "ui", "refit"):
        result[f"{part}_ratio"] = result[f"{part}_ms"] / add_ms
    return result


def bench_tools(n_vertices=655_000, *, repeats=5):
    """The brush part of each tool's stroke (``Brush.apply`` with the flow, as the preview
    worker computes it) on a wavy torus, radius 0.12 of its size, wide falloff.

    Returns a list of ``(name, ms, ratio to np.add over the same vertices, RK4 steps)``: grab,
    twist (30 degrees), scale (1.3), pinch, each with a mirror across the torus's symmetry plane,
    a grab holding one pin, and two handles (one moved, with and without a 30-degree turn, one
    held; then with a pin).
    """
    import brushes
    from brushes.flow import FlowStats
    from benchmarks.picking import wavy_torus

    vertices, _ = wavy_torus(2 * int(n_vertices))
    buf = np.empty_like(vertices)
    add_ms = _median_ms(lambda: np.add(vertices, 1.0, out=buf), max(5 * repeats, 20))
    size = float(np.ptp(vertices, axis=0).max())
    c = vertices[np.argmax(vertices[:, 0])]
    r = 0.12 * size
    made = {"grab": brushes.Grab(c, r, [0.0, 0.05 * size, 0.0]),
            "twist": brushes.Twist(c, r, [1.0, 0.0, 0.0], 30.0),
            "scale": brushes.Scale(c, r, 1.3),
            "pinch": brushes.Pinch(c, r, [[0.3, 0.0, 0.0], [0.0, -0.3, 0.0], [0.0, 0.0, 0.0]])}
    rows = []
    for name, b in list(made.items()) + [(f"{k} + mirror", brushes.mirror(v, [1.0, 0.0, 0.0]))
                                         for k, v in made.items()]:
        rows.append((name, b, None))
    pin = c + [0.0, -0.3 * size, 0.0]
    rows.append(("grab + 1 pin", made["grab"], pin))
    far = vertices[np.argmin(vertices[:, 0])]
    handles = brushes.Handles([c, far], r, [[0.0, 0.05 * size, 0.0], [0.0, 0.0, 0.0]])
    turned = brushes.Handles([c, far], r, [[0.0, 0.05 * size, 0.0], [0.0, 0.0, 0.0]],
                             rotations=[[0.0, 0.0, 30.0], [0.0, 0.0, 0.0]])
    rows += [("handles, 2 (one held)", handles, None), ("handles, 2, one turned 30 degrees", turned, None),
             ("handles, 2 + 1 pin", handles, pin)]
    out = []
    for name, b, pin in rows:
        pins = None if pin is None else pin[None, :]
        b.apply(vertices[:64], pins=pins)  # compiles or loads the kernels
        stats = FlowStats()
        ms = _median_ms(lambda: b.apply(vertices, pins=pins, stats=stats), repeats)
        out.append((name, ms, ms / add_ms, stats.steps))
    return out


def main(argv=None):
    parser = argparse.ArgumentParser(prog="python -m benchmarks.drag",
                                     description="time the parts of one drag update of the viewer")
    parser.add_argument("n_vertices", nargs="*", type=int,
                        help=f"sizes (default {', '.join(map(str, SIZES))}; with --tools 655000)")
    parser.add_argument("--repeats", type=int, default=10)
    parser.add_argument("--tools", action="store_true",
                        help="instead: the brush part of every tool's stroke at each size")
    args = parser.parse_args(argv)
    from brushes.kernels import prefer_sleeping_threads
    prefer_sleeping_threads()  # as the `pliant` command does before the viewer's first kernel
    if args.tools:
        for n in args.n_vertices or [655_000]:
            print(f"| stroke, about {n:,} vertices | brush part | ratio to np.add | RK4 steps |")
            print("| --- | --- | --- | --- |")
            for name, ms, ratio, steps in bench_tools(n, repeats=args.repeats):
                print(f"| {name} | {ms:.1f} ms | {ratio:.1f}x | {steps} |", flush=True)
        return 0
    print("| vertices | np.add | brush (exact flow) | normals | of which NormalField | upload | UI thread | "
          "refit | normals redone | preview vs commit |")
    print("| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |")
    for n in args.n_vertices or SIZES:
        r = bench_drag(n, repeats=args.repeats)

        def cell(part):
            return f"{r[part + '_ms']:.1f} ms ({r[part + '_ratio']:.1f}x)"

        print(f"| {r['n_vertices']:,} | {r['add_ms']:.2f} ms | {cell('brush')} | {cell('normals')} | "
              f"{cell('field')} | "
              f"{cell('upload')} | {cell('ui')} | {cell('refit')} | "
              f"{100 * r['moved_fraction']:.0f}% | {r['exact']:.1e} |", flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
