"""Shaders and vertex buffers for the viewer and the PNG snapshot (pyglet 2, OpenGL 3.3 core).

The pure half of this module (no OpenGL, importable without a display):

* :class:`NormalField`: area-weighted vertex normals (the formulas of :mod:`brushes.surface`),
  recomputed after a stroke only around the vertices that moved;
* :func:`ring_points`: the brush outline, a camera-facing circle at the brush radius.

The GL half (:class:`MeshRenderer`, :class:`MarkerRenderer`) needs a current OpenGL context,
made by a pyglet window or by :mod:`viewer.snapshot`. pyglet is imported only when one of these
classes is built. Positions and normals live in their own ``GL_DYNAMIC_DRAW`` buffers and are
replaced in place with ``glBufferSubData`` from float32 numpy arrays, so a drag only ever
uploads ``2 * 12 * n`` bytes and never reallocates.

Shaders are module-level strings; the palette is pasted in from :mod:`viewer.palette`.
"""

import ctypes
import time

import numpy as np

from brushes import checks
from viewer import palette
from viewer.camera import as_gl

__all__ = [
    "NormalField", "moved_rows", "ring_points",
    "MeshRenderer", "MarkerRenderer", "RenderError",
    "MESH_VERTEX_SHADER", "MESH_FRAGMENT_SHADER", "MARKER_VERTEX_SHADER", "MARKER_FRAGMENT_SHADER",
]


class RenderError(RuntimeError):
    """OpenGL could not do what was asked (shader build, context, framebuffer)."""


# --------------------------------------------------------------------------------------------
# Pure part: normals, outline geometry, matrix layout.
# --------------------------------------------------------------------------------------------

_MOVED = None


def moved_rows(a, b, tolerance):
    """(k,) int64 indices of the rows of (n, 3) ``a`` farther than ``tolerance`` from ``b``.

    One parallel numba pass when numba is there (`brushes.kernels.numba_module`), else numpy.
    """
    global _MOVED
    from brushes import kernels
    a, b = np.asarray(a), np.asarray(b)
    if a.shape != b.shape or a.ndim != 2 or a.shape[1] != 3:
        raise checks.FieldError("b", f"must have the shape of a, (n, 3), got {b.shape} and {a.shape}")
    limit = float(tolerance) ** 2
    numba = kernels.numba_module()
    if numba is None or a.dtype != b.dtype:
        d = np.subtract(a, b)
        return np.flatnonzero(np.einsum("ij,ij->i", d, d) > limit)
    if _MOVED is None:
        @numba.njit(parallel=True, cache=True, nogil=True)
        def far(a, b, limit, out):
            for i in numba.prange(a.shape[0]):
                dx, dy, dz = a[i, 0] - b[i, 0], a[i, 1] - b[i, 1], a[i, 2] - b[i, 2]
                out[i] = dx * dx + dy * dy + dz * dz > limit
            return out

        _MOVED = far
    flags = _MOVED(np.ascontiguousarray(a), np.ascontiguousarray(b), limit, np.empty(len(a), np.bool_))
    return np.flatnonzero(flags)


class NormalField:
    """Area-weighted vertex normals of one mesh, kept up to date as its vertices move.

    The formulas are :mod:`brushes.surface`'s (``N_i = sum over faces f at i of
    (b_f - a_f) x (c_f - a_f)``, left unnormalised: the mesh shader normalises per vertex).
    The face cross products are cached, so after a stroke moves a set of vertices only the
    faces that use them are recomputed, and only the normals of those faces' corners are summed
    again (:meth:`update`, through :func:`brushes.surface.update_vertex_normals`: parallel numba
    loops over flagged faces and vertices): the work follows the moved region, not the mesh.

    Parameters
    ----------
    faces : (m, 3) int
    n_vertices : int

    Attributes
    ----------
    normals : (n, 3) float32
        Unnormalised area-weighted sums (zero for a vertex with no area around it).
    """

    def __init__(self, faces, n_vertices):
        from brushes import surface
        self.faces = checks.faces("faces", faces, int(n_vertices))
        self.n_vertices = int(n_vertices)
        self.operator = surface.vertex_normal_operator(self.faces, self.n_vertices)
        # the per-frame kernels read the indices at half the bytes of int64
        self._faces32 = self.faces.astype(np.int32) if self.n_vertices < 2**31 else self.faces
        self.cross = np.zeros((len(self.faces), 3), dtype=np.float32)
        self.normals = np.zeros((self.n_vertices, 3), dtype=np.float32)

    def _positions(self, vertices):
        v = _as_f32(vertices, (3,), "vertices")
        if len(v) != self.n_vertices:
            raise checks.FieldError("vertices", f"must have {self.n_vertices} rows, got {len(v)}")
        return v

    def full(self, vertices):
        """Recompute every normal from (n, 3) positions; returns :attr:`normals`."""
        from brushes import surface
        surface.update_vertex_normals(self._positions(vertices), self._faces32, self.operator,
                                      self.cross, self.normals)
        return self.normals

    def update(self, vertices, moved):
        """Recompute the normals around the vertices ``moved`` ((k,) int) only.

        Returns the (j,) int64 indices of the vertices whose normals were rewritten (the
        corners of every face that uses a moved vertex; every vertex when more than a quarter
        moved, which is recomputed in one full pass).
        """
        from brushes import surface
        v = self._positions(vertices)
        moved = np.asarray(moved, dtype=np.int64).reshape(-1)
        if moved.size == 0:
            return moved
        if moved.size > self.n_vertices // 4:  # most of the mesh: one full pass is cheaper
            return surface.update_vertex_normals(v, self._faces32, self.operator, self.cross, self.normals)
        return surface.update_vertex_normals(v, self._faces32, self.operator, self.cross, self.normals,
                                             moved=moved)


