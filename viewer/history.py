"""Undo and redo to any depth over committed strokes (no OpenGL).

The history is a list of stroke dicts (the recipe's stroke format) and a position: the first
``position`` strokes are applied, the rest form the redo tail.  The positions after ``k``
strokes are the rest positions with strokes ``0 .. k-1`` replayed in order by the caller's
``replay(points, stroke) -> points``.  Results are kept as checkpoints within a memory budget,
so undo and redo next to the current position are instant and a far jump replays only from
the nearest earlier checkpoint.

Checkpoint policy: the rest positions, the current position and its two neighbours are always
kept; past the budget, the checkpoint whose removal leaves the smallest gap between its
neighbours goes first (ties: the one farthest from the current position), which keeps the
survivors spread evenly over the history.

Example
-------
>>> history = History(rest, lambda points, stroke: recipe.apply_stroke(points, stroke))
>>> points = history.push(stroke)          # or history.push(stroke, points=already_computed)
>>> points = history.undo()
>>> points = history.redo()
"""

from __future__ import annotations

import copy

import numpy as np

__all__ = ["History", "HistoryError"]


class HistoryError(ValueError):
    """Undo with nothing to undo, redo with nothing to redo, or a step outside the history."""


def _frozen(points, n, name):
    p = np.array(points, dtype=np.float64, order="C", copy=True)
    if p.ndim != 2 or p.shape[1] != 3 or (n is not None and len(p) != n):
        want = f"({n}, 3)" if n is not None else "(n, 3)"
        raise ValueError(f"{name}: must have shape {want}, got {p.shape}")
    p.flags.writeable = False
    return p


class History:
    """Undo/redo stack of strokes over rest positions.

    rest : (n, 3) float64 rest positions (copied).
    replay : callable ``(points (n, 3) float64 read-only, stroke dict) -> (n, 3) float64``;
        it must not modify ``points`` in place (they are read-only).
    budget_bytes : memory for cached positions (keyword-only, default 512 MiB); the rest
        positions and three checkpoints around the current position are kept even beyond it.

    Arrays returned are read-only views of the cache: copy before changing them.
    """

    def __init__(self, rest, replay, *, budget_bytes=512 * 2**20):
        if not callable(replay):
            raise ValueError(f"replay: must be callable, got {type(replay).__name__}")
        budget_bytes = int(budget_bytes)
        if budget_bytes < 0:
            raise ValueError(f"budget_bytes: must be >= 0, got {budget_bytes}")
        self._rest = _frozen(rest, None, "rest")
        self._replay = replay
        self.budget_bytes = budget_bytes
        self._strokes = []
        self._position = 0
        self._cache = {0: self._rest}

    # -- state ---------------------------------------------------------------------------
    @property
    def position(self):
        """Number of strokes applied (0 .. len(strokes))."""
        return self._position

    @property
    def strokes(self):
        """All strokes, the redo tail included (a copy of the list)."""
        return list(self._strokes)

    @property
    def applied(self):
        """The strokes applied now, oldest first: what a recipe of the current pose holds."""
        return self._strokes[: self._position]

    @property
    def can_undo(self):
        return self._position > 0

    @property
    def can_redo(self):
        return self._position < len(self._strokes)

    @property
    def points(self):
        """(n, 3) float64 read-only positions after the applied strokes."""
        return self.points_at(self._position)

    @property
    def checkpoints(self):
        """Sorted stroke counts whose positions are cached."""
        return sorted(self._cache)

    @property
    def cached_bytes(self):
        return sum(a.nbytes for a in self._cache.values())

    # -- moves ---------------------------------------------------------------------------
    def push(self, stroke, *, points=None):
        """Apply ``stroke`` after the current position, dropping the redo tail.

        stroke : dict (deep-copied).  points : optional (n, 3) float64 result of the stroke,
        when the caller already has it (skips the replay).  Returns the new positions.
        """
        if not isinstance(stroke, dict):
            raise ValueError(f"stroke: must be a dict, got {type(stroke).__name__}")
        base = self.points_at(self._position)
        if points is None:
            new = self._run(base, stroke)
        else:
            new = _frozen(points, len(self._rest), "points")
        del self._strokes[self._position :]
        for k in [k for k in self._cache if k > self._position]:
            del self._cache[k]
        self._strokes.append(copy.deepcopy(stroke))
        self._position += 1
        self._store(self._position, new)
        return new

    def undo(self):
        """Step back one stroke; returns the positions."""
        if not self.can_undo:
            raise HistoryError("undo: nothing to undo")
        return self.goto(self._position - 1)

    def redo(self):
        """Step forward one stroke of the redo tail; returns the positions."""
        if not self.can_redo:
            raise HistoryError("redo: nothing to redo")
        return self.goto(self._position + 1)

    def goto(self, k):
        """Move to the state after ``k`` strokes (0 .. len(strokes)); returns the positions."""
        points = self.points_at(k)
        self._position = int(k)
        self._store(self._position, points)  # it may have been evicted while replaying
        return points

    def points_at(self, k):
        """(n, 3) float64 read-only positions after ``k`` strokes, without moving."""
        k = int(k)
        if not 0 <= k <= len(self._strokes):
            raise HistoryError(f"k: must lie in [0, {len(self._strokes)}], got {k}")
        start = max(j for j in self._cache if j <= k)
        points = self._cache[start]
        for j in range(start, k):
            points = self._run(points, self._strokes[j])
            self._store(j + 1, points)
        return points

    # -- internals -----------------------------------------------------------------------
    def _run(self, points, stroke):
        out = self._replay(points, stroke)
        try:
            return _frozen(out, len(self._rest), "replay")
        except ValueError as exc:
            raise ValueError(f"replay: returned an unusable result ({exc})") from None

    def _store(self, k, points):
        self._cache[k] = points
        self._evict()

    def _evict(self):
        keep = {0, self._position - 1, self._position, self._position + 1}
        while self.cached_bytes > self.budget_bytes:
            keys = sorted(self._cache)
            best, best_score = None, None
            for i, k in enumerate(keys):
                if k in keep:
                    continue
                gap = (keys[i + 1] if i + 1 < len(keys) else len(self._strokes) + 1) - keys[i - 1]
                score = (gap, -abs(k - self._position))
                if best_score is None or score < best_score:
                    best, best_score = k, score
            if best is None:
                return
            del self._cache[best]
