"""Ray-triangle picking with a bounding-volume hierarchy (no OpenGL).

The hierarchy is a complete binary tree over triangles sorted by the Morton code of their
centroids, stored as flat arrays in heap order: node 1 is the root, node ``i`` has children
``2i`` and ``2i + 1``, and the ``n_leaves`` (a power of two) leaves are nodes
``n_leaves .. 2 n_leaves - 1``, leaf ``k`` holding sorted triangles ``k*leaf_size`` up to
``(k+1)*leaf_size``.  Because the shape of the tree depends only on the triangle order, a
deformed mesh needs only new boxes (:meth:`Picker.refit`), not a new tree.  Refitting keeps
picks exact; only their speed drops if the mesh moves far from the pose it was sorted in
(call :meth:`Picker.rebuild` then).

The triangle test is Moller-Trumbore (T. Moller and B. Trumbore, "Fast, Minimum Storage
Ray/Triangle Intersection", J. Graphics Tools 2(1), 1997), two-sided, with a barycentric
slack of ``EDGE_TOL`` so rays through shared edges and vertices cannot slip through.  The
box test is the slab test with the far distance widened by a few ulps (T. Ize, "Robust BVH
Ray Traversal", JCGT 2(2), 2013) so rounding never culls a box the triangle test would hit.

Traversal and refit run in numba when it is importable (imported on first use) and in numpy
otherwise; ``PLIANT_BACKEND=numpy`` forces numpy.

Example
-------
>>> picker = Picker(vertices, faces)
>>> hit = picker.pick(origin, direction)
>>> if hit.hit: print(hit.face, hit.point, hit.distance, hit.normal)
>>> picker.refit(new_vertices)   # after a stroke: same faces, moved vertices
"""

from __future__ import annotations

import functools
import math
from typing import NamedTuple

import numpy as np

from brushes import checks

__all__ = ["Picker", "Hit", "LEAF_SIZE", "morton_codes", "backend_name"]

# Parallel rays are rejected when |det| < PARALLEL_TOL * |e1| |e2| (det = e1 . (d x e2), |d| = 1).
PARALLEL_TOL = 1e-12
# Far-distance widening of the slab test: 1 + 2*gamma(3) in float64 (Ize 2013, section 3).
FAR_WIDEN = 1.0 + 2 * (3 * 2.0**-53) / (1 - 3 * 2.0**-53)
# Barycentric slack: a ray through a shared edge or vertex hits at least one of its triangles
# despite rounding (plain Moller-Trumbore can slip between them); hits land at most this
# fraction of an edge outside a triangle (common practice).
EDGE_TOL = 1e-9
# Triangles per leaf. A refit reads each leaf's distinct vertices, and a shared vertex is read
# once per leaf that uses it: on a 1M-triangle torus, leaves of 8 read 1.51M vertices and
# leaves of 32 read 1.02M, with a quarter of the boxes. That took the refit from 5.1-5.3 ms
# to 2.5-3.2 ms on the 2-core machine, while a pick stayed at 0.04-0.05 ms
# (``python -m benchmarks.picking``; leaves of 64 gave 3.3 ms).
LEAF_SIZE = 32
# Ray direction components smaller than this are replaced by it (sign kept) before inverting.
TINY = 1e-300


class Hit(NamedTuple):
    """Result of :meth:`Picker.pick`.

    hit : bool.  point : (3,) float64 (NaN on a miss).  face : int index into the caller's
    ``faces`` (-1 on a miss).  distance : float along the unit ray direction (inf on a miss).
    normal : (3,) float64 unit normal of the face, oriented by its winding
    (``(v1 - v0) x (v2 - v0)``), NaN on a miss.  barycentric : (3,) float64 weights of
    ``v0, v1, v2`` at the hit, for interpolating vertex data (NaN on a miss).
    """

    hit: bool
    point: np.ndarray
    face: int
    distance: float
    normal: np.ndarray
    barycentric: np.ndarray


def _miss():
    nan3 = np.full(3, np.nan)
    return Hit(False, nan3, -1, math.inf, nan3.copy(), nan3.copy())


