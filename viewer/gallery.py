"""The README's pictures: the demo mascot before and after its pose, single-brush examples, and
a plot of the three falloffs.

``python -m viewer.gallery [--out docs/img] [--size 480] [--only pose,twist,grab,falloffs]``

The mascot pictures are drawn by :func:`viewer.snapshot.snapshot`, the code behind
``pliant snapshot``, so they show exactly what a user gets; the pose is the bundled recipe
applied the way ``pliant demo`` applies it. The falloff plot is drawn with Pillow alone (no
plotting library) in the colours of :mod:`viewer.palette`. Every file is written to a
temporary name in the target folder and renamed into place.

Jobs and the files they write (see :data:`CAPTIONS`):

``pose``
    ``mascot-rest-front.png``, ``mascot-posed-front.png``, ``mascot-rest-back.png``,
    ``mascot-posed-back.png``
``twist``
    ``twist-rest.png``, ``twist-flow.png``, ``twist-linear.png``
``grab``
    ``grab-wide.png``, ``grab-tight.png``
``falloffs``
    ``falloffs.png``

The grab curves of the plot are the regularized Kelvinlet of F. de Goes and D. L. James,
"Regularized Kelvinlets", ACM Trans. Graph. 36(4), 2017, eq. 9 (``wide``) and its multi-scale
extrapolations of sec. 5 (``medium``, ``tight``), evaluated by :class:`brushes.Grab`.
"""

from __future__ import annotations

import argparse
import math
import os
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from viewer import palette

__all__ = ["JOBS", "CAPTIONS", "FALLOFF_COLOURS", "Panel", "falloff_profiles", "falloff_panels",
           "plot_falloffs", "render_pose", "render_twist", "render_grab", "make_gallery", "main"]

#: File name -> one-line caption, in the order the jobs write them.
CAPTIONS = {
    "mascot-rest-front.png": "The workshop mascot as built, from the front.",
    "mascot-posed-front.png": "The same figure after the bundled pose recipe, from the front.",
    "mascot-rest-back.png": "The mascot as built, from behind its left shoulder.",
    "mascot-posed-back.png": "The posed mascot from behind its left shoulder: arm raised, "
                             "tail curled up, head turned.",
    "twist-rest.png": "The head seen from straight above, the fox facing down the picture.",
    "twist-flow.png": "A 90 degree twist at the head's centre integrated as a flow: ears and "
                      "snout swing round and the head keeps its size.",
    "twist-linear.png": "The same twist added in one step (flow off): the head swells and "
                        "shears.",
    "grab-wide.png": "A grab of the right hand with the wide falloff; colour shows how far "
                     "each point moved (slate: still, ember: most).",
    "grab-tight.png": "The same grab with the tight falloff: the motion stays near the hand.",
    "falloffs.png": "Grab displacement against distance for the three falloffs (radius 1), "
                    "and their far field on log-log axes with slopes -1, -3 and -5.",
}

FALLOFFS = ("wide", "medium", "tight")
#: Curve colour of each falloff: stops of the palette's displacement ramp, cool to hot as the
#: falloff tightens.
FALLOFF_COLOURS = {"wide": palette.RAMP[1][1], "medium": palette.RAMP[2][1],
                   "tight": palette.RAMP[3][1]}

# Mascot design points (models/README.md, "Joints") used by the single-brush examples.
_HEAD = (0.0, 1.62, 0.02)
_BODY = (0.0, 0.98, 0.0)
_HAND_RIGHT = (-0.50, 0.78, 0.07)

_DEFAULT_SIZE = 480
_ZOOM_FIGURE = 1.0   # frame-all fits the figure's bounding box, with a 5% margin


# --------------------------------------------------------------------------- falloff curves


def falloff_profiles(distances, *, direction="across", falloffs=FALLOFFS):
    """Grab displacement along a line through the centre, divided by the move.

    A grab of radius 1 at the origin with move (1, 0, 0) is evaluated at distance ``r`` along
    the move (``direction="along"``, points (r, 0, 0)) or across it (``"across"``, points
    (0, r, 0)). On both lines the displacement is parallel to the move by symmetry, so its
    x component is the signed value of ``|u(r)| / |move|``; the ``medium`` and ``tight``
    falloffs turn slightly negative across the move beyond about 1.2 to 1.8 radii.

    Parameters
    ----------
    distances : (n,) float
        Distances from the centre, in radii.
    direction : {"across", "along"}, keyword-only
    falloffs : sequence of str, keyword-only

    Returns
    -------
    dict
        Falloff name -> (n,) float64, ``u(r) . move / |move|^2``.
    """
    import brushes

    r = np.asanyarray(distances, dtype=np.float64)
    if r.ndim != 1 or not np.all(np.isfinite(r)):
        raise ValueError(f"distances: must be a finite 1-D array, got shape {r.shape}")
    if direction not in ("across", "along"):
        raise ValueError(f"direction: must be 'across' or 'along', got {direction!r}")
    points = np.zeros((len(r), 3))
    points[:, 0 if direction == "along" else 1] = r
    out = {}
    for name in falloffs:
        grab = brushes.Grab((0.0, 0.0, 0.0), 1.0, (1.0, 0.0, 0.0), falloff=name)
        out[name] = grab.displacement(points)[:, 0]
    return out


