import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from viewer.history import History, HistoryError

REST = np.array([[0.0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]])
ARRAY_BYTES = REST.nbytes


class AffineReplay:
    """Stub stroke: points * a + b.  Affine maps do not commute, so order errors show."""

    def __init__(self):
        self.calls = 0

    def __call__(self, points, stroke):
        self.calls += 1
        assert not points.flags.writeable
        return points * stroke["a"] + np.asarray(stroke["b"])


def by_hand(strokes):
    """Positions computed directly from the stroke list, without the History."""
    p = REST.copy()
    for s in strokes:
        p = p * s["a"] + np.asarray(s["b"])
    return p


def stroke(i):
    return {"kind": "stub", "a": 1.0 + 0.1 * i, "b": [float(i), -float(i), 0.5]}


def test_hand_checked_push_undo_redo():
    h = History(REST, AffineReplay())
    p = h.push({"a": 2.0, "b": [1, 0, 0]})
    # Hand-checked: 2 * (1, 0, 0) + (1, 0, 0) = (3, 0, 0).
    np.testing.assert_array_equal(p[1], [3, 0, 0])
    p = h.push({"a": 1.0, "b": [0, 0, 5]})
    np.testing.assert_array_equal(p[1], [3, 0, 5])
    np.testing.assert_array_equal(h.undo()[1], [3, 0, 0])
    np.testing.assert_array_equal(h.undo()[1], [1, 0, 0])
    assert not h.can_undo and h.can_redo
    np.testing.assert_array_equal(h.redo()[1], [3, 0, 0])
    np.testing.assert_array_equal(h.redo()[1], [3, 0, 5])
    assert not h.can_redo


def test_undo_next_to_the_position_is_instant():
    replay = AffineReplay()
    h = History(REST, replay)
    for i in range(10):
        h.push(stroke(i))
    assert replay.calls == 10
    for _ in range(10):
        h.undo()
    for _ in range(10):
        h.redo()
    assert replay.calls == 10  # every step came from a checkpoint
    np.testing.assert_allclose(h.points, by_hand([stroke(i) for i in range(10)]))


def test_any_depth_with_a_small_budget():
    replay = AffineReplay()
    h = History(REST, replay, budget_bytes=6 * ARRAY_BYTES)
    strokes = [stroke(i) for i in range(40)]
    for s in strokes:
        h.push(s)
        assert h.cached_bytes <= 6 * ARRAY_BYTES
    for k in [0, 7, 39, 20, 1, 40, 33]:
        np.testing.assert_allclose(h.goto(k), by_hand(strokes[:k]), rtol=1e-12)
        assert h.position == k
    assert len(h.checkpoints) <= 6
    # The undo right after a jump is still instant.
    before = replay.calls
    h.undo()
    assert replay.calls == before


def test_new_stroke_after_undo_drops_the_redo_tail():
    h = History(REST, AffineReplay())
    for i in range(5):
        h.push(stroke(i))
    h.undo()
    h.undo()
    h.push(stroke(9))
    assert not h.can_redo and h.position == 4 and len(h.strokes) == 4
    assert h.applied == [stroke(0), stroke(1), stroke(2), stroke(9)]
    np.testing.assert_allclose(h.points, by_hand(h.applied))


def test_push_with_known_points_skips_the_replay():
    replay = AffineReplay()
    h = History(REST, replay)
    known = by_hand([stroke(3)])
    out = h.push(stroke(3), points=known)
    assert replay.calls == 0
    np.testing.assert_array_equal(out, known)
    assert not out.flags.writeable


def test_strokes_are_copied():
    h = History(REST, AffineReplay())
    s = stroke(1)
    h.push(s)
    s["a"] = 100.0
    assert h.applied[0]["a"] == pytest.approx(1.1)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.sampled_from(["push", "undo", "redo", "goto"]), max_size=40), st.integers(1, 5), st.data())
def test_matches_a_list_model(ops, budget_arrays, data):
    # A plain model: a list of strokes and a position; positions computed by hand.
    h = History(REST, AffineReplay(), budget_bytes=budget_arrays * ARRAY_BYTES)
    strokes, pos, counter = [], 0, 0
    for op in ops:
        if op == "push":
            del strokes[pos:]
            strokes.append(stroke(counter))
            h.push(stroke(counter))
            counter += 1
            pos += 1
        elif op == "undo":
            if pos == 0:
                with pytest.raises(HistoryError, match="undo"):
                    h.undo()
                continue
            pos -= 1
            h.undo()
        elif op == "redo":
            if pos == len(strokes):
                with pytest.raises(HistoryError, match="redo"):
                    h.redo()
                continue
            pos += 1
            h.redo()
        else:
            pos = data.draw(st.integers(0, len(strokes)))
            h.goto(pos)
        assert h.position == pos and h.strokes == strokes
        np.testing.assert_allclose(h.points, by_hand(strokes[:pos]), rtol=1e-12)


def test_bad_input():
    with pytest.raises(ValueError, match="rest"):
        History(np.zeros((3, 2)), AffineReplay())
    with pytest.raises(ValueError, match="replay"):
        History(REST, None)
    h = History(REST, lambda points, s: points[:2])
    with pytest.raises(ValueError, match="replay"):
        h.push(stroke(0))
    assert h.position == 0 and h.strokes == []  # a failed stroke leaves no trace
    with pytest.raises(ValueError, match="stroke"):
        h.push("grab")
    with pytest.raises(ValueError, match="points"):
        h.push(stroke(0), points=np.zeros((2, 3)))
    with pytest.raises(HistoryError, match="k"):
        h.goto(3)
    with pytest.raises(HistoryError, match="undo"):
        h.undo()