@functools.lru_cache(maxsize=1)
def _numba_kernels():
    """The compiled kernels, or None when numba is missing or ``PLIANT_BACKEND=numpy``."""
    from brushes.kernels import numba_module

    numba = numba_module()
    if numba is None:
        return None
    return _make_numba_kernels(numba)


def backend_name():
    """``"numba"`` or ``"numpy"``: the backend :class:`Picker` uses by default."""
    return "numba" if _numba_kernels() is not None else "numpy"


# -- validation ------------------------------------------------------------------------------
def _check_vertices(vertices, n_vertices=None):
    """A C-contiguous float64 copy of ``vertices`` (the caller may change its array later)."""
    v = checks.points("vertices", vertices, rows=n_vertices)
    return np.array(v, dtype=np.float64, order="C", copy=True)


def _check_faces(faces, n_vertices):
    return checks.faces("faces", faces, n_vertices, allow_empty=False)


def _check_ray(origin, direction):
    o = checks.vector("origin", origin)
    d = checks.nonzero_vector("direction", direction)
    d = d / float(np.linalg.norm(d))
    small = np.abs(d) < TINY
    inv = 1.0 / np.where(small, np.copysign(TINY, d), d)
    return o, d, inv


# -- building --------------------------------------------------------------------------------
def _spread_bits(x):
    """Spread the low 21 bits of uint64 ``x`` so two zero bits follow each one."""
    x = x & np.uint64(0x1FFFFF)
    x = (x | (x << np.uint64(32))) & np.uint64(0x1F00000000FFFF)
    x = (x | (x << np.uint64(16))) & np.uint64(0x1F0000FF0000FF)
    x = (x | (x << np.uint64(8))) & np.uint64(0x100F00F00F00F00F)
    x = (x | (x << np.uint64(4))) & np.uint64(0x10C30C30C30C30C3)
    x = (x | (x << np.uint64(2))) & np.uint64(0x1249249249249249)
    return x


def morton_codes(points):
    """63-bit Morton (Z-order) codes of points quantized to 2**21 cells per axis of their box.

    points : (n, 3) float64.  Returns (n,) uint64; bit ``3k + 2 - a`` holds bit ``k`` of axis ``a``.
    """
    p = np.asarray(points, dtype=np.float64)
    if p.ndim != 2 or p.shape[1] != 3:
        raise checks.FieldError("points", f"must have shape (n, 3), got {p.shape}")
    lo = p.min(axis=0)
    extent = p.max(axis=0) - lo
    scale = np.where(extent > 0, (2**21 - 1) / np.where(extent > 0, extent, 1.0), 0.0)
    q = ((p - lo) * scale).astype(np.uint64)
    return (_spread_bits(q[:, 0]) << np.uint64(2)) | (_spread_bits(q[:, 1]) << np.uint64(1)) | _spread_bits(q[:, 2])


def _refit_numpy(vertices, faces_sorted, n_leaves, leaf_size, lo, hi):
    m = len(faces_sorted)
    a, b, c = (np.take(vertices, faces_sorted[:, k], axis=0) for k in range(3))
    tlo = np.full((n_leaves * leaf_size, 3), np.inf)
    thi = np.full((n_leaves * leaf_size, 3), -np.inf)
    np.minimum(np.minimum(a, b, out=tlo[:m]), c, out=tlo[:m])
    np.maximum(np.maximum(a, b, out=thi[:m]), c, out=thi[:m])
    leaf_lo, leaf_hi = lo[n_leaves:], hi[n_leaves:]
    leaf_lo[:], leaf_hi[:] = tlo[0::leaf_size], thi[0::leaf_size]
    for j in range(1, leaf_size):
        np.minimum(leaf_lo, tlo[j::leaf_size], out=leaf_lo)
        np.maximum(leaf_hi, thi[j::leaf_size], out=leaf_hi)
    size = n_leaves // 2
    while size >= 1:
        np.minimum(lo[2 * size : 4 * size : 2], lo[2 * size + 1 : 4 * size : 2], out=lo[size : 2 * size])
        np.maximum(hi[2 * size : 4 * size : 2], hi[2 * size + 1 : 4 * size : 2], out=hi[size : 2 * size])
        size //= 2


