"""viewer.overlay: the status lines and the help panel's text (no OpenGL)."""

import numpy as np
import trimesh

from viewer.overlay import help_lines, status_lines
from viewer.session import BINDINGS, LEFT, Session

STATUS = {"tool": "grab brush", "radius": 0.25, "falloff": "wide", "poisson": 0.5, "mirror": "x",
          "vertices": 12345, "volume_change": 0.0, "flipped": 2, "pins": 1, "strokes": 3, "redo": 1}


def test_status_lines_hand_checked():
    lines = status_lines({**STATUS, "frame_ms": 12.25,
                          "budget": {"brush": 3.0, "normals": 1.5, "upload": 0.5, "draw": 2.0, "moved": 0.4}})
    assert lines[0] == "grab brush   radius 0.25   falloff wide   Poisson 0.50   mirror x=0"
    assert lines[1].endswith("pins 1   strokes 3 (+1 to redo)   frame 12.2 ms")
    assert "12,345 vertices" in lines[1] and "flipped faces 2" in lines[1]
    # the frame budget: each part once, in a line of its own (the whole frame is on the line above)
    assert lines[2] == ("budget ms: brush 3.0   normals 1.5   upload 0.5   draw 2.0"
                        "   (normals redone for 40% of vertices)")
    assert sum(line.count("draw") for line in lines) == 1


def test_status_lines_leave_out_what_is_not_measured_yet():
    lines = status_lines({**STATUS, "frame_ms": None, "budget": {}, "message": "saved"})
    assert "frame" not in lines[1] and not any(line.startswith("budget") for line in lines)
    assert lines[-1] == "saved"


def test_a_drag_fills_the_budget():
    mesh = trimesh.creation.icosphere(subdivisions=3)
    session = Session(np.asarray(mesh.vertices), np.asarray(mesh.faces), size=(640, 480), journal=False)
    try:
        session.press(320, 240, LEFT)
        session.drag(330, 240, 10, 0, LEFT)
        budget = session.status()["budget"]
        assert budget["brush"] > 0.0 and budget["normals"] >= 0.0 and 0.0 < budget["moved"] <= 1.0
        assert status_lines(session.status())[2].startswith("budget ms: brush ")
        session.release(330, 240, LEFT)
    finally:
        session.close()


def test_help_lines_align_the_keys():
    lines = help_lines(BINDINGS)
    width = max(len(k) for k, _, _ in BINDINGS)
    assert len(lines) == len(BINDINGS)
    assert all(line[width:width + 3] == "   " for line in lines)
