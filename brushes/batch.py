"""Batch runs: one recipe over many meshes, on a local process pool or a Dask cluster.

Each mesh is an independent task: load it, replay the recipe stroke by stroke
(``Recipe.apply``), save the posed mesh atomically in the same format. A failing mesh
is recorded with its reason and the others carry on. Nothing here prints; the caller
(``brushes.cli``) owns the progress bar and the messages.

Example::

    from brushes.batch import plan, run_batch
    tasks = plan(["a.obj", "b.ply"], "posed")        # [(source, target), ...]
    outcomes = run_batch("pose.json", tasks, jobs=2)
    failed = [o for o in outcomes if not o.ok]
"""

from __future__ import annotations

import os
import signal
import time
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterable, Sequence

__all__ = ["BatchError", "ClusterUnavailable", "Outcome", "describe", "interrupted", "plan",
           "pose_document", "pose_file", "run_batch", "TINY_MOTION"]

# A stroke whose largest motion is below this fraction of the mesh's size (its bounding-box
# diagonal) has most likely missed the mesh or is at another scale: it gets a warning.
TINY_MOTION = 1e-6


class BatchError(ValueError):
    """A batch that cannot start: clashing outputs, an output over an input, a bad option."""


class ClusterUnavailable(BatchError):
    """``--scheduler`` was given but dask.distributed is missing or the scheduler is unreachable."""


@dataclass(frozen=True)
class Outcome:
    """The result of one mesh: ``error`` is None when it was posed and written."""

    source: str
    target: str
    error: str | None
    seconds: float
    warnings: tuple = ()

    @property
    def ok(self) -> bool:
        return self.error is None


def describe(exc: BaseException) -> str:
    """One line naming what went wrong, without a traceback."""
    if isinstance(exc, OSError) and exc.strerror:
        where = f"{exc.filename}: " if exc.filename else ""
        text = f"{where}{exc.strerror}"
    else:
        text = str(exc) or type(exc).__name__
    if not isinstance(exc, (ValueError, OSError)):
        text = f"{type(exc).__name__}: {text}"
    lines = [" ".join(line.split()) for line in text.splitlines()]
    return "; ".join(line for line in lines if line)


def interrupted(exc: BaseException) -> bool:
    """True when ``exc`` came from Ctrl-C.

    A ``KeyboardInterrupt`` raised while compiled code runs (a numba kernel) can surface as a
    ``SystemError`` whose cause is the interrupt; that is an interrupt, not a bad mesh.
    """
    seen = set()
    while exc is not None and id(exc) not in seen:
        if isinstance(exc, KeyboardInterrupt):
            return True
        seen.add(id(exc))
        exc = exc.__cause__ or exc.__context__
    return False


def plan(mesh_paths: Iterable[str | os.PathLike], out_dir: str | os.PathLike, *,
         force: bool = False) -> list[tuple[str, str]]:
    """Pair each input mesh with its output ``out_dir/<input file name>``.

    Returns absolute paths (workers may run in another directory). Raises ``BatchError``
    when two inputs share a file name, or when an output would be an input and
    ``force`` is False.
    """
    out_dir = Path(out_dir).absolute()
    sources = [Path(p).absolute() for p in mesh_paths]
    if not sources:
        raise BatchError("meshes: no input meshes given")
    seen: dict[str, Path] = {}
    for src in sources:
        if src.name in seen:
            raise BatchError(f"meshes: {seen[src.name]} and {src} would both be written as "
                             f"{out_dir / src.name}; give inputs distinct file names")
        seen[src.name] = src
    inputs = {_identity(src) for src in sources}
    tasks = []
    for src in sources:
        dst = out_dir / src.name
        if not force and _identity(dst) in inputs:
            raise BatchError(f"--out: {dst} is an input mesh; refusing to write over it "
                             "(use --force)")
        tasks.append((str(src), str(dst)))
    return tasks


def _identity(path: Path):
    """A key that is equal for two names of the same file (device and inode when it exists)."""
    try:
        st = path.stat()
        return ("inode", st.st_dev, st.st_ino)
    except OSError:
        return ("path", os.path.normcase(os.path.realpath(path)))


