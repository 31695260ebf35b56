"""Orbit camera maths for the viewer: matrices, rays and projections (no OpenGL).

Conventions
-----------
* World space is right-handed with +Y up (the glTF convention).
* Matrices are ``(4, 4) float32`` numpy arrays meant for column vectors:
  ``clip = projection @ view @ [x, y, z, 1]``.  OpenGL stores matrices column-major, so
  upload ``m.T`` (or pass ``transpose=True``); :func:`as_gl` returns the 16 floats in
  column-major order for ``pyglet.math.Mat4(*as_gl(m))`` or a ``mat4`` uniform.
* The view matrix follows ``gluLookAt`` and the projection ``gluPerspective`` (the OpenGL
  reference pages): the eye looks down its own -Z axis and normalized device depth runs
  from -1 at the near plane to +1 at the far plane.
* Window coordinates follow pyglet: ``(0, 0)`` is the bottom-left corner of the window and
  ``(width, height)`` the top-right one; they are continuous (a mouse event at integer
  ``x`` is the left edge of pixel ``x``; add 0.5 for its centre).  Pass the window size in
  the same units as the mouse coordinates (window units, not framebuffer pixels on HiDPI).
* Angles are radians.  ``yaw`` turns the eye about the world +Y axis through the target,
  ``pitch`` lifts it above the target's horizontal plane.  At ``yaw = pitch = 0`` the eye
  sits on the target's +Z side looking toward -Z.

Example
-------
>>> cam = OrbitCamera()
>>> cam.frame([-1, -1, -1], [1, 1, 1], aspect=4 / 3)
>>> origin, direction = cam.ray(320, 240, 640, 480)   # the ray under the window centre
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from brushes import checks

__all__ = ["OrbitCamera", "look_at", "perspective", "as_gl"]

WORLD_UP = np.array([0.0, 1.0, 0.0])
# Pitch stays this far inside +-90 degrees so the view direction never lines up with WORLD_UP.
PITCH_LIMIT = math.pi / 2 - 1e-3


def _window(width, height):
    return checks.positive("width", width), checks.positive("height", height)


def look_at(eye, target, up=WORLD_UP):
    """View matrix of an eye at ``eye`` looking at ``target`` (``gluLookAt``).

    eye, target, up : (3,) float64.  Returns (4, 4) float32 with rows ``s, u, -f`` for the
    unit forward ``f = (target - eye)/|target - eye|``, side ``s = f x up / |f x up|`` and
    ``u = s x f``, times a translation by ``-eye``.
    """
    eye = checks.vector("eye", eye)
    target = checks.vector("target", target)
    up = checks.vector("up", up)
    f = target - eye
    nf = np.linalg.norm(f)
    if nf == 0:
        raise checks.FieldError("target", "must differ from eye")
    f = f / nf
    s = np.cross(f, up)
    ns = np.linalg.norm(s)
    if ns < 1e-12:
        raise checks.FieldError("up", "must not be parallel to the view direction")
    s = s / ns
    u = np.cross(s, f)
    m = np.eye(4)
    m[0, :3], m[1, :3], m[2, :3] = s, u, -f
    m[:3, 3] = -m[:3, :3] @ eye
    return m.astype(np.float32)


def perspective(fov_y, aspect, near, far):
    """Perspective projection (``gluPerspective``), (4, 4) float32.

    fov_y : vertical field of view in radians; aspect = width / height; 0 < near < far.
    With ``c = cot(fov_y / 2)``: ``[[c/aspect, 0, 0, 0], [0, c, 0, 0],
    [0, 0, (far+near)/(near-far), 2 far near/(near-far)], [0, 0, -1, 0]]``.
    """
    fov_y = checks.positive("fov_y", fov_y)
    if fov_y >= math.pi:
        raise checks.FieldError("fov_y", f"must be below pi radians, got {fov_y}")
    aspect = checks.positive("aspect", aspect)
    near = checks.positive("near", near)
    far = checks.positive("far", far)
    if far <= near:
        raise checks.FieldError("far", f"must exceed near ({near}), got {far}")
    c = 1.0 / math.tan(fov_y / 2)
    m = np.zeros((4, 4))
    m[0, 0] = c / aspect
    m[1, 1] = c
    m[2, 2] = (far + near) / (near - far)
    m[2, 3] = 2 * far * near / (near - far)
    m[3, 2] = -1.0
    return m.astype(np.float32)


def as_gl(matrix):
    """The 16 entries of a (4, 4) matrix in OpenGL's column-major order, as a tuple of floats."""
    m = np.asarray(matrix, dtype=np.float64)
    if m.shape != (4, 4):
        raise checks.FieldError("matrix", f"must have shape (4, 4), got {m.shape}")
    return tuple(float(x) for x in m.T.ravel())