def ring_points(center, radius, right, up, *, segments=64):
    """Points of a circle of ``radius`` around ``center`` in the plane spanned by right and up.

    With the camera's right and up vectors this is the outline of the brush sphere as seen
    from the camera (exact for an orthographic view, close for a perspective one).

    Parameters
    ----------
    center : (3,) float
    radius : float, > 0
    right, up : (3,) float
        Orthonormal in-plane axes.
    segments : int, >= 3, keyword-only

    Returns
    -------
    (segments, 3) float32
        Closed loop (draw as a line loop).
    """
    center = checks.vector("center", center)
    right = checks.vector("right", right)
    up = checks.vector("up", up)
    radius = checks.positive("radius", radius)
    if int(segments) < 3:
        raise checks.FieldError("segments", f"must be >= 3, got {segments}")
    angle = np.linspace(0.0, 2.0 * np.pi, int(segments), endpoint=False)
    pts = center + radius * (np.cos(angle)[:, None] * right + np.sin(angle)[:, None] * up)
    return pts.astype(np.float32)


# --------------------------------------------------------------------------------------------
# Shaders (GLSL 330 core).
# --------------------------------------------------------------------------------------------

MESH_VERTEX_SHADER = """#version 330 core
layout(location = 0) in vec3 position;
layout(location = 1) in vec3 normal;
layout(location = 2) in float magnitude;
layout(location = 3) in float hold;
layout(location = 4) in float fold;

uniform mat4 u_view;
uniform mat4 u_projection;

out vec3 v_normal;
out vec3 v_position;
out float v_magnitude;
out float v_hold;
out float v_fold;

void main() {
    vec4 p = u_view * vec4(position, 1.0);
    v_position = p.xyz;
    // Normals arrive unnormalised (area-weighted sums); a zero one stays zero. The view
    // matrix is a rigid motion, so its upper 3x3 maps normals too.
    float len = length(normal);
    v_normal = mat3(u_view) * (len > 0.0 ? normal / len : normal);
    v_magnitude = magnitude;
    v_hold = hold;
    v_fold = fold;
    gl_Position = u_projection * p;
}
"""

