"""Benchmarks: `python -m benchmarks.engine [--points N] [--only SECTION,...]`.

Ratios are measured in one process against baselines on the same data:
- the memory-bound floor `np.add(points, 1.0, out=buf)`;
- a straightforward numpy evaluation of the same formula (the 3x3 kernel matrix per point,
  or the third-order gradient tensor for the affine loads, then a contraction).

Sections: kernels, flow, startup, io, batch, picking, drag, handles. Figures go to stdout as a table.
"""
from __future__ import annotations

import argparse
import math
import subprocess
import sys
import time

import numpy as np

import brushes
from brushes import kernels
from brushes.flow import FlowStats


def _best(fn, repeat=5):
    """Best-of-`repeat` wall time of fn() in seconds (after one warm-up call)."""
    fn()
    best = math.inf
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t)
    return best


def naive_grab(points, b):
    """Straightforward numpy: K (n, 3, 3) per point from de Goes & James 2017 eq. 9, then K @ f."""
    a = 1.0
    beta = kernels.beta_of(b.poisson)
    eps, w = kernels.scales(b.falloff, b.radius)
    norm = kernels.center_value("grab", eps, w, beta)
    r = points - b.center
    u = np.zeros_like(r)
    for e, wk in zip(eps, w):
        re = np.sqrt(np.sum(r * r, axis=1) + e * e)
        K = ((a - a * beta) / re + a * e * e / (2 * re**3))[:, None, None] * np.eye(3) \
            + (a * beta / re**3)[:, None, None] * r[:, :, None] * r[:, None, :]
        u += wk / norm * np.einsum("nij,j->ni", K, b.move)
    return u


def naive_affine(points, b):
    """Straightforward numpy: the gradient tensor d_k K_ij (n, 3, 3, 3) contracted with the load."""
    beta = kernels.beta_of(b.poisson)
    eps, w = kernels.scales(b.falloff, b.radius)
    F = b._load
    r = points - b.center
    u = np.zeros_like(r)
    I3 = np.eye(3)
    for e, wk in zip(eps, w):
        re = np.sqrt(np.sum(r * r, axis=1) + e * e)
        dA = (-(1 - beta) / re**3 - 1.5 * e * e / re**5)[:, None, None, None]
        B = (beta / re**3)[:, None, None, None]
        dB = (-3 * beta / re**5)[:, None, None, None]
        dK = dA * I3[None, :, :, None] * r[:, None, None, :] \
            + dB * r[:, :, None, None] * r[:, None, :, None] * r[:, None, None, :] \
            + B * (I3[None, :, None, :] * r[:, None, :, None] + I3[None, None, :, :] * r[:, :, None, None])
        u += wk * np.einsum("nijk,jk->ni", dK, F)
    return u


def example_brushes(falloff="wide"):
    c = (0.1, 0.2, 0.3)
    return [brushes.Grab(c, 0.5, (0.5, 0.1, 0.0), falloff=falloff),
            brushes.Twist(c, 0.5, (0.0, 1.0, 0.0), 60.0, falloff=falloff),
            brushes.Scale(c, 0.5, 1.3, falloff=falloff),
            brushes.Pinch(c, 0.5, [[0.2, 0.0, 0.0], [0.0, -0.1, 0.0], [0.0, 0.0, -0.1]], falloff=falloff)]


