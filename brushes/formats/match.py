"""Match a posed file's vertices to its rest file's, so that two files can be compared.

Three cases, tried in order:

1. the same vertex count and triangles: vertex ``i`` is vertex ``i``;
2. the posed file was converted by pliant with vertices split at seams and records the source
   vertex of each (PLY ``source_vertex``, glTF ``_SOURCE_VERTEX``): each rest vertex takes the
   position of a copy (all copies of one vertex move alike under a brush);
3. the same number of triangles in the same order (an STL keeps no vertex identity, only facet
   corners): each rest vertex takes the position of the corner that uses it, which must agree
   over all its corners.
"""
from __future__ import annotations

import numpy as np

from .document import MeshDoc, MeshError

__all__ = ["posed_in_rest_order"]


def posed_in_rest_order(rest: MeshDoc, posed: MeshDoc, *, rest_name="REST", posed_name="POSED"):
    """(n, 3) float64: ``posed``'s positions in ``rest``'s vertex order.

    Raises MeshError naming both files when no correspondence holds.
    """
    n = len(rest.vertices)
    if len(posed.vertices) == n and np.array_equal(rest.faces, posed.faces):
        return posed.vertices.copy()
    src = posed.source_vertex
    if src is not None and len(src) == len(posed.vertices) and len(src) and src.max() < n \
            and src.min() >= 0:
        out = rest.vertices.copy()
        out[src] = posed.vertices
        covered = np.zeros(n, bool)
        covered[src] = True
        if covered[np.unique(rest.faces)].all():
            return out
    if len(rest.faces) == len(posed.faces) and len(rest.faces):
        out = np.full((n, 3), np.nan)
        out[rest.faces.reshape(-1)] = posed.vertices[posed.faces.reshape(-1)]
        agree = np.allclose(out[rest.faces.reshape(-1)], posed.vertices[posed.faces.reshape(-1)],
                            rtol=0, atol=0)
        unused = np.isnan(out[:, 0])
        if agree:
            out[unused] = rest.vertices[unused]
            return out
    if len(posed.vertices) == n:
        raise MeshError(f"{posed_name}: has the {n} vertices of {rest_name} but other faces, and "
                        "no record of a conversion")
    raise MeshError(f"{posed_name}: its vertices do not match {rest_name} ({len(posed.vertices)} "
                    f"vertices and {len(posed.faces)} triangles against {n} and {len(rest.faces)}, "
                    "and no record of a conversion)")
