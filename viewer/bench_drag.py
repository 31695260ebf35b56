"""Drag-update benchmark: ``python -m viewer.bench_drag [n_vertices]``.

One frame of a grab drag in the viewer does three things, timed here separately on a
generated wavy torus (:func:`viewer.bench.wavy_torus`) in a headless OpenGL context:

1. brush: the preview displacement ``response @ move`` with the grab response
   (``brushes.Grab.response``) computed once at the press, added to the press positions;
2. normals: float32 positions and area-weighted vertex normals through the sparse
   vertex-face operator (:func:`viewer.render.vertex_normals`);
3. upload: positions and normals replaced in place with ``glBufferSubData``, then
   ``glFinish`` so the copy has really happened.

The brush radius is large enough (half the torus's size, ``wide`` falloff) that every vertex
lies within ``reach`` of the centre, the worst case of a drag: nothing is skipped. Run it
alone; timings on a shared machine are noisy.
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np

__all__ = ["bench_drag"]


def bench_drag(n_vertices=200_000, *, repeats=30, seed=0):
    """Median times of the parts of one grab-drag update over ``repeats`` frames.

    Parameters
    ----------
    n_vertices : int
        About this many vertices (the torus grid rounds it).
    repeats : int, keyword-only
        Frames timed (after one warm-up frame).
    seed : int, keyword-only
        Seed of the random drag moves.

    Returns
    -------
    dict
        ``n_vertices``, ``n_faces``, ``reach_fraction`` (share of vertices inside
        ``reach(tol)``), ``response_s`` (one-off cost at the press), and medians in
        milliseconds: ``brush_ms``, ``normals_ms``, ``upload_ms``, ``total_ms`` (the sum
        of the three measured together per frame).
    """
    import brushes
    from viewer.bench import wavy_torus
    from viewer.snapshot import ensure_gl_context

    n_vertices = int(n_vertices)
    if n_vertices < 16:
        raise ValueError(f"n_vertices: must be >= 16, got {n_vertices}")
    repeats = int(repeats)
    if repeats < 1:
        raise ValueError(f"repeats: must be >= 1, got {repeats}")
    vertices, faces = wavy_torus(2 * n_vertices)
    window = ensure_gl_context()
    try:
        from pyglet import gl

        from viewer.render import MeshRenderer, vertex_normals
        renderer = MeshRenderer(vertices, faces)
        center = vertices[np.argmax(vertices[:, 0])]
        diagonal = float(np.linalg.norm(vertices.max(axis=0) - vertices.min(axis=0)))
        radius = 0.5 * diagonal / 3.0
        probe = brushes.Grab(center, radius, [0.0, 0.0, 0.0], falloff="wide")
        t = time.perf_counter()
        response = np.asarray(probe.response(vertices), dtype=np.float64).reshape(-1, 3)
        response_s = time.perf_counter() - t
        rng = np.random.default_rng(seed)
        tolerance = 1e-5 * diagonal
        brush_ms, normals_ms, upload_ms, total_ms = [], [], [], []
        reach_fraction = None
        for frame in range(repeats + 1):
            move = rng.normal(scale=0.05 * diagonal, size=3)
            if reach_fraction is None:
                reach = brushes.Grab(center, radius, move, falloff="wide").reach(tolerance)
                reach_fraction = float(np.mean(np.linalg.norm(vertices - center, axis=1) < reach))
            t0 = time.perf_counter()
            positions = vertices + (response @ move).reshape(-1, 3)
            t1 = time.perf_counter()
            positions32 = positions.astype(np.float32)
            vertex_normals(renderer.normal_operator, positions32, renderer.faces,
                           out=renderer.normals, normalize=False)
            t2 = time.perf_counter()
            renderer.set_positions(positions32, normals=renderer.normals)
            gl.glFinish()
            t3 = time.perf_counter()
            if frame:  # the first frame warms caches and is not counted
                brush_ms.append(1e3 * (t1 - t0))
                normals_ms.append(1e3 * (t2 - t1))
                upload_ms.append(1e3 * (t3 - t2))
                total_ms.append(1e3 * (t3 - t0))
        renderer.delete()
    finally:
        if window is not None:
            window.close()
    return {
        "n_vertices": len(vertices), "n_faces": len(faces), "reach_fraction": reach_fraction,
        "response_s": response_s,
        "brush_ms": statistics.median(brush_ms), "normals_ms": statistics.median(normals_ms),
        "upload_ms": statistics.median(upload_ms), "total_ms": statistics.median(total_ms),
    }


def main(argv=None):
    parser = argparse.ArgumentParser(prog="python -m viewer.bench_drag",
                                     description="time one grab-drag update of the viewer")
    parser.add_argument("n_vertices", nargs="?", type=int, default=200_000)
    parser.add_argument("--repeats", type=int, default=30)
    args = parser.parse_args(argv)
    r = bench_drag(args.n_vertices, repeats=args.repeats)
    print(f"{r['n_vertices']:,} vertices, {r['n_faces']:,} faces; "
          f"{100 * r['reach_fraction']:.0f}% of vertices within reach; "
          f"response at press {1e3 * r['response_s']:.0f} ms")
    print(f"median per drag update: brush {r['brush_ms']:.2f} ms + normals {r['normals_ms']:.2f} ms"
          f" + upload {r['upload_ms']:.2f} ms = {r['total_ms']:.2f} ms (target <= 16 ms)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
