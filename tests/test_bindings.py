"""viewer.bindings: key chords, pyglet's button and modifier values, the one bindings table."""

from viewer.bindings import (BINDINGS, LEFT, MIDDLE, MOD_CTRL, MOD_SHIFT, MOUSE_ACTIONS, RIGHT,
                             chord)


def test_chord_names_hand_cases():
    assert chord("_1") == "1"
    assert chord("NUM_4") == "4"
    assert chord("COMMA") == ","
    assert chord("Z", MOD_CTRL) == "Ctrl+Z"
    assert chord("Z", MOD_CTRL | MOD_SHIFT) == "Ctrl+Shift+Z"
    assert chord("DELETE", MOD_SHIFT) == "Shift+Delete"
    assert chord("F1", 8 | 16) == "F1"  # Caps Lock and Num Lock bits are ignored
    assert chord("S", 64) == "Ctrl+S"  # Command counts as Ctrl


def test_mouse_and_modifier_values_match_pyglet():
    # Compared in a subprocess-free way: pyglet.window.key/mouse import pyglet.window, which
    # needs a display, so the values are checked against pyglet's source text instead.
    import pathlib

    import pyglet
    root = pathlib.Path(pyglet.__file__).parent / "window"
    mouse = (root / "mouse.py").read_text()
    keys = (root / "key.py").read_text()
    assert "LEFT = 1 << 0" in mouse and "MIDDLE = 1 << 1" in mouse and "RIGHT = 1 << 2" in mouse
    assert (LEFT, MIDDLE, RIGHT) == (1, 2, 4)
    assert "MOD_SHIFT       = 1 << 0" in keys and "MOD_CTRL        = 1 << 1" in keys
    assert (MOD_SHIFT, MOD_CTRL) == (1, 2)


def test_every_row_is_complete_and_mouse_rows_name_mouse_actions():
    assert all(key and action and description for key, action, description in BINDINGS)
    mouse_rows = [a for k, a, _ in BINDINGS if "drag" in k or "Wheel" in k]
    assert set(mouse_rows) == set(MOUSE_ACTIONS)