MESH_FRAGMENT_SHADER = """#version 330 core
%(palette)s

in vec3 v_normal;
in vec3 v_position;
in float v_magnitude;
in float v_hold;
in float v_fold;

uniform float u_show_magnitude;  // 0 or 1
uniform float u_magnitude_scale; // 1 / magnitude shown at the top of the ramp
uniform float u_hold_strength;   // how far a fully held vertex moves towards MASK_TINT

out vec4 frag_colour;

vec3 ramp_colour(float t) {
    vec3 colour = RAMP_COLOUR[0];
    for (int i = 1; i < RAMP_STOPS; ++i) {
        float s = clamp((t - RAMP_AT[i - 1]) / (RAMP_AT[i] - RAMP_AT[i - 1]), 0.0, 1.0);
        colour = (t >= RAMP_AT[i - 1]) ? mix(RAMP_COLOUR[i - 1], RAMP_COLOUR[i], s) : colour;
    }
    return colour;
}

void main() {
    float len = length(v_normal);
    vec3 to_eye = normalize(-v_position);
    vec3 n = len > 1e-12 ? v_normal / len : to_eye;
    vec3 base = CLAY;
    if (u_show_magnitude > 0.5) {
        base = ramp_colour(clamp(v_magnitude * u_magnitude_scale, 0.0, 1.0));
    }
    base = mix(base, MASK_TINT, clamp(v_hold, 0.0, 1.0) * u_hold_strength);
    base = mix(base, FOLD_TINT, clamp(v_fold, 0.0, 1.0) * 0.85);
    if (!gl_FrontFacing) {
        n = -n;
        base = CLAY_BACK;
    }
    // Hemisphere ambient, wrapped warm key, plain cool fill and a broad dull highlight.
    vec3 ambient = mix(AMBIENT_GROUND, AMBIENT_SKY, 0.5 + 0.5 * n.y);
    float key = max((dot(n, KEY_DIRECTION) + WRAP) / (1.0 + WRAP), 0.0);
    float fill = max(dot(n, FILL_DIRECTION), 0.0);
    vec3 halfway = normalize(KEY_DIRECTION + to_eye);
    float highlight = SHEEN * pow(max(dot(n, halfway), 0.0), GLOSS);
    vec3 colour = base * (ambient + key * KEY_COLOUR + fill * FILL_COLOUR) + highlight * KEY_COLOUR;
    frag_colour = vec4(clamp(colour, 0.0, 1.0), 1.0);
}
"""

MARKER_VERTEX_SHADER = """#version 330 core
layout(location = 0) in vec3 position;
uniform mat4 u_view;
uniform mat4 u_projection;
uniform float u_point_size;
void main() {
    gl_Position = u_projection * (u_view * vec4(position, 1.0));
    gl_PointSize = u_point_size;
}
"""

MARKER_FRAGMENT_SHADER = """#version 330 core
uniform vec4 u_colour;
uniform float u_round;  // 1: discard outside the disc of a point sprite
out vec4 frag_colour;
void main() {
    if (u_round > 0.5) {
        vec2 d = gl_PointCoord - vec2(0.5);
        if (dot(d, d) > 0.25) discard;
    }
    frag_colour = u_colour;
}
"""


# --------------------------------------------------------------------------------------------
# GL part.
# --------------------------------------------------------------------------------------------

def _program(vertex_source, fragment_source):
    """Compile and link a ShaderProgram, turning pyglet's ShaderException into RenderError."""
    from pyglet.graphics.shader import Shader, ShaderException, ShaderProgram
    try:
        return ShaderProgram(Shader(vertex_source, "vertex"), Shader(fragment_source, "fragment"))
    except ShaderException as err:  # pyglet's class derives from BaseException
        raise RenderError(f"shader build failed: {err}") from None


def _as_f32(array, shape_tail, name):
    array = np.asarray(array)
    if array.ndim != 1 + len(shape_tail) or tuple(array.shape[1:]) != shape_tail:
        want = "(n" + "".join(f", {k}" for k in shape_tail) + ")"
        raise checks.FieldError(name, f"must have shape {want}, got {array.shape}")
    return np.ascontiguousarray(array, dtype=np.float32)


