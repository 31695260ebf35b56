"""Text shown over the viewer: the status lines and the help panel (pure text, no OpenGL).

The help panel and the README's binding table are both made from
:data:`viewer.bindings.BINDINGS`, so they cannot drift apart.
"""

__all__ = ["status_lines", "help_lines", "bindings_markdown", "format_volume_change"]


def format_volume_change(ratio):
    """Relative volume change as a signed percentage, e.g. ``+1.25 %``; ``n/a`` for None."""
    if ratio is None:
        return "n/a"
    return f"{100.0 * ratio:+.2f} %"


def status_lines(status):
    """Lines of the status overlay.

    Parameters
    ----------
    status : dict
        From :meth:`viewer.session.Session.status`: keys ``tool``, ``radius``, ``falloff``,
        ``poisson``, ``mirror`` (axis name or None), ``vertices``, ``volume_change``
        (ratio or None), ``flipped`` (faces turned over since load), ``frame_ms`` (float or
        None), ``budget`` (dict of milliseconds: ``brush``, the exact preview on the worker;
        ``normals``, ``upload``, ``draw``; and ``moved``, the share of vertices whose normals
        were recomputed), ``pins``, ``strokes``, ``redo``, ``message`` (str or empty).

    Returns
    -------
    list of str
    """
    mirror = f"mirror {status['mirror']}=0" if status.get("mirror") else "mirror off"
    frame = status.get("frame_ms")
    lines = [
        f"{status['tool']}   radius {status['radius']:.3g}   falloff {status['falloff']}   "
        f"Poisson {status['poisson']:.2f}   {mirror}",
        f"{status['vertices']:,} vertices   volume {format_volume_change(status.get('volume_change'))}"
        f"   flipped faces {status.get('flipped', 0):,}"
        f"   pins {status.get('pins', 0)}   strokes {status.get('strokes', 0)}"
        f" (+{status.get('redo', 0)} to redo)"
        + (f"   frame {frame:.1f} ms" if frame is not None else ""),
    ]
    budget = status.get("budget") or {}
    if budget:
        parts = [f"{name} {budget[name]:.1f}" for name in ("brush", "normals", "upload", "draw")
                 if budget.get(name) is not None]
        moved = budget.get("moved")
        lines.append("budget ms: " + "   ".join(parts)
                     + (f"   (normals redone for {100 * moved:.0f}% of vertices)" if moved is not None else ""))
    if status.get("message"):
        lines.append(status["message"])
    return lines


def help_lines(bindings):
    """Lines of the help panel: one ``key   description`` row per binding, keys aligned.

    Parameters
    ----------
    bindings : list of (key, action, description)
    """
    width = max(len(key) for key, _, _ in bindings)
    return [f"{key.ljust(width)}   {description}" for key, _, description in bindings]


def bindings_markdown(bindings):
    """The bindings as a Markdown table (for the README)."""
    rows = ["| key or mouse | does |", "| --- | --- |"]
    for key, _, description in bindings:
        shown = key.replace("|", "\\|")
        text = description.replace("<", "\\<").replace(">", "\\>").replace("|", "\\|")
        rows.append(f"| `{shown}` | {text} |")
    return "\n".join(rows)