def pose_document(recipe, doc):
    """Apply ``recipe`` to ``doc`` stroke by stroke, exactly as ``Recipe.apply``, and warn about
    strokes at the wrong scale.

    recipe : ``brushes.recipe.Recipe``; doc : ``brushes.formats.MeshDoc``.
    Returns (posed (n, 3) float64, warnings: list of str naming the stroke). A stroke warns
    when it moves no vertex by more than ``TINY_MOTION`` times the mesh's bounding-box
    diagonal, or when it moves every vertex by more than that diagonal.
    """
    import numpy as np

    points = np.asarray(doc.vertices, dtype=np.float64)
    size = float(np.linalg.norm(points.max(axis=0) - points.min(axis=0))) if len(points) else 0.0
    out = points.copy()
    warnings = []
    groups = _groups(doc)
    for i, stroke in enumerate(recipe.strokes):
        before = out
        out = stroke.apply(out, groups=groups, where=f"strokes[{i}]")
        if size <= 0 or not len(out):
            continue
        moved = np.linalg.norm(out - before, axis=1)
        if moved.max() < TINY_MOTION * size:
            warnings.append(f"strokes[{i}]: moves the mesh by at most {moved.max():.3g}, less than "
                            f"{TINY_MOTION:g} of its size {size:.4g}; is the brush on the mesh "
                            "and at its scale?")
        elif moved.min() > size:
            warnings.append(f"strokes[{i}]: moves every vertex by more than the mesh's size "
                            f"{size:.4g} (at least {moved.min():.4g}); is the brush at the "
                            "mesh's scale?")
    return out, warnings


def pose_file(recipe, source: str, target: str) -> Outcome:
    """Pose one mesh file with ``recipe`` and write it to ``target``; never raises on bad data.

    recipe : a ``brushes.recipe.Recipe`` (picklable) or a path to a recipe file.
    Any ``Exception`` from loading, posing or saving becomes ``Outcome.error``.
    """
    start = time.perf_counter()
    try:
        from brushes.formats import load_mesh, save_mesh
        from brushes.recipe import load_recipe

        if isinstance(recipe, (str, os.PathLike)):
            recipe = load_recipe(recipe)
        doc = load_mesh(source)
        posed, warnings = pose_document(recipe, doc)
        save_mesh(doc, target, vertices=posed)
        error = None
    except Exception as exc:  # noqa: BLE001 - one bad mesh must not stop the batch
        if interrupted(exc):
            raise KeyboardInterrupt from exc
        error = describe(exc)
        warnings = []
    return Outcome(source, target, error, time.perf_counter() - start, tuple(warnings))


def _groups(doc):
    """The mesh's named vertex groups for recipe masks, or None when the format has none."""
    return getattr(doc, "groups", None)


def _start_worker(threads: int) -> None:
    """Initializer of a local worker process."""
    # Workers leave Ctrl-C to the parent, which cancels what has not started and waits
    # for the running meshes to finish their (atomic) writes.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    # The numba kernels run parallel loops on every core by default; with several worker
    # processes that oversubscribes the cores, so each worker takes its share.
    try:
        import numba
    except ImportError:
        return
    numba.set_num_threads(max(1, min(threads, numba.config.NUMBA_NUM_THREADS)))


def _pool_context():
    """A start method that is safe after numba's OpenMP threads have run in this process.

    fork() copies a process whose thread pool cannot work in the child (GNU OpenMP stops the
    child), so workers come from a fresh forkserver where the platform has one, else spawn.
    """
    import multiprocessing

    if "forkserver" in multiprocessing.get_all_start_methods():
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload(["brushes.batch", "brushes.formats", "brushes.recipe"])
        return ctx
    return multiprocessing.get_context("spawn")


def run_batch(recipe, tasks: Sequence[tuple[str, str]], *, jobs: int | None = None,
              scheduler: str | None = None,
              on_start: Callable[[], None] | None = None,
              on_done: Callable[[Outcome], None] | None = None) -> list[Outcome]:
    """Run ``pose_file`` over ``tasks`` and return one ``Outcome`` per task, in task order.

    recipe : ``Recipe`` or path to a recipe file.
    tasks : sequence of (source, target) path pairs, e.g. from ``plan``.
    jobs : local worker processes (default ``os.cpu_count()``); 1 runs in this process.
    scheduler : address of a Dask distributed scheduler; the work runs there instead.
        Workers must see the same paths (a shared file system).
    on_start : called once, when the workers are reached and the work is handed out (a
        cluster that cannot be reached raises ``ClusterUnavailable`` before this).
    on_done : called with each ``Outcome`` as it completes (in completion order).

    Ctrl-C (``KeyboardInterrupt``) cancels the meshes not yet started, lets the running
    ones finish their atomic writes, and is re-raised.
    """
    if jobs is not None and jobs < 1:
        raise BatchError(f"--jobs: must be at least 1, got {jobs}")
    if isinstance(recipe, os.PathLike):
        recipe = os.fspath(recipe)
    on_start = on_start or (lambda: None)
    on_done = on_done or (lambda outcome: None)
    tasks = list(tasks)
    if not tasks:
        return []
    if scheduler is not None:
        return _run_dask(recipe, tasks, scheduler, on_start, on_done)
    jobs = min(jobs or os.cpu_count() or 1, len(tasks))
    if jobs == 1:
        on_start()
        outcomes = []
        for source, target in tasks:
            outcome = pose_file(recipe, source, target)
            on_done(outcome)
            outcomes.append(outcome)
        return outcomes
    return _run_pool(recipe, tasks, jobs, on_start, on_done)


