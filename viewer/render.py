"""Shaders and vertex buffers for the viewer and the PNG snapshot (pyglet 2, OpenGL 3.3 core).

The pure half of this module (no OpenGL, importable without a display):

* :func:`vertex_normals_operator` and :func:`vertex_normals`: area-weighted vertex normals as a
  precomputed sparse vertex-face incidence matrix applied to the face cross products
  (:func:`face_cross_products`, one fused numba pass when numba imports);
* :func:`ring_points`: the brush outline, a camera-facing circle at the brush radius.

The GL half (:class:`MeshRenderer`, :class:`MarkerRenderer`) needs a current OpenGL context,
made by a pyglet window or by :mod:`viewer.snapshot`. pyglet is imported only when one of these
classes is built. Positions and normals live in their own ``GL_DYNAMIC_DRAW`` buffers and are
replaced in place with ``glBufferSubData`` from float32 numpy arrays, so a drag only ever
uploads ``2 * 12 * n`` bytes and never reallocates.

Shaders are module-level strings; the palette is pasted in from :mod:`viewer.palette`.
"""

import ctypes
import functools

import numpy as np
import scipy.sparse

from viewer import palette
from viewer.camera import as_gl

__all__ = [
    "vertex_normals_operator", "vertex_normals", "face_cross_products", "ring_points",
    "MeshRenderer", "MarkerRenderer", "RenderError",
    "MESH_VERTEX_SHADER", "MESH_FRAGMENT_SHADER", "MARKER_VERTEX_SHADER", "MARKER_FRAGMENT_SHADER",
]


class RenderError(RuntimeError):
    """OpenGL could not do what was asked (shader build, context, framebuffer)."""


# --------------------------------------------------------------------------------------------
# Pure part: normals, outline geometry, matrix layout.
# --------------------------------------------------------------------------------------------

def _check_faces(faces, n_vertices=None):
    faces = np.asanyarray(faces)
    if faces.ndim != 2 or faces.shape[1] != 3:
        raise ValueError(f"faces: must have shape (m, 3), got {faces.shape}")
    if faces.size and not np.issubdtype(faces.dtype, np.integer):
        raise ValueError(f"faces: must hold integers, got dtype {faces.dtype}")
    if n_vertices is not None and faces.size and (faces.min() < 0 or faces.max() >= n_vertices):
        raise ValueError(f"faces: indices must lie in [0, {n_vertices}), "
                         f"got [{faces.min()}, {faces.max()}]")
    return faces


def vertex_normals_operator(faces, n_vertices):
    """Sparse vertex-face incidence matrix that turns face cross products into vertex normals.

    Row ``i`` has a 1 in column ``f`` for every face ``f`` that uses vertex ``i``. Applied to the
    face cross products ``(b - a) x (c - a)`` (twice the face area times the unit face normal)
    it gives area-weighted vertex normals before normalisation. It depends only on the
    connectivity, so it is built once per mesh and reused for every frame of a drag.

    Parameters
    ----------
    faces : (m, 3) int
        Triangle vertex indices, counter-clockwise seen from outside.
    n_vertices : int
        Number of vertices ``n``; every index in ``faces`` must be below it.

    Returns
    -------
    scipy.sparse.csr_matrix, shape (n, m), float32
    """
    n_vertices = int(n_vertices)
    if n_vertices < 0:
        raise ValueError(f"n_vertices: must be >= 0, got {n_vertices}")
    faces = _check_faces(faces, n_vertices)
    m = len(faces)
    rows = faces.reshape(-1).astype(np.int64)
    cols = np.repeat(np.arange(m, dtype=np.int64), 3)
    data = np.ones(3 * m, dtype=np.float32)
    # A face that names the same vertex twice is degenerate and has a zero cross product, so
    # the summed duplicate entry does no harm.
    op = scipy.sparse.csr_matrix((data, (rows, cols)), shape=(n_vertices, m))
    op.sum_duplicates()
    op.sort_indices()
    return op


def _face_cross_numpy(vertices, faces, out):
    """(b - a) x (c - a) per face with numpy; ``out`` (m, 3) of the vertices' dtype."""
    # ndarray.take along axis 0 is several times faster than fancy indexing for (n, 3) rows.
    a = vertices.take(faces[:, 0], axis=0)
    e1 = vertices.take(faces[:, 1], axis=0)
    e1 -= a
    e2 = vertices.take(faces[:, 2], axis=0)
    e2 -= a
    tmp = np.empty(len(faces), dtype=vertices.dtype)
    for i, (j, k) in enumerate(((1, 2), (2, 0), (0, 1))):
        np.multiply(e1[:, j], e2[:, k], out=out[:, i])
        np.multiply(e1[:, k], e2[:, j], out=tmp)
        out[:, i] -= tmp
    return out