class MeshRenderer:
    """GPU copy of one triangle mesh and the program that shades it.

    Parameters
    ----------
    vertices : (n, 3) float
        Initial positions.
    faces : (m, 3) int
        Triangles (fixed for the life of the renderer).

    Notes
    -----
    Needs a current OpenGL 3.3+ context. Per-vertex attributes: position and normal
    (float32 x 3), displacement magnitude, hold weight and fold flag (float32). :meth:`set_positions`
    recomputes normals with the precomputed operator and replaces both buffers in place.
    """

    def __init__(self, vertices, faces, *, field=None):
        from pyglet import gl
        from pyglet.graphics.vertexarray import VertexArray
        from pyglet.graphics.vertexbuffer import BufferObject

        vertices = _as_f32(vertices, (3,), "vertices")
        self.field = field if field is not None else NormalField(faces, len(vertices))
        self.timings = {"normals": 0.0, "upload": 0.0}  # milliseconds of the last set_positions
        self.faces = self.field.faces
        self.n_vertices = len(vertices)
        self.n_faces = len(self.faces)
        self.program = _program(MESH_VERTEX_SHADER,
                                MESH_FRAGMENT_SHADER % {"palette": palette.glsl_constants()})
        n = max(self.n_vertices, 1)
        self._positions = BufferObject(12 * n)
        self._normals = BufferObject(12 * n)
        self._magnitude = BufferObject(4 * n)
        self._hold = BufferObject(4 * n)
        self._fold = BufferObject(4 * n)
        indices = np.ascontiguousarray(self.faces, dtype=np.uint32).reshape(-1)
        self._indices = BufferObject(max(indices.nbytes, 4))
        self._indices.set_data_region(indices.ctypes.data, 0, indices.nbytes)

        self.vao = VertexArray()
        with self.vao:
            for location, buffer, width in ((0, self._positions, 3), (1, self._normals, 3),
                                            (2, self._magnitude, 1), (3, self._hold, 1),
                                            (4, self._fold, 1)):
                buffer.bind()
                gl.glEnableVertexAttribArray(location)
                gl.glVertexAttribPointer(location, width, gl.GL_FLOAT, gl.GL_FALSE, 0, 0)
            self._indices.bind_to_index_buffer()
        self.show_magnitude = False
        self.magnitude_scale = 1.0
        self.hold_strength = 0.65
        self.set_positions(vertices, normals=self.field.normals if field is not None else None)
        self.set_magnitude(None)
        self.set_hold(None)
        self.set_fold(None)

    @staticmethod
    def _upload(buffer, array):
        if array.nbytes:
            buffer.set_data_region(ctypes.c_void_p(array.ctypes.data), 0, array.nbytes)

    @property
    def normals(self):
        """(n, 3) float32 unnormalised vertex normals last uploaded."""
        return self.field.normals

    def set_positions(self, vertices, *, normals=None, moved=None):
        """Replace positions (and normals) in place.

        Parameters
        ----------
        vertices : (n, 3) float
            New positions, same n as at construction.
        normals : (n, 3) float, optional, keyword-only
            Precomputed normals (any positive length).
        moved : (k,) int, optional, keyword-only
            The vertices that moved since the last call: only the normals around them are
            recomputed (:meth:`NormalField.update`). Without it (and without ``normals``)
            every normal is recomputed.
        """
        vertices = _as_f32(vertices, (3,), "vertices")
        if len(vertices) != self.n_vertices:
            raise checks.FieldError("vertices", f"must have {self.n_vertices} rows, got {len(vertices)}")
        start = time.perf_counter()
        if normals is not None:
            if normals is not self.field.normals:
                self.field.normals[:] = _as_f32(normals, (3,), "normals")
        elif moved is not None:
            self.field.update(vertices, moved)
        else:
            self.field.full(vertices)
        middle = time.perf_counter()
        self._upload(self._positions, vertices)
        self._upload(self._normals, self.field.normals)
        self.timings = {"normals": 1e3 * (middle - start),
                        "upload": 1e3 * (time.perf_counter() - middle)}

    def set_magnitude(self, values, *, scale=None):
        """Per-vertex displacement magnitude for the overlay ramp (``None`` clears it).

        Parameters
        ----------
        values : (n,) float or None
        scale : float, optional, keyword-only
            The magnitude shown at the hot end of the ramp; default the largest value.
        """
        if values is None:
            values = np.zeros(self.n_vertices, dtype=np.float32)
        values = _as_f32(values, (), "values")
        if len(values) != self.n_vertices:
            raise checks.FieldError("values", f"must have {self.n_vertices} entries, got {len(values)}")
        top = float(values.max()) if scale is None and len(values) else (scale or 0.0)
        self.magnitude_scale = 1.0 / top if top > 0 else 0.0
        self._upload(self._magnitude, values)

    def set_hold(self, weights):
        """Per-vertex hold (mask) weight in [0, 1] shown as a tint (``None`` clears it).

        Parameters
        ----------
        weights : (n,) float or None
        """
        if weights is None:
            weights = np.zeros(self.n_vertices, dtype=np.float32)
        weights = _as_f32(weights, (), "weights")
        if len(weights) != self.n_vertices:
            raise checks.FieldError("weights", f"must have {self.n_vertices} entries, got {len(weights)}")
        self._upload(self._hold, weights)

    def set_fold(self, flags):
        """Per-vertex fold flag in [0, 1] (corners of faces turned over), shown as a strong
        tint (``None`` clears it).

        Parameters
        ----------
        flags : (n,) float or None
        """
        if flags is None:
            flags = np.zeros(self.n_vertices, dtype=np.float32)
        flags = _as_f32(flags, (), "flags")
        if len(flags) != self.n_vertices:
            raise checks.FieldError("flags", f"must have {self.n_vertices} entries, got {len(flags)}")
        self._upload(self._fold, flags)

    def draw(self, view, projection):
        """Draw the mesh with depth testing.

        Parameters
        ----------
        view, projection : (4, 4) float
            Matrices for column vectors (world -> eye -> clip), as from
            :class:`viewer.camera.OrbitCamera`.
        """
        from pyglet import gl
        gl.glEnable(gl.GL_DEPTH_TEST)
        gl.glDepthFunc(gl.GL_LESS)
        gl.glDisable(gl.GL_CULL_FACE)
        self.program.use()
        self.program["u_view"] = as_gl(view)
        self.program["u_projection"] = as_gl(projection)
        self.program["u_show_magnitude"] = 1.0 if self.show_magnitude else 0.0
        self.program["u_magnitude_scale"] = float(self.magnitude_scale)
        self.program["u_hold_strength"] = float(self.hold_strength)
        with self.vao:
            gl.glDrawElements(gl.GL_TRIANGLES, 3 * self.n_faces, gl.GL_UNSIGNED_INT, 0)
        self.program.stop()

    def delete(self):
        """Free the GL objects now rather than at garbage collection."""
        for buffer in (self._positions, self._normals, self._magnitude, self._hold, self._fold,
                       self._indices):
            buffer.delete()
        self.vao.delete()
        self.program.delete()


