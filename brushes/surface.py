"""Surface measures of a triangle mesh: face cross products, enclosed volume, vertex normals.

The one place for these formulas; the quality report, the mesh formats and the viewer call it.
Plain functions on arrays; float32 input stays float32 where noted (the viewer's per-frame path),
everything else is float64. The cross products and normal sums run as parallel numba loops
when numba is there (`brushes.kernels.numba_module`), else as the numpy expressions beside them.

    >>> import numpy as np
    >>> v = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], float)
    >>> f = np.array([[0, 2, 1], [0, 1, 3], [0, 3, 2], [1, 2, 3]])
    >>> round(signed_volume(v, f), 6)
    0.166667
"""
from __future__ import annotations

import numpy as np

from brushes import checks

__all__ = ["face_cross_products", "signed_volume", "update_vertex_normals", "vertex_normals",
           "vertex_normal_operator"]

_KERNELS = None
#: Faces per numpy cross-product call in :func:`update_vertex_normals` (temporaries stay in cache).
_CHUNK = 32768


def _kernels():
    """The numba loops (compiled on first use, cached on disk), or None for the numpy path."""
    global _KERNELS
    from brushes import kernels

    numba = kernels.numba_module()
    if numba is None:
        return None
    if _KERNELS is None:
        opts = dict(parallel=True, cache=True, nogil=True)

        @numba.njit(inline="always")
        def cross_one(v, f, i, out):
            a, b, c = f[i, 0], f[i, 1], f[i, 2]
            ux, uy, uz = v[b, 0] - v[a, 0], v[b, 1] - v[a, 1], v[b, 2] - v[a, 2]
            wx, wy, wz = v[c, 0] - v[a, 0], v[c, 1] - v[a, 1], v[c, 2] - v[a, 2]
            out[i, 0] = uy * wz - uz * wy
            out[i, 1] = uz * wx - ux * wz
            out[i, 2] = ux * wy - uy * wx

        @numba.njit(inline="always")
        def sum_one(indptr, indices, cross, v, out):
            sx = 0.0
            sy = 0.0
            sz = 0.0
            for j in range(indptr[v], indptr[v + 1]):
                k = indices[j]
                sx += cross[k, 0]
                sy += cross[k, 1]
                sz += cross[k, 2]
            out[v, 0] = sx
            out[v, 1] = sy
            out[v, 2] = sz

        @numba.njit(**opts)
        def cross_all(v, f, out):
            """out[i] = (b - a) x (c - a) for every face i."""
            for i in numba.prange(f.shape[0]):
                cross_one(v, f, i, out)
            return out

        @numba.njit(**opts)
        def cross_rows(v, f, rows, out):
            """out[i] = (b - a) x (c - a) for the faces i in `rows`."""
            for q in numba.prange(rows.shape[0]):
                cross_one(v, f, rows[q], out)
            return out

        @numba.njit(**opts)
        def sum_all(indptr, indices, cross, out):
            """out[v] = sum of cross over the faces at v (the CSR rows of the operator), every v."""
            for v in numba.prange(indptr.shape[0] - 1):
                sum_one(indptr, indices, cross, v, out)
            return out

        @numba.njit(**opts)
        def sum_rows(indptr, indices, cross, rows, out):
            """out[v] = sum of cross over the faces at v, for the v in `rows`."""
            for q in numba.prange(rows.shape[0]):
                sum_one(indptr, indices, cross, rows[q], out)
            return out

        @numba.njit(**opts)
        def mark(indptr, indices, f, moved, face_flags, vertex_flags):
            """Flag the faces at the `moved` vertices, then every corner of those faces."""
            for q in numba.prange(moved.shape[0]):
                v = moved[q]
                for j in range(indptr[v], indptr[v + 1]):
                    face_flags[indices[j]] = 1
            for i in numba.prange(f.shape[0]):
                if face_flags[i]:
                    vertex_flags[f[i, 0]] = 1
                    vertex_flags[f[i, 1]] = 1
                    vertex_flags[f[i, 2]] = 1

        @numba.njit(nogil=True, cache=True)
        def scatter(f, cross, out):
            """out[v] += cross[i] for each corner v of face i (one thread: no write races)."""
            for i in range(f.shape[0]):
                for c in range(3):
                    v = f[i, c]
                    out[v, 0] += cross[i, 0]
                    out[v, 1] += cross[i, 1]
                    out[v, 2] += cross[i, 2]
            return out

        _KERNELS = dict(cross_all=cross_all, cross_rows=cross_rows, sum_all=sum_all, sum_rows=sum_rows,
                        mark=mark, scatter=scatter)
    return _KERNELS