@functools.lru_cache(maxsize=1)
def _face_cross_numba():
    """The compiled face cross-product kernel, or None without numba or with
    ``PLIANT_BACKEND=numpy`` (the switch the engine and picking use too)."""
    from brushes.kernels import numba_module

    numba = numba_module()
    if numba is None:
        return None

    @numba.njit(cache=True, nogil=True)
    def face_cross(vertices, faces, out):
        for f in range(faces.shape[0]):
            ia, ib, ic = faces[f, 0], faces[f, 1], faces[f, 2]
            ax, ay, az = vertices[ia, 0], vertices[ia, 1], vertices[ia, 2]
            ux, uy, uz = vertices[ib, 0] - ax, vertices[ib, 1] - ay, vertices[ib, 2] - az
            vx, vy, vz = vertices[ic, 0] - ax, vertices[ic, 1] - ay, vertices[ic, 2] - az
            out[f, 0] = uy * vz - uz * vy
            out[f, 1] = uz * vx - ux * vz
            out[f, 2] = ux * vy - uy * vx
        return out

    return face_cross


def face_cross_products(vertices, faces, *, out=None, backend=None):
    """Twice the area times the unit normal of each face: ``(b - a) x (c - a)``.

    Parameters
    ----------
    vertices : (n, 3) float32 or float64
    faces : (m, 3) int
    out : (m, 3) array of the vertices' dtype, optional, keyword-only
    backend : {"numba", "numpy", None}, keyword-only
        None takes numba when it imports (one fused pass, no temporaries), else numpy.

    Returns
    -------
    (m, 3) float32 or float64
    """
    if backend not in (None, "numba", "numpy"):
        raise ValueError(f"backend: must be 'numba', 'numpy' or None, got {backend!r}")
    shape = (len(faces), 3)
    if out is None:
        out = np.empty(shape, dtype=vertices.dtype)
    elif out.shape != shape or out.dtype != vertices.dtype:
        raise ValueError(f"out: must be a {vertices.dtype} array of shape {shape}, "
                         f"got {out.dtype} {out.shape}")
    kernel = None if backend == "numpy" else _face_cross_numba()
    if backend == "numba" and kernel is None:
        raise ValueError("backend: numba is not available (missing, or PLIANT_BACKEND=numpy)")
    if kernel is None:
        return _face_cross_numpy(vertices, faces, out)
    return kernel(vertices, faces, out)


def vertex_normals(op, vertices, faces, *, out=None, normalize=True, work=None, backend=None):
    """Unit area-weighted vertex normals.

    ``N_i = normalise( sum over faces f at i of (b_f - a_f) x (c_f - a_f) )``, the sum taken by
    the sparse product ``op @ C`` (C from :func:`face_cross_products`). A vertex with no
    faces, or whose faces cancel or are all degenerate, gets the zero vector (the shader
    treats a zero normal as facing the viewer).

    Parameters
    ----------
    op : scipy.sparse matrix, shape (n, m)
        From :func:`vertex_normals_operator` for the same ``faces``.
    vertices : (n, 3) float32 or float64
        Positions. The work and the result use this dtype (float32 is about twice as fast).
    faces : (m, 3) int
        Triangles.
    out : (n, 3) array of the same dtype, optional, keyword-only
        Written in place and returned.
    normalize : bool, keyword-only
        False leaves the area-weighted sums unnormalised (the mesh shader normalises per
        vertex on the GPU, which saves the CPU a pass over every vertex while dragging).
    work : (m, 3) array of the same dtype, optional, keyword-only
        Reused for the face cross products (saves an allocation per frame).
    backend : {"numba", "numpy", None}, keyword-only
        See :func:`face_cross_products`.

    Returns
    -------
    (n, 3) float32 or float64
    """
    vertices = np.asanyarray(vertices)
    if vertices.dtype not in (np.float32, np.float64):
        vertices = vertices.astype(np.float64)
    if vertices.ndim != 2 or vertices.shape[1] != 3:
        raise ValueError(f"vertices: must have shape (n, 3), got {vertices.shape}")
    faces = np.asanyarray(faces)
    if faces.ndim != 2 or faces.shape[1] != 3:
        raise ValueError(f"faces: must have shape (m, 3), got {faces.shape}")
    if op.shape != (len(vertices), len(faces)):
        raise ValueError(f"op: must have shape ({len(vertices)}, {len(faces)}) for these "
                         f"vertices and faces, got {op.shape}")
    cross = face_cross_products(vertices, faces, out=work, backend=backend)
    summed = np.asarray(op @ cross, dtype=vertices.dtype)
    if out is None:
        out = summed
    elif out.shape != summed.shape or out.dtype != summed.dtype:
        raise ValueError(f"out: must be a {summed.dtype} array of shape {summed.shape}, "
                         f"got {out.dtype} {out.shape}")
    if not normalize:
        if out is not summed:
            out[...] = summed
        return out
    length = np.sqrt(np.einsum("ij,ij->i", summed, summed))
    scale = np.zeros_like(length)
    np.divide(1.0, length, out=scale, where=length > 0)
    np.multiply(summed, scale[:, None], out=out)
    return out


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
    center = np.asarray(center, dtype=np.float64)
    if center.shape != (3,):
        raise ValueError(f"center: must have shape (3,), got {center.shape}")
    right = np.asarray(right, dtype=np.float64)
    up = np.asarray(up, dtype=np.float64)
    if right.shape != (3,) or up.shape != (3,):
        raise ValueError(f"right/up: must have shape (3,), got {right.shape} and {up.shape}")
    radius = float(radius)
    if not radius > 0:
        raise ValueError(f"radius: must be > 0, got {radius}")
    if int(segments) < 3:
        raise ValueError(f"segments: must be >= 3, got {segments}")
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