def _leaf_tables_numpy(faces_sorted, n, leaf_size, n_leaves):
    """Vertex order (first use along the sorted faces, unused vertices last), the sorted faces
    in local indices, and each leaf's distinct local vertices as CSR (ptr, indices)."""
    m = len(faces_sorted)
    corners = faces_sorted.reshape(-1)
    used, first = np.unique(corners, return_index=True)
    order = np.concatenate([used[np.argsort(first, kind="stable")], np.setdiff1d(np.arange(n), used)])
    local = np.empty(n, dtype=np.int64)
    local[order] = np.arange(n)
    faces_local = np.ascontiguousarray(local[faces_sorted])
    slots = np.repeat(np.arange(m, dtype=np.int64) // leaf_size, 3)
    keys = np.unique(slots * n + faces_local.reshape(-1))
    leaf_of, leaf_vertices = np.divmod(keys, n)
    return order, faces_local, np.searchsorted(leaf_of, np.arange(n_leaves + 1)), leaf_vertices


# -- numpy traversal -------------------------------------------------------------------------
def _slab_numpy(lo, hi, o, inv, t_max):
    """Entry distance of the ray into each box, inf where it misses (boxes (k, 3))."""
    ta = (lo - o) * inv
    tb = (hi - o) * inv
    t0 = np.maximum(np.minimum(ta, tb).max(axis=1), 0.0)
    t1 = np.minimum(np.maximum(ta, tb).min(axis=1) * FAR_WIDEN, t_max)
    empty = lo[:, 0] > hi[:, 0]
    return np.where((t0 <= t1) & ~empty, t0, np.inf)


def _triangles_numpy(vertices, faces, o, d):
    """Moller-Trumbore on many triangles: (t, u, v) with t = inf where the ray misses."""
    v0, v1, v2 = (vertices[faces[:, k]] for k in range(3))
    e1, e2 = v1 - v0, v2 - v0
    p = np.cross(d, e2)
    det = np.einsum("ij,ij->i", e1, p)
    ok = det * det >= PARALLEL_TOL**2 * np.einsum("ij,ij->i", e1, e1) * np.einsum("ij,ij->i", e2, e2)
    ok &= det != 0
    inv_det = np.divide(1.0, det, out=np.zeros_like(det), where=ok)
    s = o - v0
    u = np.einsum("ij,ij->i", s, p) * inv_det
    q = np.cross(s, e1)
    v = (q @ d) * inv_det
    t = np.einsum("ij,ij->i", e2, q) * inv_det
    ok &= (u >= -EDGE_TOL) & (u <= 1 + EDGE_TOL) & (v >= -EDGE_TOL) & (u + v <= 1 + EDGE_TOL) & (t >= 0)
    return np.where(ok, t, np.inf), u, v


def _pick_numpy(lo, hi, n_leaves, leaf_size, faces_sorted, vertices, o, d, inv, t_max, chunk=64):
    nodes = np.array([1], dtype=np.int64)
    while nodes[0] < n_leaves:  # all frontier nodes share one level
        hit = _slab_numpy(lo[nodes], hi[nodes], o, inv, t_max) < np.inf
        nodes = nodes[hit]
        if len(nodes) == 0:
            return -1, math.inf, 0.0, 0.0
        nodes = np.concatenate([2 * nodes, 2 * nodes + 1])
    t_enter = _slab_numpy(lo[nodes], hi[nodes], o, inv, t_max)
    keep = t_enter < np.inf
    nodes, t_enter = nodes[keep], t_enter[keep]
    order = np.argsort(t_enter)
    nodes, t_enter = nodes[order], t_enter[order]
    m = len(faces_sorted)
    best = (-1, t_max, 0.0, 0.0)
    for start in range(0, len(nodes), chunk):
        if t_enter[start] > best[1]:
            break
        first = (nodes[start : start + chunk] - n_leaves) * leaf_size
        tri = (first[:, None] + np.arange(leaf_size)).ravel()
        tri = tri[tri < m]
        t, u, v = _triangles_numpy(vertices, faces_sorted[tri], o, d)
        k = int(np.argmin(t))
        if t[k] < best[1]:
            best = (int(tri[k]), float(t[k]), float(u[k]), float(v[k]))
    return best


# -- numba kernels ---------------------------------------------------------------------------
def _make_numba_kernels(numba):
    njit = numba.njit(cache=True, nogil=True)

    @njit
    def refit(source, vertex_order, vertices, leaf_ptr, leaf_vertices, n_leaves, lo, hi):
        # Copy the positions into leaf order (so the leaves below read neighbouring memory),
        # then each leaf's box from the distinct vertices of its triangles, then the inner
        # nodes, bottom up. One thread: on a machine whose other core is busy, a parallel
        # loop waits for it and is slower, and the pass is memory-bound anyway.
        for i in range(vertex_order.shape[0]):
            k = vertex_order[i]
            vertices[i, 0], vertices[i, 1], vertices[i, 2] = source[k, 0], source[k, 1], source[k, 2]
        for leaf in range(n_leaves):
            x0 = y0 = z0 = np.inf
            x1 = y1 = z1 = -np.inf
            for j in range(leaf_ptr[leaf], leaf_ptr[leaf + 1]):
                vi = leaf_vertices[j]
                x, y, z = vertices[vi, 0], vertices[vi, 1], vertices[vi, 2]
                x0, y0, z0 = min(x0, x), min(y0, y), min(z0, z)
                x1, y1, z1 = max(x1, x), max(y1, y), max(z1, z)
            node = n_leaves + leaf
            lo[node, 0], lo[node, 1], lo[node, 2] = x0, y0, z0
            hi[node, 0], hi[node, 1], hi[node, 2] = x1, y1, z1
        for node in range(n_leaves - 1, 0, -1):
            for a in range(3):
                lo[node, a] = min(lo[2 * node, a], lo[2 * node + 1, a])
                hi[node, a] = max(hi[2 * node, a], hi[2 * node + 1, a])

    @njit
    def slab(lo, hi, node, o, inv, t_max):
        if lo[node, 0] > hi[node, 0]:
            return np.inf
        t0 = 0.0
        t1 = t_max
        for a in range(3):
            ta = (lo[node, a] - o[a]) * inv[a]
            tb = (hi[node, a] - o[a]) * inv[a]
            if ta > tb:
                ta, tb = tb, ta
            tb *= FAR_WIDEN
            if ta > t0:
                t0 = ta
            if tb < t1:
                t1 = tb
        if t0 > t1:
            return np.inf
        return t0

    @njit
    def pick(lo, hi, n_leaves, leaf_size, faces_sorted, vertices, o, d, inv, t_max):
        m = faces_sorted.shape[0]
        best_k, best_t, best_u, best_v = -1, t_max, 0.0, 0.0
        stack = np.empty(128, np.int64)
        dist = np.empty(128, np.float64)
        t_root = slab(lo, hi, 1, o, inv, best_t)
        if t_root == np.inf:
            return best_k, np.inf, best_u, best_v
        stack[0] = 1
        dist[0] = t_root
        sp = 1
        while sp > 0:
            sp -= 1
            node = stack[sp]
            if dist[sp] > best_t:
                continue
            if node >= n_leaves:
                start = (node - n_leaves) * leaf_size
                stop = min(start + leaf_size, m)
                for k in range(start, stop):
                    i0, i1, i2 = faces_sorted[k, 0], faces_sorted[k, 1], faces_sorted[k, 2]
                    e1x = vertices[i1, 0] - vertices[i0, 0]
                    e1y = vertices[i1, 1] - vertices[i0, 1]
                    e1z = vertices[i1, 2] - vertices[i0, 2]
                    e2x = vertices[i2, 0] - vertices[i0, 0]
                    e2y = vertices[i2, 1] - vertices[i0, 1]
                    e2z = vertices[i2, 2] - vertices[i0, 2]
                    px = d[1] * e2z - d[2] * e2y
                    py = d[2] * e2x - d[0] * e2z
                    pz = d[0] * e2y - d[1] * e2x
                    det = e1x * px + e1y * py + e1z * pz
                    tol = PARALLEL_TOL * PARALLEL_TOL * (e1x * e1x + e1y * e1y + e1z * e1z) * (
                        e2x * e2x + e2y * e2y + e2z * e2z
                    )
                    if det == 0.0 or det * det < tol:
                        continue
                    inv_det = 1.0 / det
                    sx = o[0] - vertices[i0, 0]
                    sy = o[1] - vertices[i0, 1]
                    sz = o[2] - vertices[i0, 2]
                    u = (sx * px + sy * py + sz * pz) * inv_det
                    if u < -EDGE_TOL or u > 1.0 + EDGE_TOL:
                        continue
                    qx = sy * e1z - sz * e1y
                    qy = sz * e1x - sx * e1z
                    qz = sx * e1y - sy * e1x
                    v = (d[0] * qx + d[1] * qy + d[2] * qz) * inv_det
                    if v < -EDGE_TOL or u + v > 1.0 + EDGE_TOL:
                        continue
                    t = (e2x * qx + e2y * qy + e2z * qz) * inv_det
                    if t >= 0.0 and t < best_t:
                        best_k, best_t, best_u, best_v = k, t, u, v
            else:
                left = 2 * node
                tl = slab(lo, hi, left, o, inv, best_t)
                tr = slab(lo, hi, left + 1, o, inv, best_t)
                # Push the farther child first so the nearer one is visited next.
                if tl <= tr:
                    if tr < np.inf:
                        stack[sp] = left + 1
                        dist[sp] = tr
                        sp += 1
                    if tl < np.inf:
                        stack[sp] = left
                        dist[sp] = tl
                        sp += 1
                else:
                    if tl < np.inf:
                        stack[sp] = left
                        dist[sp] = tl
                        sp += 1
                    stack[sp] = left + 1
                    dist[sp] = tr
                    sp += 1
        if best_k < 0:
            return best_k, np.inf, best_u, best_v
        return best_k, best_t, best_u, best_v

    @njit
    def tables(faces_sorted, n, leaf_size, n_leaves):
        # The same tables as _leaf_tables_numpy, in two linear passes (no sorting).
        m = faces_sorted.shape[0]
        local = np.full(n, -1, np.int64)
        order = np.empty(n, np.int64)
        count = 0
        for k in range(m):
            for c in range(3):
                vi = faces_sorted[k, c]
                if local[vi] < 0:
                    local[vi] = count
                    order[count] = vi
                    count += 1
        for vi in range(n):
            if local[vi] < 0:
                local[vi] = count
                order[count] = vi
                count += 1
        faces_local = np.empty((m, 3), np.int64)
        for k in range(m):
            for c in range(3):
                faces_local[k, c] = local[faces_sorted[k, c]]
        ptr = np.zeros(n_leaves + 1, np.int64)
        members = np.empty(3 * m, np.int64)
        total = 0
        for leaf in range(n_leaves):
            ptr[leaf] = total
            start = total
            for k in range(leaf * leaf_size, min((leaf + 1) * leaf_size, m)):
                for c in range(3):
                    vi = faces_local[k, c]
                    seen = False
                    for j in range(start, total):
                        if members[j] == vi:
                            seen = True
                            break
                    if not seen:
                        members[total] = vi
                        total += 1
            # Sorted within the leaf, as np.unique gives them.
            members[start:total] = np.sort(members[start:total])
        ptr[n_leaves] = total
        return order, faces_local, ptr, members[:total].copy()

    return {"refit": refit, "pick": pick, "tables": tables}


# -- the picker ------------------------------------------------------------------------------
class Picker:
    """Closest-hit ray picking on a triangle mesh.

    vertices : (n, 3) float64 positions (copied).  faces : (m, 3) int vertex indices, m >= 1.
    leaf_size : triangles per leaf (keyword-only), :data:`LEAF_SIZE` by default.
    backend : ``"numba"``, ``"numpy"`` or None for :func:`backend_name`.

    Memory: about ``(m / leaf_size) * 96`` bytes of boxes, ``m * 40`` bytes of sorted faces,
    order and leaf vertex lists, and ``n * 32`` bytes of vertex order and copied vertices.
    """

    def __init__(self, vertices, faces, *, leaf_size=None, backend=None):
        leaf_size = LEAF_SIZE if leaf_size is None else leaf_size
        leaf_size = int(leaf_size)
        if leaf_size < 1:
            raise checks.FieldError("leaf_size", f"must be >= 1, got {leaf_size}")
        if backend not in (None, "numba", "numpy"):
            raise checks.FieldError("backend", f"must be 'numba', 'numpy' or None, got {backend!r}")
        if backend is None:
            backend = backend_name()
        if backend == "numba" and _numba_kernels() is None:
            raise checks.FieldError("backend", "numba is not available (missing, or PLIANT_BACKEND=numpy)")
        self.backend = backend
        self.leaf_size = leaf_size
        v = _check_vertices(vertices)
        self._faces = _check_faces(faces, len(v))
        self.rebuild(v)

    @property
    def n_faces(self):
        return len(self._faces)

    def rebuild(self, vertices):
        """Sort the triangles anew (Morton order of the centroids of ``vertices``) and refit."""
        v = np.ascontiguousarray(checks.points("vertices", vertices,
                                               rows=getattr(self, "_n_vertices", None)))
        self._n_vertices = len(v)
        centroids = v[self._faces].mean(axis=1)
        self.order = np.argsort(morton_codes(centroids), kind="stable")  # sorted slot -> face index
        faces_sorted = self._faces[self.order]
        m = len(self._faces)
        self.n_leaves = 1 << max(0, math.ceil(math.log2(math.ceil(m / self.leaf_size))))
        self.lo = np.empty((2 * self.n_leaves, 3))
        self.hi = np.empty((2 * self.n_leaves, 3))
        self.lo[0], self.hi[0] = np.inf, -np.inf  # node 0 is unused
        # Vertices are kept in the order the leaves first use them (``vertex_order``: local
        # index -> caller's index) and the sorted faces name local indices, so neighbouring
        # leaves read neighbouring memory. Each leaf lists the distinct (local) vertices of
        # its triangles (CSR ``leaf_ptr``, ``leaf_vertices``), so a refit reads each once.
        n = len(v)
        tables = _numba_kernels()["tables"] if self.backend == "numba" else _leaf_tables_numpy
        self.vertex_order, self.faces_sorted, self.leaf_ptr, self.leaf_vertices = tables(
            np.ascontiguousarray(faces_sorted), n, self.leaf_size, self.n_leaves)
        self.vertices = np.empty((n, 3))
        self._refit_boxes(v)

    def refit(self, vertices):
        """Recompute the boxes for moved ``vertices`` ((n, 3) float64, same n, faces unchanged).

        The positions are copied into the picker's own (leaf-ordered) array in the same pass,
        so the caller may change its array afterwards.
        """
        v = checks.points("vertices", vertices, rows=self._n_vertices)
        self._refit_boxes(np.ascontiguousarray(v))

    def _refit_boxes(self, v):
        if self.backend == "numba":
            _numba_kernels()["refit"](v, self.vertex_order, self.vertices, self.leaf_ptr,
                                      self.leaf_vertices, self.n_leaves, self.lo, self.hi)
        else:
            np.take(v, self.vertex_order, axis=0, out=self.vertices)
            _refit_numpy(self.vertices, self.faces_sorted, self.n_leaves, self.leaf_size, self.lo, self.hi)

    def pick(self, origin, direction, *, max_distance=math.inf):
        """The first triangle hit along the ray ``origin + t * direction``, ``0 <= t < max_distance``.

        origin, direction : (3,) float64 (direction need not be unit; distances are measured
        along its unit vector).  Back faces are hit too.  Returns :class:`Hit`.
        """
        o, d, inv = _check_ray(origin, direction)
        t_max = float(max_distance)
        if not t_max > 0:
            raise checks.FieldError("max_distance", f"must be > 0, got {max_distance!r}")
        if self.backend == "numba":
            k, t, u, v = _numba_kernels()["pick"](
                self.lo, self.hi, self.n_leaves, self.leaf_size, self.faces_sorted, self.vertices, o, d, inv, t_max
            )
        else:
            k, t, u, v = _pick_numpy(
                self.lo, self.hi, self.n_leaves, self.leaf_size, self.faces_sorted, self.vertices, o, d, inv, t_max
            )
        if k < 0:
            return _miss()
        a, b, c = self.vertices[self.faces_sorted[k]]
        n = np.cross(b - a, c - a)
        n /= np.linalg.norm(n)
        return Hit(True, o + t * d, int(self.order[k]), float(t), n, np.array([1.0 - u - v, u, v]))
