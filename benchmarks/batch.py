"""Time ``pliant batch`` over copies of the demo model: ``python -m benchmarks.batch``.

For each ``--jobs`` value the command runs as a user would run it (a subprocess of this
Python), over ``copies`` copies of the bundled mascot posed with its bundled recipe. While it
runs, psutil samples the CPU time of the command and its worker processes, to show whether
the extra workers really kept more cores busy (and the whole machine's load, since other work
on a shared machine changes the timings). Reported per run: wall time, assets per second,
mean and peak busy cores; and the speed-up of each ``--jobs`` value over the first.

Start-up (interpreter, imports, process pool) is part of the time, as it is for a user.
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

__all__ = ["bench_batch"]


def _sample_cores(pid: int, stop: threading.Event, own: list, machine: list,
                  interval: float) -> None:
    """Every ``interval`` s: cores kept busy by process ``pid`` and its descendants, and by
    the whole machine (other users included), both as busy-core counts (100% = 1 core)."""
    import psutil

    tracked: dict[int, psutil.Process] = {}
    psutil.cpu_percent()                         # the first call only sets the baseline
    while not stop.wait(interval):
        try:
            root = psutil.Process(pid)
            procs = [root, *root.children(recursive=True)]
        except psutil.NoSuchProcess:
            break
        total = 0.0
        for proc in procs:
            if proc.pid not in tracked:          # first sight: baseline only
                tracked[proc.pid] = proc
                try:
                    proc.cpu_percent()
                except psutil.Error:
                    pass
                continue
            try:
                total += tracked[proc.pid].cpu_percent()
            except psutil.Error:
                pass
        own.append(total / 100.0)
        machine.append(psutil.cpu_percent() * psutil.cpu_count() / 100.0)


def bench_batch(copies: int = 200, jobs=(1, 2), *, interval: float = 0.25) -> dict:
    """Run ``pliant batch`` over ``copies`` copies of the demo model for each ``jobs`` value.

    copies : number of mesh files in the batch (copies of ``mascot.obj``).
    jobs : ``--jobs`` values to time, in order; speed-ups are relative to the first.
    interval : seconds between core-load samples.

    Returns ``{"copies", "vertices", "cores", "runs": [{"jobs", "seconds",
    "assets_per_second", "busy_cores_mean", "busy_cores_peak", "exit_code"}],
    "speedup": {jobs: float}}``.
    """
    import psutil

    from brushes.demo import find_models
    from brushes.formats import load_mesh

    if copies < 1:
        raise ValueError(f"copies: must be at least 1, got {copies}")
    jobs = tuple(int(j) for j in jobs)
    if not jobs or min(jobs) < 1:
        raise ValueError(f"jobs: must be positive whole numbers, got {jobs}")
    mesh, recipe = find_models()
    result = {"copies": copies, "vertices": len(load_mesh(mesh).vertices),
              "cores": psutil.cpu_count(logical=True), "runs": [], "speedup": {}}
    with tempfile.TemporaryDirectory(prefix="pliant-bench-") as tmp:
        inputs = Path(tmp) / "in"
        inputs.mkdir()
        names = []
        for i in range(copies):
            target = inputs / f"mascot-{i:04d}.obj"
            shutil.copyfile(mesh, target)
            names.append(str(target))
        for n in jobs:
            out = Path(tmp) / f"out-{n}"
            command = [sys.executable, "-m", "brushes.cli", "batch", str(recipe), *names,
                       "--out", str(out), "--jobs", str(n), "--quiet"]
            own: list = []
            machine: list = []
            stop = threading.Event()
            start = time.perf_counter()
            proc = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                    text=True)
            sampler = threading.Thread(target=_sample_cores,
                                       args=(proc.pid, stop, own, machine, interval))
            sampler.start()
            stdout, stderr = proc.communicate()
            seconds = time.perf_counter() - start
            stop.set()
            sampler.join()
            if proc.returncode != 0:
                raise RuntimeError(f"pliant batch --jobs {n} exited {proc.returncode}: "
                                   f"{stderr.strip()[-500:]}")
            own = own or [0.0]
            machine = machine or [0.0]
            result["runs"].append({
                "jobs": n, "seconds": seconds, "assets_per_second": copies / seconds,
                "busy_cores_mean": sum(own) / len(own), "busy_cores_peak": max(own),
                "machine_busy_cores_mean": sum(machine) / len(machine),
                "cpu_seconds_per_asset": sum(own) / len(own) * seconds / copies,
                "exit_code": proc.returncode, "summary": stdout.strip().splitlines()[-1]})
    base = result["runs"][0]["seconds"]
    result["speedup"] = {run["jobs"]: base / run["seconds"] for run in result["runs"]}
    return result


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="python -m benchmarks.batch",
                                     description=__doc__.splitlines()[0])
    parser.add_argument("--copies", type=int, default=200)
    parser.add_argument("--jobs", type=int, nargs="+", default=[1, 2])
    args = parser.parse_args(argv)
    r = bench_batch(args.copies, tuple(args.jobs))
    print(f"pliant batch: {r['copies']} copies of the demo model "
          f"({r['vertices']} vertices), {r['cores']} cores")
    for run in r["runs"]:
        print(f"  --jobs {run['jobs']}: {run['seconds']:.2f} s, "
              f"{run['assets_per_second']:.1f} assets/s, busy cores mean "
              f"{run['busy_cores_mean']:.2f} peak {run['busy_cores_peak']:.2f} "
              f"(whole machine {run['machine_busy_cores_mean']:.2f}), "
              f"{run['cpu_seconds_per_asset']:.2f} CPU s/asset, "
              f"speed-up x{r['speedup'][run['jobs']]:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