uniform mat4 u_view;
uniform mat4 u_projection;

out vec3 v_normal;
out vec3 v_position;
out float v_magnitude;
out float v_hold;

void main() {
    vec4 p = u_view * vec4(position, 1.0);
    v_position = p.xyz;
    // Normals arrive unnormalised (area-weighted sums); a zero one stays zero. The view
    // matrix is a rigid motion, so its upper 3x3 maps normals too.
    float len = length(normal);
    v_normal = mat3(u_view) * (len > 0.0 ? normal / len : normal);
    v_magnitude = magnitude;
    v_hold = hold;
    gl_Position = u_projection * p;
}
"""

MESH_FRAGMENT_SHADER = """#version 330 core
%(palette)s

in vec3 v_normal;
in vec3 v_position;
in float v_magnitude;
in float v_hold;

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
        raise ValueError(f"{name}: must have shape {want}, got {array.shape}")
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
    (float32 x 3), displacement magnitude and hold weight (float32). :meth:`set_positions`
    recomputes normals with the precomputed operator and replaces both buffers in place.
    """

    def __init__(self, vertices, faces):
        from pyglet import gl
        from pyglet.graphics.vertexarray import VertexArray
        from pyglet.graphics.vertexbuffer import BufferObject

        vertices = _as_f32(vertices, (3,), "vertices")
        faces = _check_faces(faces, len(vertices))
        self.n_vertices = len(vertices)
        self.n_faces = len(faces)
        # Column-major, so each corner column is contiguous for the gathers in vertex_normals.
        self.faces = np.asfortranarray(faces, dtype=np.int64)
        self.normal_operator = vertex_normals_operator(self.faces, self.n_vertices)
        self.program = _program(MESH_VERTEX_SHADER,
                                MESH_FRAGMENT_SHADER % {"palette": palette.glsl_constants()})
        n = max(self.n_vertices, 1)
        self._positions = BufferObject(12 * n)
        self._normals = BufferObject(12 * n)
        self._magnitude = BufferObject(4 * n)
        self._hold = BufferObject(4 * n)
        indices = np.ascontiguousarray(self.faces, dtype=np.uint32).reshape(-1)
        self._indices = BufferObject(max(indices.nbytes, 4))
        self._indices.set_data_region(indices.ctypes.data, 0, indices.nbytes)

        self.vao = VertexArray()
        with self.vao:
            for location, buffer, width in ((0, self._positions, 3), (1, self._normals, 3),
                                            (2, self._magnitude, 1), (3, self._hold, 1)):
                buffer.bind()
                gl.glEnableVertexAttribArray(location)
                gl.glVertexAttribPointer(location, width, gl.GL_FLOAT, gl.GL_FALSE, 0, 0)
            self._indices.bind_to_index_buffer()
        self.show_magnitude = False
        self.magnitude_scale = 1.0
        self.hold_strength = 0.65
        self.normals = np.zeros((self.n_vertices, 3), dtype=np.float32)
        self._face_work = np.empty((self.n_faces, 3), dtype=np.float32)
        self.set_positions(vertices)
        self.set_magnitude(None)
        self.set_hold(None)

    @staticmethod
    def _upload(buffer, array):
        if array.nbytes:
            buffer.set_data_region(ctypes.c_void_p(array.ctypes.data), 0, array.nbytes)

    def set_positions(self, vertices, *, normals=None):
        """Replace positions (and normals) in place.

        Parameters
        ----------
        vertices : (n, 3) float
            New positions, same n as at construction.
        normals : (n, 3) float, optional, keyword-only
            Precomputed normals (any positive length); computed with :func:`vertex_normals`
            when omitted.
        """
        vertices = _as_f32(vertices, (3,), "vertices")
        if len(vertices) != self.n_vertices:
            raise ValueError(f"vertices: must have {self.n_vertices} rows, got {len(vertices)}")
        if normals is None:
            vertex_normals(self.normal_operator, vertices, self.faces, out=self.normals,
                           normalize=False, work=self._face_work)
        else:
            self.normals[:] = _as_f32(normals, (3,), "normals")
        self._upload(self._positions, vertices)
        self._upload(self._normals, self.normals)

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
            raise ValueError(f"values: must have {self.n_vertices} entries, got {len(values)}")
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
            raise ValueError(f"weights: must have {self.n_vertices} entries, got {len(weights)}")
        self._upload(self._hold, weights)

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
        for buffer in (self._positions, self._normals, self._magnitude, self._hold, self._indices):
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

    def points(self, points, colour, *, size=9.0):
        """Round dots of ``size`` pixels at ``points`` ((k, 3) float)."""
        from pyglet import gl
        self._draw(points, gl.GL_POINTS, colour, size=size, round_points=True)

    def delete(self):
        """Free the GL objects now rather than at garbage collection."""
        self._buffer.delete()
        self.vao.delete()
        self.program.delete()
