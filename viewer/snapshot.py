"""Off-screen rendering of a mesh to a PNG file, with no window and no display.

The picture is drawn with the viewer's own renderer (:mod:`viewer.render`, colours from
:mod:`viewer.palette`) into an OpenGL framebuffer object, read back and written with Pillow.
The OpenGL context comes from pyglet's headless mode (EGL; on a machine without a GPU,
Mesa's llvmpipe software rasteriser). When a context is already current, for example inside
the viewer window, that one is used instead.

pyglet decides between headless and windowed OpenGL when ``pyglet.gl`` is first imported, so
:func:`snapshot` switches headless mode on only if nothing in the process has imported
``pyglet.gl`` yet; call it before opening any window, or from a fresh process.

View specification
------------------
A short text of comma-separated ``name=value`` pairs, every one optional
(:func:`parse_view`)::

    yaw=30,pitch=15,zoom=1.0,fov=40

The first item may instead be a preset name, whose values the pairs after it override
(``side,zoom=1.5``):

=========  ===========================
``front``  ``yaw=0,pitch=0``
``side``   ``yaw=90,pitch=0``
``back``   ``yaw=180,pitch=0``
``top``    ``yaw=0,pitch=89``
``angle``  ``yaw=30,pitch=15`` (default)
=========  ===========================

``yaw``
    Degrees the camera has turned about the vertical (+Y) axis, starting from the front
    (+Z side, looking toward -Z); positive turns it round to the model's right (+X) side.
    Default 30.
``pitch``
    Degrees the camera is raised above the horizontal; from -89 to 89. Default 15.
``zoom``
    Magnification over the frame-all distance (the mesh's bounding sphere just fits the
    picture); 2 is twice as close. Default 1.
``fov``
    Vertical field of view in degrees, in (0, 170). Default 40.

Example
-------
>>> snapshot(doc.vertices, doc.faces, "pose.png", size=(640, 480),    # doctest: +SKIP
...          view="yaw=-40,pitch=10,zoom=1.3")
"""

import math
import os
import sys

import numpy as np

from brushes import checks

from viewer import palette

__all__ = ["snapshot", "render_pixels", "camera_for", "parse_view", "parse_size",
           "SnapshotError", "ViewSpecError", "DEFAULT_VIEW", "VIEW_PRESETS", "INSTALL_HINT",
           "ensure_gl_context"]

#: Defaults of the view specification (degrees, plain factor).
DEFAULT_VIEW = {"yaw": 30.0, "pitch": 15.0, "zoom": 1.0, "fov": 40.0}
#: Named starting points of a view specification.
VIEW_PRESETS = {
    "front": {"yaw": 0.0, "pitch": 0.0},
    "side": {"yaw": 90.0, "pitch": 0.0},
    "back": {"yaw": 180.0, "pitch": 0.0},
    "top": {"yaw": 0.0, "pitch": 89.0},
    "angle": {"yaw": 30.0, "pitch": 15.0},
}
_VIEW_LIMITS = {"yaw": (-1e6, 1e6), "pitch": (-89.0, 89.0), "zoom": (1e-3, 1e3), "fov": (1e-3, 170.0)}

#: What to install when no OpenGL context can be made (Debian and Ubuntu package names).
INSTALL_HINT = ("install an EGL and Mesa OpenGL runtime, on Debian or Ubuntu: "
                "apt-get install libegl1 libegl-mesa0 libgl1 libgl1-mesa-dri")

_MAX_SIDE = 8192


class SnapshotError(RuntimeError):
    """No OpenGL context or framebuffer could be made for off-screen rendering."""


class ViewSpecError(ValueError):
    """The view specification text is malformed or out of range."""


def parse_view(spec):
    """Read a view specification (see the module docstring).

    Parameters
    ----------
    spec : str, dict or None
        ``"yaw=30,pitch=15,zoom=1.0,fov=40"`` or ``"side,zoom=1.5"``; a dict with the same
        keys; or ``None`` for the defaults. Missing names take their defaults.

    Returns
    -------
    dict
        ``{"yaw": float, "pitch": float, "zoom": float, "fov": float}`` (degrees, factor).

    Raises
    ------
    ViewSpecError
        Unknown name, repeated name, missing ``=``, non-number or out-of-range value.
    """
    view = dict(DEFAULT_VIEW)
    if spec is None:
        return view
    if isinstance(spec, dict):
        items = list(spec.items())
    elif isinstance(spec, str):
        items = []
        for index, part in enumerate(spec.split(",")):
            part = part.strip()
            if not part:
                continue
            if index == 0 and part.lower() in VIEW_PRESETS:
                view.update(VIEW_PRESETS[part.lower()])
                continue
            if "=" not in part:
                raise ViewSpecError(f"view: expected name=value or, first, one of "
                                    f"{', '.join(VIEW_PRESETS)}; got {part!r}")
            name, value = (s.strip() for s in part.split("=", 1))
            items.append((name, value))
    else:
        raise ViewSpecError(f"view: must be a text like 'yaw=30,pitch=15', got {type(spec).__name__}")
    seen = set()
    for name, value in items:
        if name not in DEFAULT_VIEW:
            raise ViewSpecError(f"view: unknown name {name!r}; known: {', '.join(DEFAULT_VIEW)}")
        if name in seen:
            raise ViewSpecError(f"view: {name} given twice")
        seen.add(name)
        try:
            number = float(value)
        except (TypeError, ValueError):
            raise ViewSpecError(f"view: {name} must be a number, got {value!r}") from None
        lo, hi = _VIEW_LIMITS[name]
        if not (math.isfinite(number) and lo <= number <= hi) or (name in ("zoom", "fov") and number <= 0):
            raise ViewSpecError(f"view: {name} must lie in [{lo:g}, {hi:g}], got {value!r}")
        view[name] = number
    return view


