"""Brush registry: brush kind name -> brush class.

The five built-ins (``grab``, ``twist``, ``scale``, ``pinch``, ``handles``) are always there.
Other packages add brush kinds without touching pliant, through the entry-point group
``pliant.brushes``: the entry point's name is the kind, its value ``"module:Class"``. In
``pyproject.toml``::

    [project.entry-points."pliant.brushes"]
    ripple = "toyshop_brushes.ripple:Ripple"

Entry points are discovered once, on the first :func:`lookup` or :func:`kinds` call, and a
plugin's module is imported only when its kind is first looked up, so a broken plugin
breaks only its own kind. A plugin cannot take the name of a built-in or of a kind given to
:func:`register`; such an entry point is ignored (explicit code wins over installed metadata).

A brush class is built from keyword arguments, ``cls(**params)``, and has
``apply(points, *, flow=True, pins=None, mask=None)``; see ``brushes.Brush``.
"""

from __future__ import annotations

import importlib.metadata
import re

__all__ = ["ENTRY_POINT_GROUP", "register", "unregister", "lookup", "kinds"]

ENTRY_POINT_GROUP = "pliant.brushes"

_BUILTINS = {"grab": "Grab", "twist": "Twist", "scale": "Scale", "pinch": "Pinch", "handles": "Handles"}
_KIND = re.compile(r"[a-z][a-z0-9_-]*\Z")

_classes: dict = {}  # kind -> class: built-ins, register() calls, loaded plugins
_explicit: set = set()  # kinds given to register()
_plugins: dict | None = None  # kind -> importlib.metadata.EntryPoint, None before discovery


def _check_kind(kind) -> str:
    if not isinstance(kind, str) or not _KIND.match(kind):
        raise ValueError(f"kind: must be a lower-case name like 'grab' (letters, digits, '_', '-'), "
                         f"got {kind!r}")
    return kind


def _not_a_brush(cls) -> str | None:
    """Why ``cls`` cannot be a brush class, or None."""
    if not isinstance(cls, type):
        return f"must be a class, got {type(cls).__name__}"
    if not callable(getattr(cls, "apply", None)):
        return (f"{cls.__module__}.{cls.__qualname__} has no "
                "apply(points, *, flow, pins, mask) method")
    return None


def register(kind: str, cls, *, replace: bool = False) -> None:
    """Register ``cls`` as the brush class for ``kind``.

    kind : str, lower-case name used in recipes (``"brush": kind``).
    cls : class, built as ``cls(**params)``, with an ``apply`` method.
    replace : bool, keyword-only; allow replacing a kind already registered (built-ins too).

    Raises ValueError for a bad name, a non-brush class, or a taken kind without ``replace``.
    """
    kind = _check_kind(kind)
    why = _not_a_brush(cls)
    if why:
        raise ValueError(f"cls: brush {kind!r}: {why}")
    taken = kind in _BUILTINS or kind in _classes
    if taken and not replace and _classes.get(kind) is not cls:
        raise ValueError(f"kind: brush {kind!r} is already registered; pass replace=True")
    _classes[kind] = cls
    _explicit.add(kind)


def unregister(kind: str) -> None:
    """Forget a kind given to :func:`register` (a replaced built-in comes back). Unknown -> ValueError."""
    if kind not in _explicit:
        raise ValueError(f"kind: {kind!r} was not registered with register()")
    _explicit.discard(kind)
    del _classes[kind]


def _discover() -> dict:
    """Entry points of the group, by kind; read once per process."""
    global _plugins
    if _plugins is None:
        found = {}
        for ep in sorted(importlib.metadata.entry_points(group=ENTRY_POINT_GROUP),
                         key=lambda e: (e.name, e.value)):
            if _KIND.match(ep.name) and ep.name not in found:
                found[ep.name] = ep  # the first of duplicate names (sorted by value) wins
        _plugins = found
    return _plugins


def _builtin(kind: str):
    from brushes import brush, handles  # late: the registry imports without the maths

    return getattr(handles if kind == "handles" else brush, _BUILTINS[kind])


def kinds() -> list:
    """Sorted names of every available brush kind (built-in, registered and installed)."""
    return sorted(set(_BUILTINS) | set(_classes) | set(_discover()))


def lookup(kind: str):
    """The brush class for ``kind``.

    Raises ValueError naming the known kinds when ``kind`` is unknown, or saying why an
    installed plugin could not be loaded.
    """
    cls = _classes.get(kind)
    if cls is not None:
        return cls
    if isinstance(kind, str) and kind in _BUILTINS:
        cls = _classes[kind] = _builtin(kind)
        return cls
    ep = _discover().get(kind) if isinstance(kind, str) else None
    if ep is None:
        raise ValueError(f"brush: unknown brush {kind!r}; known: {', '.join(kinds())}")
    try:
        cls = ep.load()
    except Exception as exc:  # the plugin's own import error, whatever it is
        raise ValueError(f"brush: plugin {kind!r} ({ep.value}) failed to load: "
                         f"{type(exc).__name__}: {exc}") from exc
    why = _not_a_brush(cls)
    if why:
        raise ValueError(f"brush: plugin {kind!r} ({ep.value}): {why}")
    _classes[kind] = cls
    return cls
