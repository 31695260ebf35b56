"""Picking benchmark: ``python -m benchmarks.picking [n_triangles]``.

Builds a :class:`viewer.picking.Picker` on a generated wavy torus, refits it after a
deformation and times picks along rays aimed at the surface.  Run it alone: timings on a
shared machine are noisy.
"""

from __future__ import annotations

import argparse
import math
import statistics
import time

import numpy as np

from viewer.picking import Picker, backend_name

__all__ = ["bench_picking", "wavy_torus"]


def wavy_torus(n_triangles):
    """A closed torus grid with a ripple, about ``n_triangles`` triangles.

    Returns vertices (n, 3) float64 and faces (m, 3) int64 with m = 2 * nu * nv >= n_triangles.
    """
    n_triangles = int(n_triangles)
    if n_triangles < 8:
        raise ValueError(f"n_triangles: must be >= 8, got {n_triangles}")
    nv = max(2, int(math.sqrt(n_triangles / 4)))
    nu = max(2, math.ceil(n_triangles / (2 * nv)))
    u = np.linspace(0, 2 * np.pi, nu, endpoint=False)
    v = np.linspace(0, 2 * np.pi, nv, endpoint=False)
    uu, vv = np.meshgrid(u, v, indexing="ij")
    r = 0.35 + 0.03 * np.sin(7 * uu) * np.cos(5 * vv)
    x = (1 + r * np.cos(vv)) * np.cos(uu)
    y = r * np.sin(vv)
    z = (1 + r * np.cos(vv)) * np.sin(uu)
    vertices = np.stack([x, y, z], axis=-1).reshape(-1, 3)
    i, j = np.meshgrid(np.arange(nu), np.arange(nv), indexing="ij")
    a = i * nv + j
    b = ((i + 1) % nu) * nv + j
    c = ((i + 1) % nu) * nv + (j + 1) % nv
    d = i * nv + (j + 1) % nv
    faces = np.concatenate([np.stack([a, b, c], -1).reshape(-1, 3), np.stack([a, c, d], -1).reshape(-1, 3)])
    return vertices, faces.astype(np.int64)


def bench_picking(n_triangles=1_000_000, *, n_picks=200, seed=0, backend=None, repeats=9):
    """Time build, refit and picks on a ``wavy_torus(n_triangles)``.

    Returns a dict: ``backend``, ``n_triangles``, ``build_s`` (first build, including numba
    compilation or cache loading), ``rebuild_s`` (a second build), ``refit_s`` (median of
    ``repeats``), ``refit_min_s``, ``add_s`` (median of ``np.add(vertices, 1.0, out=buf)`` over
    the same (n, 3) vertex array, timed between the refits: the baseline of the ratio),
    ``pick_median_s`` and ``pick_max_s`` over ``n_picks`` rays, and ``hit_fraction``.
    """
    vertices, faces = wavy_torus(n_triangles)
    t = time.perf_counter()
    picker = Picker(vertices, faces, backend=backend)
    build = time.perf_counter() - t
    t = time.perf_counter()
    picker.rebuild(vertices)
    rebuild = time.perf_counter() - t

    moved = vertices.copy()
    moved[:, 1] += 0.1 * np.sin(3 * vertices[:, 0])
    refits, adds = [], []
    buf = np.empty_like(vertices)
    for _ in range(repeats):  # interleaved with the baseline, so both see the same load
        t = time.perf_counter()
        picker.refit(moved)
        refits.append(time.perf_counter() - t)
        t = time.perf_counter()
        np.add(moved, 1.0, out=buf)
        adds.append(time.perf_counter() - t)

    rng = np.random.default_rng(seed)
    targets = moved[faces[rng.integers(0, len(faces), n_picks)]].mean(axis=1)  # face centroids
    origins = rng.normal(size=(n_picks, 3))
    origins *= 4 / np.linalg.norm(origins, axis=1, keepdims=True)
    picker.pick(origins[0], targets[0] - origins[0])  # warm-up
    times, hits = [], 0
    for o, p in zip(origins, targets):
        t = time.perf_counter()
        hit = picker.pick(o, p - o)
        times.append(time.perf_counter() - t)
        hits += hit.hit
    return {
        "backend": picker.backend,
        "n_triangles": len(faces),
        "build_s": build,
        "rebuild_s": rebuild,
        "refit_s": statistics.median(refits),
        "refit_min_s": min(refits),
        "add_s": statistics.median(adds),
        "pick_median_s": statistics.median(times),
        "pick_max_s": max(times),
        "hit_fraction": hits / n_picks,
    }


def main(argv=None):
    parser = argparse.ArgumentParser(prog="python -m benchmarks.picking", description=__doc__.splitlines()[0])
    parser.add_argument("n_triangles", nargs="?", type=int, default=1_000_000)
    parser.add_argument("--picks", type=int, default=200)
    parser.add_argument("--backend", choices=["numba", "numpy"], default=None)
    parser.add_argument("--repeats", type=int, default=9, help="refits timed (median reported)")
    args = parser.parse_args(argv)
    r = bench_picking(args.n_triangles, n_picks=args.picks, backend=args.backend or backend_name(),
                      repeats=args.repeats)
    print(f"backend {r['backend']}, {r['n_triangles']} triangles")
    print(f"build   {r['build_s'] * 1e3:9.1f} ms (first; rebuild {r['rebuild_s'] * 1e3:.1f} ms)")
    print(f"refit   {r['refit_s'] * 1e3:9.1f} ms median, {r['refit_min_s'] * 1e3:.1f} ms fastest "
          f"({r['refit_s'] / r['add_s']:.1f}x np.add over the vertices, {r['add_s'] * 1e3:.2f} ms)")
    print(f"pick    {r['pick_median_s'] * 1e3:9.3f} ms median, {r['pick_max_s'] * 1e3:.3f} ms max, "
          f"{r['hit_fraction']:.0%} hit")


if __name__ == "__main__":
    main()