def parse_size(text):
    """Read a picture size written ``WIDTHxHEIGHT`` (e.g. ``"800x600"``) into ``(width, height)``."""
    parts = str(text).lower().split("x")
    try:
        if len(parts) != 2:
            raise ValueError
        size = (int(parts[0]), int(parts[1]))
    except ValueError:
        raise checks.FieldError("size", f"expected WIDTHxHEIGHT such as 800x600, got {text!r}") from None
    return _check_size(size)


def _check_size(size):
    try:
        width, height = (int(v) for v in size)
    except (TypeError, ValueError):
        raise checks.FieldError("size", f"must be (width, height), got {size!r}") from None
    if not (1 <= width <= _MAX_SIDE and 1 <= height <= _MAX_SIDE):
        raise checks.FieldError("size", f"each side must lie in [1, {_MAX_SIDE}], got {width}x{height}")
    return width, height


def camera_for(vertices, size, view, *, bounds=None):
    """The :class:`viewer.camera.OrbitCamera` a snapshot uses.

    Parameters
    ----------
    vertices : (n, 3) float64
        Framed when ``bounds`` is not given.
    size : (width, height) int
    view : dict
        From :func:`parse_view`.
    bounds : (2, 3) float, optional, keyword-only
        Box ``[min, max]`` to frame instead of the vertices' bounding box (use the rest
        shape's box to keep the framing fixed across poses).
    """
    from viewer.camera import OrbitCamera
    if bounds is None:
        lo, hi = vertices.min(axis=0), vertices.max(axis=0)
    else:
        bounds = np.asarray(bounds, dtype=np.float64)
        if bounds.shape != (2, 3):
            raise checks.FieldError("bounds", f"must have shape (2, 3), got {bounds.shape}")
        lo, hi = bounds
    camera = OrbitCamera(yaw=math.radians(view["yaw"]), pitch=math.radians(view["pitch"]),
                         fov_y=math.radians(view["fov"]))
    camera.frame(lo, hi, aspect=size[0] / size[1])
    camera.zoom(view["zoom"])
    return camera


def ensure_gl_context():
    """Make sure an OpenGL context is current; return a hidden window to close afterwards, or
    None when a context was already current.

    Switches pyglet to headless mode (EGL) if ``pyglet.gl`` was not imported yet. Raises
    :class:`SnapshotError` with :data:`INSTALL_HINT` when no context can be made.
    """
    import pyglet
    if "pyglet.gl" not in sys.modules:
        pyglet.options["headless"] = True
        pyglet.options["debug_gl"] = False
    try:
        import pyglet.gl as gl
        if gl.current_context is not None:
            return None
        import pyglet.window
        return pyglet.window.Window(width=1, height=1, visible=False)
    except Exception as err:  # pyglet raises many kinds here: missing library, no display, EGL
        raise SnapshotError(f"no OpenGL context for off-screen rendering ({type(err).__name__}: "
                            f"{err}); {INSTALL_HINT}") from None


def render_pixels(vertices, faces, *, size=(800, 600), view=None, bounds=None, magnitude=None,
                  samples=4):
    """Draw a mesh off-screen and return the picture.

    Parameters
    ----------
    vertices : (n, 3) float
    faces : (m, 3) int
    size : (width, height) int, keyword-only
    view : str, dict or None, keyword-only
        View specification (see the module docstring).
    bounds : (2, 3) float, optional, keyword-only
        Box to frame; default the vertices' bounding box.
    magnitude : (n,) float, optional, keyword-only
        Per-vertex displacement magnitude; when given the surface shows the palette's ramp.
    samples : int, keyword-only
        Multisampling for smooth edges (1 turns it off).

    Returns
    -------
    (height, width, 3) uint8
        RGB, first row at the top.
    """
    vertices = checks.points("vertices", vertices)
    if len(vertices) == 0:
        raise checks.FieldError("vertices", "must hold at least one vertex, got shape (0, 3)")
    faces = checks.faces("faces", faces, len(vertices))
    width, height = _check_size(size)
    view = parse_view(view)
    samples = int(samples)
    if samples < 1:
        raise checks.FieldError("samples", f"must be >= 1, got {samples}")
    camera = camera_for(vertices, (width, height), view, bounds=bounds)

    window = ensure_gl_context()
    try:
        return _draw(vertices, faces, camera, width, height, magnitude, samples)
    finally:
        if window is not None:
            window.close()


