"""Benchmark of OBJ input/output: pliant's structure-keeping reader/writer against trimesh.

``python -m benchmarks.files [n_vertices]`` prints the timings; the target is a ratio of at most
1.5 (our load + save over trimesh's ``load(process=False)`` + ``export``) at one million vertices.
"""

from __future__ import annotations

import os
import sys
import tempfile
import time

import numpy as np

__all__ = ["bench_obj", "synthetic_obj"]


def synthetic_obj(path, n_vertices: int) -> tuple[int, int]:
    """Write a wavy grid OBJ with about ``n_vertices`` vertices, one ``vt`` each, ``f v/vt``.

    Returns
    -------
    (vertices, faces) : tuple of int
        Counts actually written (the grid is k x k with k = round(sqrt(n_vertices))).
    """
    k = max(2, int(round(np.sqrt(n_vertices))))
    u, v = np.meshgrid(np.linspace(0.0, 1.0, k), np.linspace(0.0, 1.0, k), indexing="ij")
    u, v = u.ravel(), v.ravel()
    verts = np.stack([u, v, 0.1 * np.sin(6.0 * u) * np.cos(4.0 * v)], axis=1)
    i = (np.arange(k - 1)[:, None] * k + np.arange(k - 1)[None, :]).ravel()
    faces = np.concatenate([np.stack([i, i + k, i + 1], 1), np.stack([i + 1, i + k, i + k + 1], 1)])
    with open(path, "w") as f:
        f.write("# synthetic grid for pliant's I/O benchmark\no grid\n")
        f.write(("v %.6f %.6f %.6f\n" * len(verts)) % tuple(verts.ravel().tolist()))
        f.write(("vt %.6f %.6f\n" * len(verts)) % tuple(np.stack([u, v], 1).ravel().tolist()))
        f.write("g surface\ns 1\n")
        f1 = np.repeat(faces.ravel() + 1, 2)
        f.write(("f %d/%d %d/%d %d/%d\n" * len(faces)) % tuple(f1.tolist()))
    return len(verts), len(faces)


def bench_obj(n_vertices: int = 1_000_000) -> dict:
    """Time load + save of a synthetic OBJ with pliant and with trimesh.

    Parameters
    ----------
    n_vertices : int
        Approximate vertex count of the synthetic grid.

    Returns
    -------
    dict
        ``vertices``, ``faces``, ``file_mb``, ``ours_load_s``, ``ours_save_s``, ``ours_s``,
        ``trimesh_load_s``, ``trimesh_export_s``, ``trimesh_s`` and ``ratio`` (ours / trimesh).
    """
    import trimesh

    from brushes.formats import load_mesh, save_mesh

    n_vertices = int(n_vertices)
    if n_vertices < 4:
        raise ValueError(f"n_vertices: must be at least 4, got {n_vertices}")
    with tempfile.TemporaryDirectory() as folder:
        src = os.path.join(folder, "grid.obj")
        nv, nf = synthetic_obj(src, n_vertices)
        out = os.path.join(folder, "posed.obj")

        t0 = time.perf_counter()
        doc = load_mesh(src)
        t1 = time.perf_counter()
        save_mesh(doc, out, doc.vertices + 0.01)
        t2 = time.perf_counter()

        t3 = time.perf_counter()
        mesh = trimesh.load(src, process=False, force="mesh")
        t4 = time.perf_counter()
        data = mesh.export(file_type="obj")
        with open(os.path.join(folder, "trimesh.obj"), "w") as f:
            f.write(data)
        t5 = time.perf_counter()
        size = os.path.getsize(src) / 1e6
    ours, theirs = t2 - t0, t5 - t3
    return {
        "vertices": nv,
        "faces": nf,
        "file_mb": round(size, 1),
        "ours_load_s": t1 - t0,
        "ours_save_s": t2 - t1,
        "ours_s": ours,
        "trimesh_load_s": t4 - t3,
        "trimesh_export_s": t5 - t4,
        "trimesh_s": theirs,
        "ratio": ours / theirs,
    }


if __name__ == "__main__":  # pragma: no cover - manual benchmark
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 1_000_000
    for key, value in bench_obj(n).items():
        print(f"{key:>18}: {value:.3f}" if isinstance(value, float) else f"{key:>18}: {value}")