@dataclass(frozen=True)
class Panel:
    """One plot area of the falloff figure, in output pixels.

    box : (left, top, right, bottom) of the plot area; x_range, y_range : data limits;
    log_x, log_y : logarithmic axes.
    """

    box: tuple
    x_range: tuple
    y_range: tuple
    log_x: bool = False
    log_y: bool = False

    def _unit(self, value, limits, log):
        if log:
            value, limits = np.log10(value), (math.log10(limits[0]), math.log10(limits[1]))
        return (np.asanyarray(value, dtype=np.float64) - limits[0]) / (limits[1] - limits[0])

    def to_pixel(self, x, y):
        """Pixel position (px, py) of data (x, y); arrays broadcast. Rows count downward."""
        left, top, right, bottom = self.box
        px = left + self._unit(x, self.x_range, self.log_x) * (right - left)
        py = bottom - self._unit(y, self.y_range, self.log_y) * (bottom - top)
        return px, py

    def from_pixel(self, px, py):
        """Data (x, y) at pixel position (px, py); the inverse of :meth:`to_pixel`."""
        left, top, right, bottom = self.box

        def back(u, limits, log):
            if log:
                lo, hi = math.log10(limits[0]), math.log10(limits[1])
                return 10.0 ** (lo + u * (hi - lo))
            return limits[0] + u * (limits[1] - limits[0])

        u = (np.asanyarray(px, dtype=np.float64) - left) / (right - left)
        v = (bottom - np.asanyarray(py, dtype=np.float64)) / (bottom - top)
        return back(u, self.x_range, self.log_x), back(v, self.y_range, self.log_y)


def falloff_panels(size=(960, 420)):
    """The two panels of :func:`plot_falloffs` for a figure of ``size`` (width, height) pixels.

    Returns
    -------
    (Panel, Panel)
        Linear panel (r in [0, 5] radii, value in [-0.1, 1]) and log-log panel (r in [1, 100],
        |u| / |move| in [1e-10, 1]).
    """
    width, height = size
    top, bottom = 48, height - 56
    split = int(width * 0.5)
    linear = Panel((70, top, split - 30, bottom), (0.0, 5.0), (-0.1, 1.0))
    loglog = Panel((split + 70, top, width - 24, bottom), (1.0, 100.0), (1e-10, 1.0),
                   log_x=True, log_y=True)
    return linear, loglog


def _rgb(colour):
    return tuple(int(round(255 * c)) for c in colour)


def _mix(a, b, t):
    return tuple((1 - t) * x + t * y for x, y in zip(a, b))


def _dashed(draw, points, *, fill, width, dash, gap):
    """Draw a polyline (k, 2) as dashes of length ``dash`` separated by ``gap`` pixels."""
    seg = np.diff(points, axis=0)
    arc = np.concatenate([[0.0], np.cumsum(np.hypot(seg[:, 0], seg[:, 1]))])
    period = dash + gap
    start = 0.0
    while start < arc[-1]:
        stop = min(start + dash, arc[-1])
        ts = np.concatenate([[start], arc[(arc > start) & (arc < stop)], [stop]])
        xs, ys = np.interp(ts, arc, points[:, 0]), np.interp(ts, arc, points[:, 1])
        draw.line(list(zip(xs, ys)), fill=fill, width=width, joint="curve")
        start += period


