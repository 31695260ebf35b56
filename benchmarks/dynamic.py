"""Benchmarks: `python -m benchmarks.dynamic [--points N] [--only frame,animate]`.

frame: one frame of a dynamic (elastodynamic) brush on N points (default 1,000,000), timed in one
process against one static grab evaluation on the same array (`Grab.displacement(out=)`) and the
plain floor `np.add(points, 1.0, out=buf)`. Timings are interleaved round by round and the best of
each is kept, so load from other work on the machine falls on all of them alike.
Target: a dynamic grab frame <= 4x the static grab.

animate: `pliant animate` of the demo pose (models/mascot.obj with models/mascot-pose.json), 2 s at
30 fps, run as the command in a new process (numba cache warmed by a first run), beside
`pliant apply` of the same pose in the same way. Target: under 60 s.
"""
from __future__ import annotations

import argparse
import math
import os
import subprocess
import sys
import tempfile
import time

import numpy as np

import brushes
from brushes import kernels
from brushes.dynamic import backend_name

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _interleaved(fns, rounds=9):
    """Best wall time (s) of each callable, measured round-robin after one warm-up call each."""
    for fn in fns.values():
        fn()
    best = {k: math.inf for k in fns}
    for _ in range(rounds):
        for k, fn in fns.items():
            t = time.perf_counter()
            fn()
            best[k] = min(best[k], time.perf_counter() - t)
    return best


def bench_frame(n):
    kernels.prefer_sleeping_threads()
    pts = np.random.default_rng(1).normal(size=(n, 3)) * 0.6
    buf = np.empty_like(pts)
    c = (0.1, 0.2, 0.3)
    grab = brushes.Grab(c, 0.5, (0.5, 0.1, 0.0))                       # poisson 0.5, wide
    grab3 = brushes.Grab(c, 0.5, (0.5, 0.1, 0.0), poisson=0.3)
    twist = brushes.Twist(c, 0.5, (0.0, 1.0, 0.0), 60.0)
    t = 0.4
    cases = {
        "np.add(points, 1.0, out=buf)": lambda: np.add(pts, 1.0, out=buf),
        "static grab, wide": lambda: grab.displacement(pts, out=buf),
        "dynamic grab, step": (lambda d: lambda: d.displacement(pts, t, out=buf))(
            brushes.dynamic(grab, shear_speed=2.0)),
        "dynamic grab, ramped + damped": (lambda d: lambda: d.displacement(pts, t, out=buf))(
            brushes.dynamic(grab, shear_speed=2.0, ramp=0.2, damping=1.0)),
        "dynamic grab, poisson 0.3 (two waves)": (lambda d: lambda: d.displacement(pts, t, out=buf))(
            brushes.dynamic(grab3, shear_speed=2.0)),
        "static twist, wide": lambda: twist.displacement(pts, out=buf),
        "dynamic twist, step": (lambda d: lambda: d.displacement(pts, t, out=buf))(
            brushes.dynamic(twist, shear_speed=2.0)),
    }
    best = _interleaved(cases)
    floor, static = best["np.add(points, 1.0, out=buf)"], best["static grab, wide"]
    print(f"\n## frame: one evaluation on {n:,} points ({backend_name()} backend)")
    print(f"{'field':40s} {'ms':>8s} {'/ add':>7s} {'/ static grab':>14s}")
    for name, sec in best.items():
        print(f"{name:40s} {sec * 1e3:8.2f} {sec / floor:7.2f} {sec / static:14.2f}")
    return {name: sec / static for name, sec in best.items()}


def _run(args):
    t = time.perf_counter()
    proc = subprocess.run([sys.executable, "-m", "brushes.cli", *args], cwd=ROOT, capture_output=True, text=True,
                          timeout=1800)
    if proc.returncode != 0:
        raise RuntimeError(proc.stderr)
    return time.perf_counter() - t, proc.stdout


def bench_animate():
    mesh = os.path.join(ROOT, "models", "mascot.obj")
    recipe = os.path.join(ROOT, "models", "mascot-pose.json")
    with tempfile.TemporaryDirectory() as tmp:
        glb, obj = os.path.join(tmp, "pose.glb"), os.path.join(tmp, "posed.obj")
        anim = ["animate", recipe, mesh, "-o", glb, "--seconds", "2", "--fps", "30"]
        first, _ = _run(anim)                                   # compiles the kernels it needs
        warm, out = _run(anim)
        apply_s, _ = _run(["apply", recipe, mesh, "-o", obj])
    print("\n## animate: the demo pose, 2 s at 30 fps (61 frames), as the command")
    print(f"pliant animate: {warm:.1f} s warm (first run with compilation {first:.1f} s); target < 60 s")
    print(f"pliant apply of the same pose: {apply_s:.1f} s; animate / apply: {warm / apply_s:.1f}")
    for line in out.strip().splitlines():
        print(f"  {line}")
    return {"animate_s": warm, "first_s": first, "apply_s": apply_s}


SECTIONS = ("frame", "animate")


def main(argv=None):
    p = argparse.ArgumentParser(prog="python -m benchmarks.dynamic", description=__doc__.splitlines()[0])
    p.add_argument("--points", type=int, default=1_000_000, help="points for the frame section (default 1,000,000)")
    p.add_argument("--only", default=",".join(SECTIONS), help=f"comma-separated sections of: {', '.join(SECTIONS)}")
    args = p.parse_args(argv)
    chosen = [s.strip() for s in args.only.split(",") if s.strip()]
    for s in chosen:
        if s not in SECTIONS:
            p.error(f"--only: unknown section {s!r}; choose from {', '.join(SECTIONS)}")
    for s in chosen:
        bench_frame(args.points) if s == "frame" else bench_animate()
    return 0


if __name__ == "__main__":
    sys.exit(main())
