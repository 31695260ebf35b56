"""Surface measures of a triangle mesh: face cross products, enclosed volume, vertex normals.

The one place for these formulas; the quality report, the mesh formats and the viewer call it.
Plain functions on arrays; float32 input stays float32 where noted (the viewer's per-frame path),
everything else is float64.

    >>> import numpy as np
    >>> v = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], float)
    >>> f = np.array([[0, 2, 1], [0, 1, 3], [0, 3, 2], [1, 2, 3]])
    >>> round(signed_volume(v, f), 6)
    0.166667
"""
from __future__ import annotations

import numpy as np

from brushes import checks

__all__ = ["face_cross_products", "signed_volume", "vertex_normals", "vertex_normal_operator"]


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