def plot_falloffs(path, *, size=(960, 420)):
    """Write ``falloffs.png``: grab displacement against distance for the three falloffs.

    Left panel: ``u(r) . move / |move|^2`` for a grab of radius 1 across the move (solid) and
    along it (dashed), r from 0 to 5 radii. Right panel: ``|u| / |move|`` along the move on
    log-log axes, r from 1 to 100 radii, with dotted reference lines of slope -1, -3 and -5
    (the far-field decay of the one-, two- and three-radius falloffs; de Goes and James 2017,
    sec. 5).

    Parameters
    ----------
    path : str or os.PathLike
        Target ``.png`` file; its folder must exist. Written atomically.
    size : (width, height) int, keyword-only

    Returns
    -------
    str
        The path written.
    """
    from PIL import Image, ImageDraw, ImageFont

    from brushes.atomic import atomic_write

    path = os.fspath(path)
    if not path.lower().endswith(".png"):
        raise ValueError(f"path: must end in .png, got {path!r}")
    try:
        width, height = (int(v) for v in size)
    except (TypeError, ValueError):
        raise ValueError(f"size: must be (width, height), got {size!r}") from None
    if width < 480 or height < 240:
        raise ValueError(f"size: must be at least 480x240, got {width}x{height}")

    k = 2  # draw at twice the size and scale down: smooth lines without a plotting library
    image = Image.new("RGB", (width * k, height * k), _rgb(palette.BACKGROUND))
    draw = ImageDraw.Draw(image)
    font = ImageFont.load_default(size=13 * k)
    small = ImageFont.load_default(size=11 * k)
    text, grid = _rgb(palette.TEXT), _rgb(_mix(palette.PANEL, palette.TEXT, 0.18))
    dim = _rgb(_mix(palette.BACKGROUND, palette.TEXT, 0.5))  # reference lines and axes
    linear, loglog = falloff_panels((width, height))

    def px(panel, x, y):
        a, b = panel.to_pixel(x, y)
        return np.stack([np.asarray(a) * k, np.asarray(b) * k], axis=-1)

    def frame(panel, title, xlabel, xticks, yticks):
        left, top, right, bottom = (v * k for v in panel.box)
        draw.rectangle((left, top, right, bottom), fill=_rgb(palette.PANEL))
        for value, label in xticks:
            x = px(panel, value, panel.y_range[0])[0]
            draw.line([(x, top), (x, bottom)], fill=grid, width=k)
            draw.text((x, bottom + 6 * k), label, font=small, fill=text, anchor="mt")
        for value, label in yticks:
            y = px(panel, panel.x_range[0], value)[1]
            draw.line([(left, y), (right, y)], fill=grid, width=k)
            draw.text((left - 6 * k, y), label, font=small, fill=text, anchor="rm")
        draw.rectangle((left, top, right, bottom), outline=dim, width=k)
        draw.text((left, top - 10 * k), title, font=font, fill=text, anchor="ls")
        draw.text(((left + right) / 2, bottom + 26 * k), xlabel, font=small, fill=text, anchor="mt")

    # Left: linear axes.
    frame(linear, "grab displacement / move, radius 1", "distance from the centre / radius",
          [(x, f"{x:g}") for x in range(6)],
          [(y, f"{y:g}") for y in (0.0, 0.25, 0.5, 0.75, 1.0)])
    zero = px(linear, np.array(linear.x_range), np.zeros(2))
    draw.line([tuple(p) for p in zero], fill=dim, width=k)
    r = np.linspace(0.0, 5.0, 401)
    across = falloff_profiles(r, direction="across")
    along = falloff_profiles(r, direction="along")
    for name in FALLOFFS:
        colour = _rgb(FALLOFF_COLOURS[name])
        _dashed(draw, px(linear, r, along[name]), fill=colour, width=2 * k, dash=9 * k, gap=6 * k)
        draw.line([tuple(p) for p in px(linear, r, across[name])], fill=colour, width=3 * k,
                  joint="curve")

    # Legend, upper right of the left panel (the curves are low there).
    left, top, right, _ = (v * k for v in linear.box)
    x0, y0, line = right - 190 * k, top + 14 * k, 18 * k
    for i, name in enumerate(FALLOFFS):
        y = y0 + i * line
        draw.line([(x0, y), (x0 + 30 * k, y)], fill=_rgb(FALLOFF_COLOURS[name]), width=3 * k)
        draw.text((x0 + 40 * k, y), name, font=small, fill=text, anchor="lm")
    y = y0 + 3 * line + 4 * k
    draw.line([(x0, y), (x0 + 30 * k, y)], fill=text, width=k)
    draw.text((x0 + 40 * k, y), "solid: across the move", font=small, fill=text, anchor="lm")
    y += line
    _dashed(draw, np.array([[x0, y], [x0 + 30.0 * k, y]]), fill=text, width=k, dash=9 * k,
            gap=6 * k)
    draw.text((x0 + 40 * k, y), "dashed: along the move", font=small, fill=text, anchor="lm")

    # Right: log-log far field along the move.
    frame(loglog, "far field along the move (log-log)", "distance from the centre / radius",
          [(x, f"{x:g}") for x in (1, 10, 100)],
          [(10.0 ** e, "1" if e == 0 else f"1e{e}") for e in range(0, -11, -2)])
    rr = np.geomspace(1.0, 100.0, 300)
    far = falloff_profiles(rr, direction="along")
    anchor = 10.0
    at_anchor = falloff_profiles(np.array([anchor]), direction="along")
    for name, slope in zip(FALLOFFS, (-1, -3, -5)):
        ref_r = np.geomspace(anchor, 100.0, 50)
        ref = 0.15 * abs(at_anchor[name][0]) * (ref_r / anchor) ** slope
        _dashed(draw, px(loglog, ref_r, ref), fill=dim, width=k, dash=3 * k, gap=4 * k)
        start = px(loglog, ref_r[0], ref[0])
        draw.text((start[0] - 6 * k, start[1]), f"slope {slope}", font=small, fill=dim,
                  anchor="rm")
    for name in FALLOFFS:
        draw.line([tuple(p) for p in px(loglog, rr, np.abs(far[name]))],
                  fill=_rgb(FALLOFF_COLOURS[name]), width=3 * k, joint="curve")

    picture = image.resize((width, height), Image.LANCZOS)
    # A fixed palette (every ink blended over both grounds) keeps the file small and the inks
    # exact; an adaptive one merges the sand curve with the text.
    grounds = (palette.BACKGROUND, palette.PANEL)
    inks = [palette.TEXT, *FALLOFF_COLOURS.values(), _mix(palette.BACKGROUND, palette.TEXT, 0.5),
            _mix(palette.PANEL, palette.TEXT, 0.18)]
    entries = sorted({_rgb(_mix(g, c, t)) for g in grounds for c in inks
                      for t in np.linspace(0.0, 1.0, 12)})
    lookup = Image.new("P", (1, 1))
    lookup.putpalette([v for e in entries for v in e])
    picture = picture.quantize(palette=lookup, dither=Image.Dither.NONE)
    with atomic_write(path, mode="wb") as handle:
        picture.save(handle, format="PNG", optimize=True)
    return path


