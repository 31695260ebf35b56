"""Mouse drag -> brush keyword arguments (no OpenGL).

Each function turns a drag from window point ``start`` to window point ``current`` (pyglet
coordinates: origin bottom-left, +y up, see :mod:`viewer.camera`) into the keyword arguments of
one brush, as a JSON-ready dict with the registry name under ``"kind"``::

    params = gesture.grab(camera, center, radius, start, current, width, height)
    kind = params.pop("kind")
    brush = registry.lookup(kind)(**params)

``center`` is the picked surface point (3,) float64 and ``radius`` the brush radius in world
units.  A drag is measured from the press, not from the previous motion event: the app
re-applies the whole drag to the positions it had when the button went down.

Rules (all rates are keyword-only and have these defaults):

* grab: ``move`` is the world displacement of the cursor in the plane through ``center``
  perpendicular to the view axis, so the grabbed point stays under the cursor.
* twist: ``degrees = degrees_per_width * dx / width`` (horizontal drag; a drag across the whole
  window turns 180 degrees, so a modest drag of an eighth of the window turns 22.5 degrees at
  any window size) about ``axis`` = the view axis (pointing into the screen) or, with
  ``normal=``, the surface normal turned to point into the screen.  With the right-hand rule about an axis pointing into the
  screen, dragging right turns the surface clockwise on screen, like a dial gripped at its top.
* scale: ``factor = exp(per_pixel * dy)`` (vertical drag, 0.005 per pixel): up grows.
* pinch: ``gradient = strength * (d d^T - I/3)`` with ``strength = per_pixel * |drag|``
  (0.002 per pixel) and ``d`` the unit world direction of the drag on screen
  (``dx * right + dy * up``); symmetric and traceless, it stretches along ``d`` and narrows
  across it; ``invert=True`` negates it (narrows along ``d``).
* radius: each wheel step multiplies the radius by 1.1 (:func:`wheel_radius`).
"""

from __future__ import annotations

import math

import numpy as np

from brushes import checks

__all__ = [
    "grab", "twist", "scale", "pinch", "drag_params", "plane_point",
    "wheel_radius", "radius_from_pixels", "pixels_from_radius", "KINDS",
]

KINDS = ("grab", "twist", "scale", "pinch")


def _base(kind, center, radius):
    return {"kind": kind, "center": checks.vector("center", center).tolist(), "radius": checks.positive("radius", radius)}


def plane_point(camera, px, py, width, height, anchor):
    """Where the eye ray through window point ``(px, py)`` meets the plane through ``anchor``
    perpendicular to the view axis.  anchor : (3,) float64; returns (3,) float64."""
    anchor = checks.vector("anchor", anchor)
    origin, direction = camera.ray(px, py, width, height)
    axis = camera.view_axis()
    # direction . axis >= cos(half the diagonal field of view) > 0, so the ray always meets it.
    t = float((anchor - origin) @ axis) / float(direction @ axis)
    return origin + t * direction


def grab(camera, center, radius, start, current, width, height):
    """Grab: ``move`` (3,) is the cursor's world displacement in the view plane through ``center``."""
    params = _base("grab", center, radius)
    s, c = checks.vector("start", start, length=2), checks.vector("current", current, length=2)
    p0 = plane_point(camera, s[0], s[1], width, height, params["center"])
    p1 = plane_point(camera, c[0], c[1], width, height, params["center"])
    params["move"] = (p1 - p0).tolist()
    return params


def twist(camera, center, radius, start, current, width, *, normal=None, degrees_per_width=180.0):
    """Twist: ``degrees = degrees_per_width * dx / width`` about the view axis, or about
    ``normal`` ((3,) float64, need not be unit) turned to point into the screen. ``width`` is
    the window width in window units."""
    params = _base("twist", center, radius)
    dx = float(checks.vector("current", current, length=2)[0] - checks.vector("start", start, length=2)[0])
    view = camera.view_axis()
    if normal is None:
        axis = view
    else:
        axis = checks.nonzero_vector("normal", normal)
        axis = axis / float(np.linalg.norm(axis))
        if axis @ view < 0:
            axis = -axis
    params["axis"] = axis.tolist()
    rate = checks.number("degrees_per_width", degrees_per_width) / checks.positive("width", width)
    params["degrees"] = rate * dx
    return params