@dataclass
class OrbitCamera:
    """A camera orbiting ``target`` at ``distance``; angles in radians.

    target : (3,) float64 point looked at and orbited about.
    distance : eye-to-target distance (> 0).
    yaw, pitch : radians (see the module docstring); pitch is kept inside +-(pi/2 - 1e-3).
    fov_y : vertical field of view, radians.
    near_ratio, far_ratio : the clip planes sit at ``distance * near_ratio`` and
        ``distance * far_ratio``, so zooming keeps the depth precision (common practice).
    shift_x : lens shift, in normalized device units: the picture slides right by
        ``shift_x * width / 2`` window units without turning the camera (an off-centre
        frustum); the viewer slides the model clear of its help panel this way. Rays,
        projections and the projection matrix all include it.
    """

    target: np.ndarray = field(default_factory=lambda: np.zeros(3))
    distance: float = 3.0
    yaw: float = 0.0
    pitch: float = 0.0
    fov_y: float = math.radians(45.0)
    near_ratio: float = 0.01
    far_ratio: float = 100.0
    shift_x: float = 0.0

    def __post_init__(self):
        self.target = checks.vector("target", self.target)
        self.distance = checks.positive("distance", self.distance)
        self.fov_y = checks.positive("fov_y", self.fov_y)
        if self.fov_y >= math.pi:
            raise checks.FieldError("fov_y", f"must be below pi radians, got {self.fov_y}")
        self.yaw = float(self.yaw)
        self.pitch = min(max(float(self.pitch), -PITCH_LIMIT), PITCH_LIMIT)
        self.near_ratio = checks.positive("near_ratio", self.near_ratio)
        self.far_ratio = checks.positive("far_ratio", self.far_ratio)
        if self.far_ratio <= self.near_ratio:
            raise checks.FieldError("far_ratio", "must exceed near_ratio")

    # -- frame vectors -------------------------------------------------------------------
    def view_axis(self):
        """Unit (3,) float64 direction the camera looks along (from the eye toward the target)."""
        cp = math.cos(self.pitch)
        return -np.array([cp * math.sin(self.yaw), math.sin(self.pitch), cp * math.cos(self.yaw)])

    def right(self):
        """Unit (3,) float64 world direction of the screen's +x (rightward) axis."""
        return np.array([math.cos(self.yaw), 0.0, -math.sin(self.yaw)])

    def up(self):
        """Unit (3,) float64 world direction of the screen's +y (upward) axis."""
        return np.cross(self.right(), self.view_axis())

    def eye(self):
        """(3,) float64 eye position."""
        return self.target - self.distance * self.view_axis()

    @property
    def near(self):
        return self.distance * self.near_ratio

    @property
    def far(self):
        return self.distance * self.far_ratio

    # -- matrices ------------------------------------------------------------------------
    def view_matrix(self):
        """(4, 4) float32 world -> eye matrix (column vectors), as ``gluLookAt(eye, target, +Y)``."""
        return look_at(self.eye(), self.target, WORLD_UP)

    def projection_matrix(self, aspect):
        """(4, 4) float32 eye -> clip matrix, as ``gluPerspective(fov_y, aspect, near, far)``,
        followed by the lens shift (``ndc_x += shift_x``)."""
        m = perspective(self.fov_y, aspect, self.near, self.far)
        if self.shift_x:
            m = m.astype(np.float64)
            m[0] += float(self.shift_x) * m[3]  # x_clip += shift * w_clip
            m = m.astype(np.float32)
        return m

    # -- interaction ---------------------------------------------------------------------
    def orbit(self, dx, dy, *, radians_per_pixel=0.01):
        """Turn the eye about the target for a drag of ``(dx, dy)`` window units.

        Dragging right turns the scene with the cursor (yaw decreases); dragging up tips the
        scene's near side up (pitch decreases), clamped short of the poles.
        """
        rate = float(radians_per_pixel)
        self.yaw = (self.yaw - rate * float(dx)) % (2 * math.pi)
        self.pitch = min(max(self.pitch - rate * float(dy), -PITCH_LIMIT), PITCH_LIMIT)

    def world_per_pixel(self, height):
        """World length covered by one window unit at the target's depth."""
        return 2.0 * self.distance * math.tan(self.fov_y / 2) / checks.positive("height", height)

    def pan(self, dx, dy, height):
        """Slide the target so the scene at the target's depth follows a drag of ``(dx, dy)``."""
        s = self.world_per_pixel(height)
        self.target = self.target - s * (float(dx) * self.right() + float(dy) * self.up())

    def zoom(self, factor):
        """Divide the distance by ``factor`` (> 1 moves closer); e.g. ``zoom(1.1 ** wheel_steps)``."""
        self.distance = self.distance / checks.positive("factor", factor)

    def frame(self, bounds_min, bounds_max, *, aspect=1.0, margin=1.05):
        """Aim at the box centre and back off until the whole box is in view (frame all).

        bounds_min, bounds_max : (3,) float64 corners of an axis-aligned box.
        The distance is the smallest at which every corner of the box projects inside the
        view shrunk by ``margin`` (1.05: 5% free on the limiting side), for the current yaw
        and pitch: with the corner at ``(a, b, c)`` along (right, up, towards the eye) from the
        centre, its depth is ``distance - c``, and it is in view when ``|a| <= tan(fov_x/2) *
        depth / margin`` and ``|b| <= tan(fov_y/2) * depth / margin``. So a tall figure fills
        the picture's height rather than the circle round its bounding sphere.
        """
        lo = checks.vector("bounds_min", bounds_min)
        hi = checks.vector("bounds_max", bounds_max)
        if np.any(hi < lo):
            raise checks.FieldError("bounds_max", "must be >= bounds_min on every axis")
        aspect = checks.positive("aspect", aspect)
        margin = checks.positive("margin", margin)
        tan_y = math.tan(self.fov_y / 2)
        tan_x = tan_y * aspect
        center = 0.5 * (lo + hi)
        corners = np.array([[x, y, z] for x in (lo[0], hi[0]) for y in (lo[1], hi[1])
                            for z in (lo[2], hi[2])]) - center
        a = corners @ self.right()
        b = corners @ self.up()
        c = corners @ -self.view_axis()
        need = c + margin * np.maximum(np.abs(a) / tan_x, np.abs(b) / tan_y)
        # Every corner also stays beyond the near plane (distance * near_ratio).
        near_ok = c.max() / max(1.0 - self.near_ratio, 1e-6)
        extent = float(np.linalg.norm(hi - lo))
        self.target = center
        self.distance = max(float(need.max()), near_ok * (1 + 1e-9), 1e-9 * max(extent, 1.0), 1e-9)

    # -- rays and projection -------------------------------------------------------------
    def ray(self, px, py, width, height):
        """The eye ray through window point ``(px, py)``.

        Returns ``origin`` (3,) float64 (the eye) and ``direction`` (3,) float64 of unit length.
        """
        width, height = _window(width, height)
        ndc_x = 2.0 * float(px) / width - 1.0 - float(self.shift_x)
        ndc_y = 2.0 * float(py) / height - 1.0
        t = math.tan(self.fov_y / 2)
        d = self.view_axis() + ndc_x * t * (width / height) * self.right() + ndc_y * t * self.up()
        return self.eye(), d / np.linalg.norm(d)

    def project(self, points, width, height):
        """Window coordinates of world points.

        points : (3,) or (n, 3) float64.  Returns (2,) or (n, 2) float64 ``(x, y)`` in window
        units (bottom-left origin); points at or behind the eye plane give NaN.
        """
        p = np.asarray(points, dtype=np.float64)
        single = p.shape == (3,)
        if single:
            p = p[None]
        if p.ndim != 2 or p.shape[1] != 3:
            raise checks.FieldError("points", f"must have shape (3,) or (n, 3), got {p.shape}")
        width, height = _window(width, height)
        rel = p - self.eye()
        depth = rel @ self.view_axis()
        t = math.tan(self.fov_y / 2)
        with np.errstate(divide="ignore", invalid="ignore"):
            ndc_x = (rel @ self.right()) / (depth * t * (width / height)) + float(self.shift_x)
            ndc_y = (rel @ self.up()) / (depth * t)
        out = np.stack([(ndc_x + 1) * 0.5 * width, (ndc_y + 1) * 0.5 * height], axis=1)
        out[depth <= 0] = np.nan
        return out[0] if single else out