# --------------------------------------------------------------------------- mascot pictures


def _load_demo(models=None):
    """(MeshDoc, Recipe) of the bundled mascot, found as ``pliant demo`` finds them."""
    from brushes.demo import find_models
    from brushes.formats import load_mesh
    from brushes.recipe import load_recipe

    mesh_path, recipe_path = find_models(models)
    return load_mesh(mesh_path), load_recipe(recipe_path)


def _box(*arrays):
    """(2, 3) box around all the given (n, 3) arrays."""
    return np.array([np.min([a.min(axis=0) for a in arrays], axis=0),
                     np.max([a.max(axis=0) for a in arrays], axis=0)])


def render_pose(out, doc, recipe, *, size=_DEFAULT_SIZE):
    """Rest and posed mascot from the front and from behind its left shoulder; returns the
    paths written.

    doc : MeshDoc of the mascot; recipe : its pose :class:`brushes.recipe.Recipe`.
    The pose is applied as ``pliant demo`` applies it; both shapes are framed on one box, so
    the two pictures of a view line up.
    """
    from viewer.snapshot import snapshot

    posed = recipe.apply(doc.vertices, groups=getattr(doc, "groups", None))
    bounds = _box(doc.vertices, posed)
    views = {"front": f"front,pitch=5,zoom={_ZOOM_FIGURE}",
             "back": f"yaw=120,pitch=15,zoom={_ZOOM_FIGURE}"}
    written = []
    for view_name, view in views.items():
        for state, vertices in (("rest", doc.vertices), ("posed", posed)):
            path = Path(out) / f"mascot-{state}-{view_name}.png"
            written.append(snapshot(vertices, doc.faces, path, size=(size, size), view=view,
                                    bounds=bounds))
    return written


def render_twist(out, doc, *, size=_DEFAULT_SIZE):
    """A 90 degree twist of the head, integrated as a flow and added in one step; seen from
    above.

    Returns the paths written (``twist-rest.png``, ``twist-flow.png``, ``twist-linear.png``).
    """
    import brushes
    from viewer.snapshot import snapshot

    twist = brushes.Twist(_HEAD, 0.6, (0.0, 1.0, 0.0), 90.0)
    pins = np.array([_BODY])
    shapes = {"rest": doc.vertices,
              "flow": twist.apply(doc.vertices, flow=True, pins=pins),
              "linear": twist.apply(doc.vertices, flow=False, pins=pins)}
    near = doc.vertices[np.linalg.norm(doc.vertices - np.array(_HEAD), axis=1) < 0.5]
    bounds = _box(near)
    written = []
    for name, vertices in shapes.items():
        path = Path(out) / f"twist-{name}.png"
        written.append(snapshot(vertices, doc.faces, path, size=(size, size),
                                view="top", bounds=bounds))
    return written


