"""Drag-update benchmark: ``python -m benchmarks.drag [n_vertices]``.

One frame of a grab drag in the viewer does three things, timed here separately on a
generated wavy torus (:func:`benchmarks.picking.wavy_torus`) in a headless OpenGL context:

1. brush: :meth:`viewer.session.Session.drag`, i.e. the gesture, the brush and its
   ``reach(tol)``, and the preview displacement ``response @ move`` with the grab response
   (``brushes.Grab.response``) computed once per press, put back in vertex order;
2. normals: float32 positions and area-weighted vertex normals through the sparse
   vertex-face operator (:class:`viewer.render.NormalField`, formulas of :mod:`brushes.surface`);
3. upload: positions and normals replaced in place with ``glBufferSubData``, then
   ``glFinish`` so the copy has really happened.

The brush is the viewer's default (radius 0.12 of the model's diagonal, ``wide`` falloff),
whose far field reaches every vertex at the preview tolerance: nothing is skipped, the worst
case of a drag. Run it alone; timings on a shared machine are noisy.
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np

__all__ = ["bench_drag"]


def bench_drag(n_vertices=200_000, *, repeats=30):
    """Median times of the parts of one grab-drag update over ``repeats`` drag events.

    Parameters
    ----------
    n_vertices : int
        About this many vertices (the torus grid rounds it).
    repeats : int, keyword-only
        Drag events timed (after one warm-up event, which computes the grab response).

    Returns
    -------
    dict
        ``n_vertices``, ``n_faces``, ``reach_fraction`` (share of vertices inside
        ``reach(tol)`` at the last event), ``press_s`` (the first drag event, which computes
        the response), and medians in milliseconds: ``brush_ms``, ``normals_ms``,
        ``upload_ms``, ``total_ms`` (the three measured together per event) and ``cpu_ms``
        (the process's CPU time for the same work: on a busy machine, where other processes
        stretch the wall-clock times, it is the better measure of the work itself).
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
        t = time.perf_counter()
        session.drag(x + 1, y, 1, 0, LEFT)
        press_s = time.perf_counter() - t
        brush_ms, normals_ms, upload_ms, total_ms, cpu_ms = [], [], [], [], []
        for i in range(1, repeats + 1):
            c0 = time.process_time()
            t0 = time.perf_counter()
            session.drag(x + 1 + 2 * i, y + i, 2, 1, LEFT)
            t1 = time.perf_counter()
            positions = session.shown().astype(np.float32)
            renderer.field.full(positions)
            t2 = time.perf_counter()
            renderer.set_positions(positions, normals=renderer.normals)
            gl.glFinish()
            t3 = time.perf_counter()
            cpu_ms.append(1e3 * (time.process_time() - c0))
            brush_ms.append(1e3 * (t1 - t0))
            normals_ms.append(1e3 * (t2 - t1))
            upload_ms.append(1e3 * (t3 - t2))
            total_ms.append(1e3 * (t3 - t0))
        drag = session._drag.state
        reach_fraction = drag.touched_count / len(vertices)
        session.cancel()
        renderer.delete()
    finally:
        if window is not None:
            window.close()
    return {
        "n_vertices": len(vertices), "n_faces": len(faces), "reach_fraction": reach_fraction,
        "press_s": press_s,
        "brush_ms": statistics.median(brush_ms), "normals_ms": statistics.median(normals_ms),
        "upload_ms": statistics.median(upload_ms), "total_ms": statistics.median(total_ms),
        "cpu_ms": statistics.median(cpu_ms),
    }


def main(argv=None):
    parser = argparse.ArgumentParser(prog="python -m benchmarks.drag",
                                     description="time one grab-drag update of the viewer")
    parser.add_argument("n_vertices", nargs="?", type=int, default=200_000)
    parser.add_argument("--repeats", type=int, default=30)
    args = parser.parse_args(argv)
    r = bench_drag(args.n_vertices, repeats=args.repeats)
    print(f"{r['n_vertices']:,} vertices, {r['n_faces']:,} faces; "
          f"{100 * r['reach_fraction']:.0f}% of vertices within reach; "
          f"first drag event (grab response) {1e3 * r['press_s']:.0f} ms")
    print(f"median per drag update: brush {r['brush_ms']:.2f} ms + normals {r['normals_ms']:.2f} ms"
          f" + upload {r['upload_ms']:.2f} ms = {r['total_ms']:.2f} ms (target <= 16 ms);"
          f" CPU time {r['cpu_ms']:.2f} ms")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