def scale(center, radius, start, current, *, per_pixel=0.005):
    """Scale: ``factor = exp(per_pixel * dy)``; dragging up grows, down shrinks."""
    params = _base("scale", center, radius)
    dy = float(checks.vector("current", current, length=2)[1] - checks.vector("start", start, length=2)[1])
    params["factor"] = math.exp(checks.number("per_pixel", per_pixel) * dy)
    return params


def pinch(camera, center, radius, start, current, *, per_pixel=0.002, invert=False):
    """Pinch: ``gradient`` (3, 3) ``= strength * (d d^T - I/3)``, ``d`` the drag's world direction.

    strength = per_pixel * drag length in pixels (negated by ``invert``); a zero drag gives a
    zero gradient.
    """
    params = _base("pinch", center, radius)
    drag = checks.vector("current", current, length=2) - checks.vector("start", start, length=2)
    length = float(np.hypot(*drag))
    gradient = np.zeros((3, 3))
    if length > 0:
        d = drag[0] * camera.right() + drag[1] * camera.up()
        d /= np.linalg.norm(d)
        strength = checks.number("per_pixel", per_pixel) * length * (-1.0 if invert else 1.0)
        gradient = strength * (np.outer(d, d) - np.eye(3) / 3)
    params["gradient"] = gradient.tolist()
    return params


def drag_params(kind, camera, center, radius, start, current, width, height, *, normal=None, invert=False):
    """Dispatch to :func:`grab`, :func:`twist`, :func:`scale` or :func:`pinch` with default rates.

    ``normal`` is used by twist only (None: the view axis); ``invert`` by pinch only.
    """
    if kind == "grab":
        return grab(camera, center, radius, start, current, width, height)
    if kind == "twist":
        return twist(camera, center, radius, start, current, width, normal=normal)
    if kind == "scale":
        return scale(center, radius, start, current)
    if kind == "pinch":
        return pinch(camera, center, radius, start, current, invert=invert)
    raise checks.FieldError("kind", f"must be one of {', '.join(KINDS)}, got {kind!r}")


def wheel_radius(radius, steps, *, step=1.1, min_radius=None, max_radius=None):
    """The radius after ``steps`` wheel clicks: ``radius * step ** steps``, then clamped.

    Positive steps (wheel up in pyglet's ``scroll_y``) grow the radius.
    """
    r = checks.positive("radius", radius) * checks.positive("step", step) ** checks.number("steps", steps)
    if min_radius is not None:
        r = max(r, checks.positive("min_radius", min_radius))
    if max_radius is not None:
        r = min(r, checks.positive("max_radius", max_radius))
    return r


def _depth(camera, center):
    depth = float((checks.vector("center", center) - camera.eye()) @ camera.view_axis())
    if depth <= 0:
        raise checks.FieldError("center", "must lie in front of the camera")
    return depth


def radius_from_pixels(camera, center, pixels, height):
    """World radius that covers ``pixels`` window units on screen at the depth of ``center``."""
    per_pixel = 2.0 * _depth(camera, center) * math.tan(camera.fov_y / 2) / checks.positive("height", height)
    return checks.positive("pixels", pixels) * per_pixel


def pixels_from_radius(camera, center, radius, height):
    """Window units covered by the world length ``radius`` at the depth of ``center``
    (for drawing the brush outline); inverse of :func:`radius_from_pixels`."""
    per_pixel = 2.0 * _depth(camera, center) * math.tan(camera.fov_y / 2) / checks.positive("height", height)
    return checks.positive("radius", radius) / per_pixel