def bench_kernels(n):
    rng = np.random.default_rng(1)
    pts = rng.normal(size=(n, 3))
    buf = np.empty_like(pts)
    floor = _best(lambda: np.add(pts, 1.0, out=buf))
    rows = [("np.add(points, 1.0, out=buf)", floor, 1.0, "", "")]
    sub = pts[: max(1, n // 10)]  # the naive version allocates (n, 3, 3, 3): time it on a tenth
    for falloff in kernels.FALLOFFS:
        for b in example_brushes(falloff):
            t = _best(lambda: b.displacement(pts, out=buf))
            naive = naive_grab if b.kind == "grab" else naive_affine
            t_naive = _best(lambda: naive(sub, b), repeat=2) * (n / len(sub))
            t_sub = _best(lambda: b.displacement(sub))
            check = np.abs(naive(sub[:1000], b) - b.displacement(sub[:1000])).max()
            rows.append((f"{b.kind} {falloff} out=", t, t / floor, f"{t_naive / t:.1f}x",
                         f"{t_naive / (t_sub * n / len(sub)):.1f}x" if check < 1e-9 else "MISMATCH"))
    print(f"\n## kernels: displacement on {n:,} points ({kernels.backend_name()} backend)")
    print(f"{'field':34s} {'ms':>8s} {'Mpts/s':>8s} {'/ add':>7s} {'naive/this':>11s}")
    for name, t, ratio, speed, _ in rows:
        print(f"{name:34s} {t * 1e3:8.2f} {n / t / 1e6:8.1f} {ratio:7.2f} {speed:>11s}")


def bench_flow(n):
    rng = np.random.default_rng(2)
    pts = rng.normal(scale=0.6, size=(n, 3))
    buf = np.empty_like(pts)
    floor = _best(lambda: np.add(pts, 1.0, out=buf), repeat=3)
    c = (0.0, 0.0, 0.0)
    cases = [("grab move = radius", brushes.Grab(c, 0.5, (0.5, 0.0, 0.0))),
             ("grab move = 2 radius", brushes.Grab(c, 0.5, (1.0, 0.0, 0.0))),
             ("twist 90 deg", brushes.Twist(c, 0.5, (0, 1, 0), 90.0)),
             ("twist 720 deg", brushes.Twist(c, 0.5, (0, 1, 0), 720.0)),
             ("scale x2", brushes.Scale(c, 0.5, 2.0)),
             ("pinch |G| = 0.5", brushes.Pinch(c, 0.5, [[0.4, 0, 0], [0, -0.2, 0], [0, 0, -0.2]])),
             ("mirrored grab", brushes.mirror(brushes.Grab((0.3, 0, 0), 0.5, (0, 0.5, 0)), (1, 0, 0)))]
    print(f"\n## flow: apply(flow=True) on {n:,} points")
    print(f"{'brush':24s} {'steps':>5s} {'evals':>5s} {'ms':>9s} {'/ add':>7s}")
    for name, b in cases:
        stats = FlowStats()
        t = _best(lambda: b.apply(pts, stats=stats), repeat=2)
        print(f"{name:24s} {stats.steps:5d} {stats.evaluations:5d} {t * 1e3:9.1f} {t / floor:7.1f}")


def bench_startup():
    code = ("import time; t = time.perf_counter(); import numpy as np, brushes; "
            "brushes.Grab((0, 0, 0), 1.0, (1, 0, 0)).displacement(np.zeros((10, 3))); "
            "print(time.perf_counter() - t)")
    subprocess.run([sys.executable, "-c", code], check=True, capture_output=True)  # warm the cache
    times = [float(subprocess.run([sys.executable, "-c", code], check=True, capture_output=True,
                                  text=True).stdout) for _ in range(3)]
    print("\n## startup: a new process's import + first brush call (numba cache warm)")
    print(f"best {min(times):.2f} s, worst {max(times):.2f} s")


def _section(title, module, func, *args, **kwargs):
    """Run a benchmark function from another module and print its figures under a heading."""
    import importlib

    res = getattr(importlib.import_module(module), func)(*args, **kwargs)
    print(f"\n## {title}")
    for k, v in res.items():
        print(f"{k}: {v:.4g}" if isinstance(v, float) else f"{k}: {v}")


def bench_io(n):
    _section(f"io: OBJ load + structure-keeping save, {n:,} vertices", "benchmarks.files", "bench_obj", n)


def bench_batch_section(copies):
    _section(f"batch: {copies} copies of the demo model", "benchmarks.batch", "bench_batch", copies=copies)


def bench_picking_section(n):
    _section(f"picking: {n:,} triangles", "benchmarks.picking", "bench_picking", n)


def bench_drag_section(n):
    _section(f"viewer drag update: {n:,} vertices", "benchmarks.drag", "bench_drag", n)


def _ring(k, spacing_radii, radius):
    """k handle centres on a circle, `spacing_radii` radii apart, and moves of one radius each."""
    ring = k * spacing_radii * radius / (2 * math.pi)
    a = 2 * math.pi * np.arange(k) / k
    centers = ring * np.stack([np.cos(a), np.sin(a), np.zeros(k)], axis=1)
    rng = np.random.default_rng(3)
    d = rng.normal(size=(k, 3))
    moves = radius * d / np.linalg.norm(d, axis=1, keepdims=True)
    return centers, moves, ring


def bench_handles(n, k=8):
    """Handles: one field evaluation against k separate grabs, and the flow's evaluations per unit
    of gradient bound against a grab's, on the same points in one process."""
    radius = 0.25
    centers, moves, ring = _ring(k, 4.0, radius)
    rng = np.random.default_rng(4)
    pts = rng.normal(scale=0.5 * ring, size=(n, 3))
    buf = np.empty_like(pts)
    rots = rng.normal(size=(k, 3)) * 30.0
    grabs = [brushes.Grab(c, radius, m) for c, m in zip(centers, moves)]
    twists = [brushes.Twist(c, radius, r, float(np.linalg.norm(r))) for c, r in zip(centers, rots)]
    h = brushes.Handles(centers, radius, moves)
    hr = brushes.Handles(centers, radius, moves, rotations=rots)

    def separate(items):
        for b in items:
            b.displacement(pts, out=buf)

    print(f"\n## handles: k = {k} on {n:,} points (handles {4.0:g} radii apart, moves of one radius)")
    print(f"{'field evaluation':40s} {'ms':>8s} {'/ separate':>11s}")
    # interleaved best-of, so a busy machine slows both sides alike
    t_grabs = t_h = t_twists = t_hr = math.inf
    for _ in range(5):
        t_grabs = min(t_grabs, _best(lambda: separate(grabs), repeat=1))
        t_h = min(t_h, _best(lambda: h.displacement(pts, out=buf), repeat=1))
        t_twists = min(t_twists, _best(lambda: separate(grabs + twists), repeat=1))
        t_hr = min(t_hr, _best(lambda: hr.displacement(pts, out=buf), repeat=1))
    print(f"{f'{k} separate grabs':40s} {t_grabs * 1e3:8.2f} {1.0:11.2f}")
    print(f"{f'Handles, {k} forces':40s} {t_h * 1e3:8.2f} {t_h / t_grabs:11.2f}")
    print(f"{f'{k} separate grabs + {k} twists':40s} {t_twists * 1e3:8.2f} {t_twists / t_grabs:11.2f}")
    print(f"{f'Handles, {k} forces + {k} twist loads':40s} {t_hr * 1e3:8.2f} {t_hr / t_grabs:11.2f} "
          f"({t_hr / t_twists:.2f} of grabs + twists)")
    print(f"\n{'flow':40s} {'L':>6s} {'steps':>5s} {'evals':>5s} {'evals/L':>7s} {'ms':>9s}")
    cases = [("grab, move = radius", grabs[0]), (f"Handles, {k} moves of a radius", h),
             (f"Handles, {k} moves + turns to 30 deg", hr)]
    for name, b in cases:
        stats = FlowStats()
        t = _best(lambda: b.apply(pts, stats=stats), repeat=1)
        L = max(b.velocity_lipschitz_at(t_) for t_ in np.linspace(0, 1, 9))
        print(f"{name:40s} {L:6.2f} {stats.steps:5d} {stats.evaluations:5d} {stats.evaluations / L:7.1f} {t * 1e3:9.1f}")


SECTIONS = ("kernels", "flow", "startup", "io", "batch", "picking", "drag", "handles")


def main(argv=None):
    p = argparse.ArgumentParser(prog="python -m benchmarks.engine", description=__doc__.splitlines()[0])
    p.add_argument("--points", type=int, default=1_000_000, help="points for kernels and flow (default 1,000,000)")
    p.add_argument("--only", default="kernels,flow,startup",
                   help=f"comma-separated sections of: {', '.join(SECTIONS)} (default kernels,flow,startup)")
    args = p.parse_args(argv)
    chosen = [s.strip() for s in args.only.split(",") if s.strip()]
    for s in chosen:
        if s not in SECTIONS:
            p.error(f"--only: unknown section {s!r}; choose from {', '.join(SECTIONS)}")
    print(f"pliant benchmarks, {kernels.backend_name()} backend")
    for s in chosen:
        {"kernels": lambda: bench_kernels(args.points), "flow": lambda: bench_flow(args.points),
         "startup": bench_startup, "io": lambda: bench_io(1_000_000), "batch": lambda: bench_batch_section(200),
         "picking": lambda: bench_picking_section(1_000_000), "drag": lambda: bench_drag_section(200_000),
         "handles": lambda: bench_handles(args.points)}[s]()
    return 0


if __name__ == "__main__":
    sys.exit(main())
