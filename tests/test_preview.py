"""viewer.preview: newest-first background computation of drag previews.

Every wait here is on an event or the worker's own condition variable, never on a clock.
"""

import threading

import pytest

from viewer.preview import PreviewWorker


def test_stale_requests_are_dropped_and_the_newest_is_computed():
    worker = PreviewWorker()
    started, release = threading.Event(), threading.Event()
    ran = []

    def slow():
        started.set()
        release.wait()
        ran.append("a")
        return "a"

    def job(name):
        def fn():
            ran.append(name)
            return name
        return fn

    try:
        worker.submit(("s", 0), slow)
        started.wait()                      # "a" is running; what comes now queues
        for k, name in enumerate("bcd", start=1):
            worker.submit(("s", k), job(name))
        release.set()
        result = worker.wait(("s", 3))
        assert result.value == "d" and result.error is None
        assert ran == ["a", "d"]            # b and c went stale before they started
        assert (worker.submitted, worker.computed, worker.dropped) == (4, 2, 2)
        assert worker.latest() is None      # wait() handed the newest result out already
    finally:
        worker.close()


def test_latest_hands_each_result_out_once_and_errors_are_kept():
    worker = PreviewWorker(threaded=False)
    worker.submit(1, lambda: 10)
    first = worker.latest()
    assert first.key == 1 and first.value == 10 and first.seconds >= 0
    assert worker.latest() is None

    def broken():
        raise ValueError("radius: must be a positive number, got -1")

    worker.submit(2, broken)
    failed = worker.latest()
    assert failed.value is None and isinstance(failed.error, ValueError)
    assert str(failed.error).startswith("radius")


def test_wait_submits_an_unknown_key_and_needs_its_job():
    worker = PreviewWorker()
    try:
        assert worker.wait("k", lambda: 7).value == 7
        assert worker.wait("k").value == 7   # known: not computed again
        assert worker.computed == 1
        with pytest.raises(ValueError, match="^fn"):
            worker.wait("other")
    finally:
        worker.close()
    with pytest.raises(RuntimeError):
        worker.submit("late", lambda: 0)