def _draw(vertices, faces, camera, width, height, magnitude, samples):
    import ctypes

    import pyglet.gl as gl
    from pyglet.image.buffer import Framebuffer, Renderbuffer

    from viewer.render import MeshRenderer

    max_samples = gl.GLint()
    gl.glGetIntegerv(gl.GL_MAX_SAMPLES, max_samples)
    samples = max(1, min(samples, max_samples.value))
    previous_fbo = gl.GLint()
    gl.glGetIntegerv(gl.GL_DRAW_FRAMEBUFFER_BINDING, previous_fbo)
    previous_viewport = (gl.GLint * 4)()
    gl.glGetIntegerv(gl.GL_VIEWPORT, previous_viewport)

    draw_colour = Renderbuffer(width, height, gl.GL_RGBA8, samples)
    draw_depth = Renderbuffer(width, height, gl.GL_DEPTH_COMPONENT24, samples)
    draw_target = Framebuffer()
    draw_target.attach_renderbuffer(draw_colour)
    draw_target.attach_renderbuffer(draw_depth, attachment=gl.GL_DEPTH_ATTACHMENT)
    read_colour = Renderbuffer(width, height, gl.GL_RGBA8, 1)
    read_target = Framebuffer()
    read_target.attach_renderbuffer(read_colour)
    renderer = None
    try:
        draw_target.bind()
        if not draw_target.is_complete:
            raise SnapshotError(f"off-screen framebuffer unusable: {draw_target.get_status()}")
        gl.glViewport(0, 0, width, height)
        gl.glClearColor(*palette.BACKGROUND, 1.0)
        gl.glClear(gl.GL_COLOR_BUFFER_BIT | gl.GL_DEPTH_BUFFER_BIT)
        renderer = MeshRenderer(vertices, faces)
        if magnitude is not None:
            renderer.set_magnitude(magnitude)
            renderer.show_magnitude = True
        renderer.draw(camera.view_matrix(), camera.projection_matrix(width / height))

        gl.glBindFramebuffer(gl.GL_READ_FRAMEBUFFER, draw_target.id)
        gl.glBindFramebuffer(gl.GL_DRAW_FRAMEBUFFER, read_target.id)
        gl.glBlitFramebuffer(0, 0, width, height, 0, 0, width, height,
                             gl.GL_COLOR_BUFFER_BIT, gl.GL_NEAREST)
        gl.glBindFramebuffer(gl.GL_READ_FRAMEBUFFER, read_target.id)
        pixels = np.empty((height, width, 4), dtype=np.uint8)
        gl.glPixelStorei(gl.GL_PACK_ALIGNMENT, 1)
        gl.glReadPixels(0, 0, width, height, gl.GL_RGBA, gl.GL_UNSIGNED_BYTE,
                        ctypes.c_void_p(pixels.ctypes.data))
    finally:
        if renderer is not None:
            renderer.delete()
        gl.glBindFramebuffer(gl.GL_FRAMEBUFFER, previous_fbo.value)
        gl.glViewport(*previous_viewport)
        for obj in (draw_target, read_target, draw_colour, draw_depth, read_colour):
            obj.delete()
    # OpenGL's first row is the bottom one.
    return np.ascontiguousarray(pixels[::-1, :, :3])


def snapshot(vertices, faces, path, *, size=(800, 600), view=None, bounds=None, magnitude=None):
    """Render a mesh off-screen and write it to a PNG file.

    The file is written to a temporary name in the same folder and renamed into place, so
    ``path`` is never left half-written.

    Parameters
    ----------
    vertices : (n, 3) float
    faces : (m, 3) int
    path : str or os.PathLike
        Target ``.png`` file; its folder must exist.
    size : (width, height) int, keyword-only
    view : str, dict or None, keyword-only
        View specification, e.g. ``"yaw=30,pitch=15,zoom=1.0"`` (see the module docstring).
    bounds : (2, 3) float, optional, keyword-only
        Box to frame; default the vertices' bounding box.
    magnitude : (n,) float, optional, keyword-only
        Show this per-vertex displacement magnitude on the palette's ramp.

    Returns
    -------
    str
        The path written.

    Raises
    ------
    SnapshotError
        No OpenGL context could be made; the message says what to install.
    ValueError
        Bad arguments (the message starts with the argument's name).
    """
    path = os.fspath(path)
    if not path.lower().endswith(".png"):
        raise checks.FieldError("path", f"must end in .png, got {path!r}")
    pixels = render_pixels(vertices, faces, size=size, view=view, bounds=bounds,
                           magnitude=magnitude)
    from PIL import Image

    from brushes.atomic import atomic_write
    with atomic_write(path, mode="wb") as handle:
        Image.fromarray(pixels, mode="RGB").save(handle, format="PNG")
    return path
