"""Drag previews computed off the UI thread, newest request first (no OpenGL).

A drag sends many requests (one per mouse event); computing each in turn would fall further
and further behind. :class:`PreviewWorker` keeps one pending request: a new one replaces the
pending one unstarted (a *stale* request is dropped, never computed), and one background
thread computes whatever is pending when it becomes free. The window polls
:meth:`PreviewWorker.latest` once a frame and shows the newest finished result, so what is on
screen is always an exact result, at worst a few events old, and the window keeps drawing.

``threaded=False`` computes each request at once on the calling thread (tests, benchmarks,
scripts): the same results, in the same order, without the thread.

    worker = PreviewWorker()
    worker.submit(key, lambda: brush.apply(points))   # returns at once
    done = worker.latest()         # None, or a Result for the newest finished request
    result = worker.wait(key)      # block until that key's result is ready (release)
"""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass
from typing import Any, Callable

__all__ = ["PreviewWorker", "Result"]


@dataclass(frozen=True)
class Result:
    """A finished request: its ``key``, its ``value`` or the ``error`` it raised (an
    Exception, else None), the ``seconds`` it took and its ``serial`` (submission count)."""

    key: Any
    value: Any
    error: Exception | None
    seconds: float
    serial: int


class PreviewWorker:
    """One background computation at a time, newest request first.

    Parameters
    ----------
    threaded : bool, keyword-only
        True (default): compute on a daemon thread; False: compute inside :meth:`submit`.

    Attributes
    ----------
    submitted, computed, dropped : int
        Requests received, computed and replaced before they started (for the benchmark
        and tests).
    """

    def __init__(self, *, threaded=True):
        self.threaded = bool(threaded)
        self._lock = threading.Condition()
        self._pending = None  # (serial, key, fn) not yet started
        self._running = None  # serial being computed
        self._running_key = None
        self._done = None  # newest finished Result
        self._taken = 0  # serial of the newest result handed out by latest()
        self._serial = 0
        self._closed = False
        self.submitted = self.computed = self.dropped = 0
        self._thread = None
        if self.threaded:
            self._thread = threading.Thread(target=self._loop, name="pliant-preview", daemon=True)
            self._thread.start()

    # ------------------------------------------------------------------ requests
    def submit(self, key, fn: Callable[[], Any]):
        """Ask for ``fn()`` under ``key``; an older request not yet started is dropped."""
        with self._lock:
            if self._closed:
                raise RuntimeError("the preview worker is closed")
            self._serial += 1
            self.submitted += 1
            if self._pending is not None:
                self.dropped += 1
            self._pending = (self._serial, key, fn)
            self._lock.notify_all()
        if not self.threaded:
            self._run_pending()

    def latest(self):
        """The newest finished :class:`Result` not handed out before, or None."""
        with self._lock:
            done = self._done
            if done is None or done.serial <= self._taken:
                return None
            self._taken = done.serial
            return done

    def wait(self, key, fn: Callable[[], Any] | None = None):
        """Block until a result for ``key`` has finished and return it (a :class:`Result`).

        If neither the newest finished, the running nor the pending request is ``key``,
        ``fn`` is submitted first (it must then be given). Waits on the worker's condition
        variable: no polling, no timeout.
        """
        with self._lock:
            if not self._known(key):
                if fn is None:
                    raise ValueError("fn: needed, no request for this key is known")
                submit = True
            else:
                submit = False
        if submit:
            self.submit(key, fn)
        with self._lock:
            while not (self._done is not None and self._done.key == key
                       and not self._known_later(key)):
                self._lock.wait()
            self._taken = max(self._taken, self._done.serial)
            return self._done

    def idle(self):
        """Block until nothing is pending or running (tests and benchmarks); returns the
        newest finished :class:`Result` or None."""
        with self._lock:
            while self._pending is not None or self._running is not None:
                self._lock.wait()
            return self._done

    def close(self):
        """Stop the thread after the computation in progress (pending work is dropped)."""
        with self._lock:
            self._closed = True
            self._pending = None
            self._lock.notify_all()
        if self._thread is not None and self._thread is not threading.current_thread():
            self._thread.join()

    # ------------------------------------------------------------------ inside
    def _known(self, key):
        done = self._done is not None and self._done.key == key
        pending = self._pending is not None and self._pending[1] == key
        running = self._running is not None and self._running_key == key
        return done or pending or running

    def _known_later(self, key):
        """A request for ``key`` is still pending or running (a newer one than ``_done``)."""
        pending = self._pending is not None and self._pending[1] == key
        running = self._running is not None and self._running_key == key
        return pending or running

    def _loop(self):
        while True:
            with self._lock:
                while self._pending is None and not self._closed:
                    self._lock.wait()
                if self._closed:
                    return
            self._run_pending()

    def _run_pending(self):
        with self._lock:
            if self._pending is None:
                return
            serial, key, fn = self._pending
            self._pending = None
            self._running, self._running_key = serial, key
        start = time.perf_counter()
        value, error = None, None
        try:
            value = fn()
        except Exception as exc:  # shown to the user by the session, never swallowed silently
            error = exc
        seconds = time.perf_counter() - start
        with self._lock:
            self._running = None
            self._running_key = None
            self.computed += 1
            if self._done is None or serial > self._done.serial:
                self._done = Result(key, value, error, seconds, serial)
            self._lock.notify_all()