class _Interrupts:
    """Ctrl-C noted as a flag while the pool runs, raised as KeyboardInterrupt only between waits.

    A KeyboardInterrupt raised at an arbitrary point of the main thread can land inside
    `concurrent.futures.wait` while it holds the futures' locks; the pool's manager thread then
    blocks on them forever and the command never exits (seen under load). The handler only
    records the signal; the loop wakes at least every `POLL` seconds to look at it.
    """

    POLL = 0.2

    def __init__(self):
        self.seen = False
        self._previous = None

    def __enter__(self):
        import threading

        if threading.current_thread() is threading.main_thread():
            self._previous = signal.signal(signal.SIGINT, self._note)
        return self

    def _note(self, signum, frame):
        self.seen = True

    def __exit__(self, *exc):
        if self._previous is not None:
            signal.signal(signal.SIGINT, self._previous)
        return False


def _run_pool(recipe, tasks, jobs, on_start, on_done) -> list[Outcome]:
    results: dict[int, Outcome] = {}
    threads = max(1, (os.cpu_count() or 1) // jobs)
    pool = ProcessPoolExecutor(max_workers=jobs, mp_context=_pool_context(),
                               initializer=_start_worker, initargs=(threads,))
    try:
        with _Interrupts() as interrupts:
            pending = {pool.submit(pose_file, recipe, src, dst): i
                       for i, (src, dst) in enumerate(tasks)}
            on_start()
            while pending and not interrupts.seen:
                done, _ = wait(pending, timeout=_Interrupts.POLL, return_when=FIRST_COMPLETED)
                for future in done:
                    i = pending.pop(future)
                    try:
                        outcome = future.result()
                    except BrokenProcessPool:
                        src, dst = tasks[i]
                        outcome = Outcome(src, dst, "worker process stopped unexpectedly", 0.0)
                    results[i] = outcome
                    on_done(outcome)
            if interrupts.seen:
                # cancel what has not started; the running meshes finish their atomic writes
                pool.shutdown(wait=True, cancel_futures=True)
                raise KeyboardInterrupt
    except BaseException:
        pool.shutdown(wait=True, cancel_futures=True)
        raise
    pool.shutdown(wait=True)
    return [results[i] for i in range(len(tasks))]


def _run_dask(recipe, tasks, address, on_start, on_done) -> list[Outcome]:
    try:
        from distributed import Client, as_completed
    except ImportError as exc:
        raise ClusterUnavailable(
            "--scheduler needs dask.distributed: pip install pliant[cluster]") from exc
    try:
        client = Client(address, set_as_default=False)  # connect timeout: dask config
    except (OSError, TimeoutError, ValueError) as exc:
        raise ClusterUnavailable(f"--scheduler: cannot reach {address}: {describe(exc)}") from exc
    futures = []
    try:
        futures = [client.submit(pose_file, recipe, src, dst, pure=False)
                   for src, dst in tasks]
        index = {future.key: i for i, future in enumerate(futures)}
        on_start()
        results: dict[int, Outcome] = {}
        for future in as_completed(futures, loop=client.loop):
            i = index[future.key]
            try:
                outcome = future.result()
            except Exception as exc:  # noqa: BLE001 - e.g. a worker lost mid-task
                src, dst = tasks[i]
                outcome = Outcome(src, dst, f"cluster: {describe(exc)}", 0.0)
            results[i] = outcome
            on_done(outcome)
        return [results[i] for i in range(len(tasks))]
    except BaseException:
        if futures:
            client.cancel(futures)
        raise
    finally:
        client.close()