def render_grab(out, doc, *, size=_DEFAULT_SIZE):
    """One grab of the right hand with the wide and the tight falloff, coloured by how far each
    vertex moved. Returns the paths written (``grab-wide.png``, ``grab-tight.png``)."""
    import brushes
    from viewer.snapshot import snapshot

    shapes = {}
    for falloff in ("wide", "tight"):
        grab = brushes.Grab(_HAND_RIGHT, 0.2, (-0.15, 0.22, 0.08), falloff=falloff)
        shapes[falloff] = grab.apply(doc.vertices)
    bounds = _box(doc.vertices, *shapes.values())
    written = []
    for falloff, vertices in shapes.items():
        path = Path(out) / f"grab-{falloff}.png"
        written.append(snapshot(vertices, doc.faces, path, size=(size, size),
                                view=f"front,pitch=5,zoom={_ZOOM_FIGURE}", bounds=bounds,
                                magnitude=np.linalg.norm(vertices - doc.vertices, axis=1)))
    return written


#: Job name -> files it writes.
JOBS = {
    "pose": ("mascot-rest-front.png", "mascot-posed-front.png", "mascot-rest-back.png",
             "mascot-posed-back.png"),
    "twist": ("twist-rest.png", "twist-flow.png", "twist-linear.png"),
    "grab": ("grab-wide.png", "grab-tight.png"),
    "falloffs": ("falloffs.png",),
}


def make_gallery(out="docs/img", *, jobs=tuple(JOBS), size=_DEFAULT_SIZE, models=None):
    """Write the pictures of ``jobs`` into ``out`` (created if missing); return the paths.

    Parameters
    ----------
    out : str or os.PathLike
    jobs : sequence of str, keyword-only
        Names from :data:`JOBS`.
    size : int, keyword-only
        Side of the square mascot pictures in pixels (the falloff plot is 960x420).
    models : list of folders, optional, keyword-only
        Where to look for the bundled mascot instead of the default places.

    Raises
    ------
    ValueError
        Unknown job or bad size.
    viewer.snapshot.SnapshotError
        No OpenGL context for the mascot pictures.
    """
    unknown = [j for j in jobs if j not in JOBS]
    if unknown:
        raise ValueError(f"jobs: unknown {', '.join(unknown)}; known: {', '.join(JOBS)}")
    size = int(size)
    if not 16 <= size <= 4096:
        raise ValueError(f"size: must lie in [16, 4096], got {size}")
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    written = []
    if "falloffs" in jobs:
        written.append(plot_falloffs(out / "falloffs.png"))
    mesh_jobs = [j for j in jobs if j != "falloffs"]
    if not mesh_jobs:
        return written
    from viewer.snapshot import ensure_gl_context

    window = ensure_gl_context()  # one context for every picture, not one per picture
    try:
        doc, recipe = _load_demo(models)
        if "pose" in mesh_jobs:
            written += render_pose(out, doc, recipe, size=size)
        if "twist" in mesh_jobs:
            written += render_twist(out, doc, size=size)
        if "grab" in mesh_jobs:
            written += render_grab(out, doc, size=size)
    finally:
        if window is not None:
            window.close()
    return [os.fspath(p) for p in written]


def main(argv=None):
    """``python -m viewer.gallery``: write the README's pictures; returns the exit code."""
    parser = argparse.ArgumentParser(prog="python -m viewer.gallery",
                                     description="Write the README's pictures.")
    parser.add_argument("--out", default="docs/img", help="folder for the PNG files "
                        "(default docs/img)")
    parser.add_argument("--size", type=int, default=_DEFAULT_SIZE,
                        help=f"side of the mascot pictures in pixels (default {_DEFAULT_SIZE})")
    parser.add_argument("--only", default=",".join(JOBS),
                        help=f"comma-separated jobs, from {', '.join(JOBS)} (default all)")
    args = parser.parse_args(argv)
    jobs = [j.strip() for j in args.only.split(",") if j.strip()]
    from viewer.snapshot import SnapshotError
    try:
        for path in make_gallery(args.out, jobs=jobs, size=args.size):
            print(f"{path}: {CAPTIONS[Path(path).name]}")
    except (ValueError, SnapshotError) as exc:
        print(f"gallery: {exc}", file=sys.stderr)
        return 2
    return 0


if __name__ == "__main__":
    sys.exit(main())