class MarkerRenderer:
    """Overlay strokes drawn on top of the mesh: the brush outline and pin markers.

    Each call to :meth:`lines` or :meth:`points` uploads a handful of points into one small
    reusable buffer and draws them without depth testing, so they stay visible on the surface.
    """

    def __init__(self, *, capacity=1024):
        from pyglet import gl
        from pyglet.graphics.vertexarray import VertexArray
        from pyglet.graphics.vertexbuffer import BufferObject

        self.program = _program(MARKER_VERTEX_SHADER, MARKER_FRAGMENT_SHADER)
        self.capacity = int(capacity)
        self._buffer = BufferObject(12 * self.capacity)
        self.vao = VertexArray()
        with self.vao:
            self._buffer.bind()
            gl.glEnableVertexAttribArray(0)
            gl.glVertexAttribPointer(0, 3, gl.GL_FLOAT, gl.GL_FALSE, 0, 0)
        self.view = np.eye(4)
        self.projection = np.eye(4)

    def set_camera(self, view, projection):
        """Matrices for the following draws; see :meth:`MeshRenderer.draw`."""
        self.view = np.asarray(view, dtype=np.float64)
        self.projection = np.asarray(projection, dtype=np.float64)

    def _draw(self, points, mode, colour, *, size=1.0, round_points=False):
        from pyglet import gl
        points = _as_f32(points, (3,), "points")[: self.capacity]
        if not len(points):
            return
        MeshRenderer._upload(self._buffer, points)
        gl.glDisable(gl.GL_DEPTH_TEST)
        gl.glEnable(gl.GL_BLEND)
        gl.glBlendFunc(gl.GL_SRC_ALPHA, gl.GL_ONE_MINUS_SRC_ALPHA)
        gl.glEnable(gl.GL_PROGRAM_POINT_SIZE)
        self.program.use()
        self.program["u_view"] = as_gl(self.view)
        self.program["u_projection"] = as_gl(self.projection)
        self.program["u_point_size"] = float(size)
        self.program["u_round"] = 1.0 if round_points else 0.0
        rgba = tuple(colour) + (1.0,) if len(colour) == 3 else tuple(colour)
        self.program["u_colour"] = tuple(float(c) for c in rgba)
        with self.vao:
            gl.glDrawArrays(mode, 0, len(points))
        self.program.stop()
        gl.glEnable(gl.GL_DEPTH_TEST)

    def loop(self, points, colour):
        """Closed polyline through ``points`` ((k, 3) float) in ``colour`` (RGB or RGBA)."""
        from pyglet import gl
        self._draw(points, gl.GL_LINE_LOOP, colour)

    def points(self, points, colour, *, size=9.0, outline=None, outline_width=3.0):
        """Round dots of ``size`` pixels at ``points`` ((k, 3) float), optionally on a disc of
        ``outline`` colour ``outline_width`` pixels wider all round (reads on any surface)."""
        from pyglet import gl
        if outline is not None:
            self._draw(points, gl.GL_POINTS, outline, size=size + 2.0 * outline_width,
                       round_points=True)
        self._draw(points, gl.GL_POINTS, colour, size=size, round_points=True)

    def delete(self):
        """Free the GL objects now rather than at garbage collection."""
        self._buffer.delete()
        self.vao.delete()
        self.program.delete()