def _vertices(vertices):
    v = np.asarray(vertices)
    if v.dtype not in (np.float32, np.float64):
        v = checks.points("vertices", v)
    elif v.ndim != 2 or v.shape[1] != 3:
        raise checks.FieldError("vertices", f"must have shape (n, 3), got {v.shape}")
    return v


def face_cross_products(vertices, faces):
    """``(b - a) x (c - a)`` per triangle: twice its area times its unit normal.

    vertices : (n, 3) float32 or float64 (the result keeps the dtype; other input becomes float64)
    faces : (m, 3) int, counter-clockwise seen from outside
    returns : (m, 3) of the vertices' dtype
    """
    v = _vertices(vertices)
    f = checks.faces("faces", faces, len(v))
    k = _kernels()
    if k is not None:
        out = np.empty((len(f), 3), dtype=v.dtype)
        return k["cross_all"](np.ascontiguousarray(v), f, out)
    a = v[f[:, 0]]
    return np.cross(v[f[:, 1]] - a, v[f[:, 2]] - a)


def signed_volume(vertices, faces):
    """Signed volume enclosed by a closed triangle mesh, by the divergence theorem.

    ``V = (1/6) sum_f a_f . ((b_f - a_f) x (c_f - a_f))``: the signed tetrahedra from an origin to
    each face. The origin is moved to the bounding-box centre first, which leaves V unchanged for
    a closed mesh and limits cancellation far from the origin. Positive when the faces wind
    counter-clockwise seen from outside. Only meaningful for a closed mesh (every edge shared by
    two faces in opposite directions); for an open one the value depends on the origin.

    vertices : (n, 3) float
    faces : (m, 3) int
    returns : float (float64 arithmetic whatever the input dtype)
    """
    v = checks.points("vertices", vertices)
    f = checks.faces("faces", faces, len(v))
    if len(f) == 0:
        return 0.0
    centre = 0.5 * (v.min(axis=0) + v.max(axis=0))
    a = v[f[:, 0]] - centre
    cross = np.cross(v[f[:, 1]] - v[f[:, 0]], v[f[:, 2]] - v[f[:, 0]])
    return float(np.einsum("ij,ij->", a, cross) / 6.0)


def vertex_normal_operator(faces, n_vertices):
    """Sparse (n, m) float32 incidence matrix: row i has a 1 for each face that uses vertex i.

    ``operator @ face_cross_products(vertices, faces)`` is the area-weighted normal sum of
    :func:`vertex_normals`; it depends only on the connectivity, so a caller that re-evaluates
    normals for the same faces many times (a drag in the viewer) builds it once.

    faces : (m, 3) int
    n_vertices : int, >= every index in faces
    returns : scipy.sparse.csr_matrix, shape (n_vertices, m), float32
    """
    import scipy.sparse

    n = int(n_vertices)
    if n < 0:
        raise checks.FieldError("n_vertices", f"must be >= 0, got {n_vertices!r}")
    f = checks.faces("faces", faces, n)
    m = len(f)
    op = scipy.sparse.csr_matrix(
        (np.ones(3 * m, np.float32), (f.reshape(-1), np.repeat(np.arange(m), 3))), shape=(n, m))
    op.sum_duplicates()
    op.sort_indices()
    return op


