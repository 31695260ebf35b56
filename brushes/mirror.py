"""Mirror symmetry: a brush acting together with its reflection across a plane."""
from __future__ import annotations

import numpy as np

from brushes import checks, kernels
from brushes.brush import Brush, PointLoads


class Mirrored(Brush):
    """`brush` plus its reflection across the plane through `point` with unit normal `normal`.

    With R(x) = point + H (x - point) and H = I - 2 n n^T, the reflected field is H u(R x), so
    u_m(x) = u(x) + H u(R x) and J_m(x) = J(x) + H J(R x) H. Both satisfy u_m(R x) = H u_m(x).
    A brush whose centre lies on the plane acts twice there.
    """

    kind = "mirror"

    def __init__(self, brush, normal, point=(0.0, 0.0, 0.0)):
        if not isinstance(brush, Brush):
            raise checks.FieldError("brush", f"must be a Brush, got {type(brush).__name__}")
        n = checks.nonzero_vector("normal", normal)
        self.brush = brush
        self.normal = n / float(np.linalg.norm(n))
        self._normal_given = n
        self.point = checks.vector("point", point)
        self.H = np.eye(3) - 2.0 * np.outer(self.normal, self.normal)
        self._shift = 2.0 * float(self.point @ self.normal) * self.normal
        for name in ("center", "radius", "poisson"):
            if hasattr(brush, name):
                setattr(self, name, getattr(brush, name))

    @property
    def shift(self):
        """(3,) float64, 2 (point . n) n: the reflection is x -> H x + shift."""
        return self._shift

    def reflect(self, points):
        """R(x) = H x + 2 (point . n) n for points (n, 3): their mirror images."""
        return kernels.affine_map(points, self.H, self._shift)

    def _flip(self, vectors):
        """H v for vectors (n, 3) float64, in place."""
        return kernels.affine_map(vectors, self.H, np.zeros(3), out=vectors)

    def params(self):
        return {"brush": {"kind": self.brush.kind, **self.brush.params()},
                "normal": self._normal_given.tolist(), "point": self.point.tolist()}

    def displacement(self, points, out=None):
        u = self.brush.displacement(points, out=out)
        u += self._flip(self.brush.displacement(self.reflect(points)))
        return u

    def jacobian(self, points):
        J = self.brush.jacobian(points)
        J += self.H @ self.brush.jacobian(self.reflect(points)) @ self.H
        return J

    def velocity(self, points, t, out=None):
        v = self.brush.velocity(points, t, out=out)
        v += self._flip(self.brush.velocity(self.reflect(points), t))
        return v

    def fused_flow(self, points, *, steps):
        """The inner brush's fused flow with its image (`Brush.fused_mirror_flow`), or None."""
        if type(self) is not Mirrored:
            return None
        return self.brush.fused_mirror_flow(points, steps=steps, H=self.H, shift=self._shift)

    def point_loads(self, t):
        """The inner brush's loads and their images: centre R c, force H f, twist load -H q (an
        axial vector changes sign under a reflection); None when the inner brush has none."""
        if type(self) is not Mirrored:
            return None
        inner = self.brush.point_loads(t)
        if inner is None:
            return None
        return PointLoads(np.concatenate([inner.centers, self.reflect(inner.centers)]),
                          np.concatenate([inner.forces, inner.forces @ self.H.T]),
                          np.concatenate([inner.torques, -(inner.torques @ self.H.T)]),
                          np.concatenate([inner.eps, inner.eps]), np.concatenate([inner.weights, inner.weights]),
                          inner.beta)

    def pin_clearance(self):
        """The inner brush's segments and their mirror images."""
        out = []
        for start, end in self.brush.pin_clearance():
            ends = self.reflect(np.stack([start, end]))
            out += [(start, end), (ends[0], ends[1])]
        return out

    def lipschitz(self):
        return 2.0 * self.brush.lipschitz()

    def velocity_lipschitz(self):
        return 2.0 * self.brush.velocity_lipschitz()

    def velocity_lipschitz_at(self, t):
        """Twice the inner brush's bound at t (the reflection is an isometry): a brush bounded
        at each stage time (Handles) keeps that check when mirrored."""
        return 2.0 * self.brush.velocity_lipschitz_at(t)

    def reach(self, tol):
        return np.inf  # two centres: the viewer falls back to evaluating every vertex


def mirror(brush, normal, point=(0.0, 0.0, 0.0)):
    """A brush that acts together with its reflection across the plane through `point` with `normal`.

    brush : Brush, normal : (3,) nonzero, point : (3,). Returns a `Mirrored` brush whose
    `displacement`, `jacobian` and `apply` are symmetric across the plane to round-off.
    """
    return Mirrored(brush, normal, point)
