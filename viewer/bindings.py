"""The viewer's bindings: mouse buttons, modifier bits, key chords and the one table of what
every key and mouse gesture does (no OpenGL, no window).

:data:`BINDINGS` is the single source of the help panel (F1), the README's key table
(``python -m viewer.app --bindings``) and :meth:`viewer.session.Session.key`'s dispatch. The
tools add their own rows (:data:`viewer.tools.REGISTERED`). Keys are named by :func:`chord` from
pyglet's symbol names and modifier bits, which the window passes through untouched.
"""

from __future__ import annotations

from viewer.tools import REGISTERED, Tool

__all__ = ["BINDINGS", "MOUSE_ACTIONS", "chord", "LEFT", "MIDDLE", "RIGHT",
           "MOD_SHIFT", "MOD_CTRL", "MOD_ALT", "MOD_COMMAND"]

# Same values as pyglet.window.mouse and pyglet.window.key (pyglet is pinned; tests compare).
LEFT, MIDDLE, RIGHT = 1, 2, 4
MOD_SHIFT, MOD_CTRL, MOD_ALT, MOD_COMMAND = 1, 2, 4, 64

_SETTINGS_BINDINGS = [
    (",", "radius_down", "brush radius smaller (x 0.8)"),
    (".", "radius_up", "brush radius larger (x 1.25)"),
    (";", "falloff_next", "next falloff: wide, medium, tight"),
    ("-", "poisson_down", "Poisson's ratio of the current brush -0.05"),
    ("=", "poisson_up", "Poisson's ratio of the current brush +0.05 (up to 0.5)"),
    ("\\", "mirror_toggle", "mirror strokes on/off"),
    ("/", "mirror_axis", "mirror plane: x=0, y=0, z=0 in turn"),
    ("Home", "frame_all", "frame all: fit the whole model in view"),
    ("F2", "overlay_toggle", "show or hide the displacement-magnitude colours"),
    ("F1", "help_toggle", "show or hide this help"),
]
_SESSION_BINDINGS = [
    ("Ctrl+Z", "undo", "undo the last stroke"),
    ("Ctrl+Shift+Z", "redo", "redo"),
    ("Ctrl+Y", "redo", "redo"),
    ("Enter", "recover", "replay the strokes of an interrupted session (when offered)"),
    ("Backspace", "recover_discard", "discard those strokes and start afresh (when offered)"),
    ("Esc", "cancel", "cancel the stroke in progress"),
    ("Ctrl+Q", "quit", "close the viewer (unsaved strokes stay in the journal)"),
]
_MOUSE_BINDINGS = [
    ("Left drag on model", "stroke", "apply the current brush or tool"),
    ("Left drag off model", "orbit", "orbit the camera"),
    ("Right drag", "orbit", "orbit the camera"),
    ("Ctrl+Right drag", "pan", "pan the camera"),
    ("Middle drag", "pan", "pan the camera"),
    ("Wheel", "zoom", "zoom in and out"),
    ("Shift+Wheel", "radius", "brush radius"),
]
#: Actions of the mouse rows: done by press/drag/scroll, not by a key.
MOUSE_ACTIONS = frozenset(action for _, action, _ in _MOUSE_BINDINGS)

#: Every key and mouse binding: (key or mouse chord, action, description). The keys that pick
#: a tool and the tools' own rows come from :data:`viewer.tools.REGISTERED`; the help panel
#: and the README table are generated from this list; :meth:`Session.key` dispatches on it.
BINDINGS = (
    [row for cls in REGISTERED if issubclass(cls, Tool) and (row := cls.select_binding())]
    + _SETTINGS_BINDINGS
    + [row for cls in REGISTERED for row in cls.bindings]
    + _SESSION_BINDINGS
    + _MOUSE_BINDINGS
)

_KEY_NAMES = {
    "COMMA": ",", "PERIOD": ".", "SEMICOLON": ";", "MINUS": "-", "EQUAL": "=", "PLUS": "=",
    "BACKSLASH": "\\", "SLASH": "/", "HOME": "Home", "DELETE": "Delete", "ESCAPE": "Esc",
    "RETURN": "Enter", "ENTER": "Enter", "NUM_ENTER": "Enter", "BACKSPACE": "Backspace",
    "NUM_ADD": "=", "NUM_SUBTRACT": "-", "NUM_HOME": "Home", "NUM_DELETE": "Delete",
    "END": "End", "NUM_END": "End",
}


def chord(symbol_name, modifiers=0):
    """The binding name of a key press: ``chord("Z", MOD_CTRL | MOD_SHIFT) == "Ctrl+Shift+Z"``.

    Parameters
    ----------
    symbol_name : str
        pyglet's symbol name (``pyglet.window.key.symbol_string(symbol)``), e.g. ``"_1"``,
        ``"COMMA"``, ``"F1"``, ``"Z"``.
    modifiers : int
        pyglet modifier bits; Caps Lock, Num Lock and the like are ignored, Command counts
        as Ctrl.
    """
    name = str(symbol_name)
    if name.startswith("NUM_") and name[4:].isdigit():
        name = name[4:]
    elif name.startswith("_") and name[1:].isdigit():
        name = name[1:]
    name = _KEY_NAMES.get(name, name)
    parts = []
    if modifiers & (MOD_CTRL | MOD_COMMAND):
        parts.append("Ctrl")
    if modifiers & MOD_ALT:
        parts.append("Alt")
    if modifiers & MOD_SHIFT:
        parts.append("Shift")
    return "+".join(parts + [name])