def vertex_normals(vertices, faces, *, normalize=True, operator=None):
    """Area-weighted vertex normals.

    ``N_i = normalise( sum over faces f at vertex i of (b_f - a_f) x (c_f - a_f) )``: each face
    counts in proportion to its area (area weighting, common practice; trimesh's default
    ``vertex_normals`` weights by corner angle instead, and its ``geometry.mean_vertex_normals`` of
    area-scaled face normals gives this one). A vertex with no faces, or whose faces cancel or have no area, gets the
    zero vector; callers test ``np.any(N, axis=1)`` to find them.

    vertices : (n, 3) float32 or float64 (the result keeps the dtype)
    faces : (m, 3) int, counter-clockwise seen from outside
    normalize : bool, keyword-only; False returns the unnormalised sums
    operator : optional, keyword-only; :func:`vertex_normal_operator` for these faces, to reuse
    returns : (n, 3) of the vertices' dtype
    """
    v = _vertices(vertices)
    f = checks.faces("faces", faces, len(v))
    cross = face_cross_products(v, f)
    n = len(v)
    if operator is not None:
        if operator.shape != (n, len(f)):
            raise checks.FieldError("operator", f"must have shape ({n}, {len(f)}) for these "
                                    f"vertices and faces, got {operator.shape}")
        summed = np.asarray(operator @ cross, dtype=v.dtype)
    elif (k := _kernels()) is not None:
        summed = k["scatter"](f, cross, np.zeros((n, 3), dtype=v.dtype))
    else:
        keys = f.reshape(-1)
        rows = np.repeat(cross.astype(np.float64, copy=False), 3, axis=0)
        summed = np.empty((n, 3), dtype=v.dtype)
        for c in range(3):
            summed[:, c] = np.bincount(keys, weights=rows[:, c], minlength=n)[:n]
    if not normalize:
        return summed
    length = np.sqrt(np.einsum("ij,ij->i", summed, summed))
    scale = np.zeros_like(length)
    np.divide(1.0, length, out=scale, where=length > 0)
    return summed * scale[:, None]


def update_vertex_normals(vertices, faces, operator, cross, normals, *, moved=None):
    """Bring cached face cross products and unnormalised vertex normals up to date, in place.

    With ``moved`` None every face's cross product and every vertex's sum is recomputed;
    otherwise only the faces that use a vertex in ``moved`` and the sums at those faces'
    corners, the only ones that can change. The formulas are :func:`face_cross_products` and
    ``normals = operator @ cross`` (:func:`vertex_normals` with ``normalize=False``).

    vertices : (n, 3) float32 or float64
    faces : (m, 3) int32 or int64 C-contiguous, already checked (:func:`brushes.checks.faces`)
    operator : :func:`vertex_normal_operator` of these faces, (n, m)
    cross : (m, 3) C-contiguous, the cached cross products (written)
    normals : (n, 3) C-contiguous, the cached sums (written)
    moved : (k,) int, keyword-only, or None for all
    returns : (j,) int64 indices of the vertices whose sums were rewritten (all n when moved is None)
    """
    v = _vertices(vertices)
    n, m = len(v), len(faces)
    if operator.shape != (n, m):
        raise checks.FieldError("operator", f"must have shape ({n}, {m}) for these vertices and faces, "
                                f"got {operator.shape}")
    for name, arr, rows in (("cross", cross, m), ("normals", normals, n)):
        if not isinstance(arr, np.ndarray) or arr.shape != (rows, 3) or not arr.flags.c_contiguous:
            raise checks.FieldError(name, f"must be a C-contiguous ({rows}, 3) array")
    if moved is not None:
        moved = np.asarray(moved, dtype=np.int64).reshape(-1)
        if moved.size and (moved.min() < 0 or moved.max() >= n):
            raise checks.FieldError("moved", f"indices must lie in [0, {n})")
    k = _kernels()
    if k is None:
        if moved is None:
            for start in range(0, m, _CHUNK):  # in cache-sized pieces: about a third faster
                cross[start:start + _CHUNK] = face_cross_products(v, faces[start:start + _CHUNK])
            normals[:] = operator @ cross
            return np.arange(n)
        touched = np.unique(operator[moved].indices)  # faces that use a moved vertex
        cross[touched] = face_cross_products(v, faces[touched])
        corners = np.unique(faces[touched])
        normals[corners] = operator[corners] @ cross
        return corners
    v = np.ascontiguousarray(v)
    indptr, indices = operator.indptr, operator.indices
    if moved is None:
        k["cross_all"](v, faces, cross)
        k["sum_all"](indptr, indices, cross, normals)
        return np.arange(n)
    face_flags = np.zeros(m, np.uint8)
    vertex_flags = np.zeros(n, np.uint8)
    k["mark"](indptr, indices, faces, moved, face_flags, vertex_flags)
    k["cross_rows"](v, faces, np.flatnonzero(face_flags), cross)
    corners = np.flatnonzero(vertex_flags)
    k["sum_rows"](indptr, indices, cross, corners, normals)
    return corners
